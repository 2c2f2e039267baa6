"""YAML loading that keeps the line and column of every value.

Validation needs to point at `file:line:col`, so we compose PyYAML's node graph ourselves
(safe loader, no Python tags) and turn it into `Marked` values. Duplicate keys are errors
rather than silently winning, and alias expansion is budgeted so a "billion laughs" file is
refused instead of hanging.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import yaml

from server.protocol.problems import Problem

# A protocol or lab file is a few hundred nodes; a generous budget still stops alias bombs.
NODE_BUDGET = 200_000


@dataclass(frozen=True, slots=True)
class Mark:
    file: str
    line: int  # 1-based
    col: int  # 1-based


@dataclass(frozen=True, slots=True)
class Marked:
    """A YAML value with where it came from. `value` is a str/int/float/bool/None, a
    dict[str, Marked] (keys kept as Marked in `keys`), or a list[Marked]."""

    value: Any
    mark: Mark
    keys: dict[str, Mark] | None = None  # for mappings: where each key was written
    quoted: bool = False  # a quoted scalar: its text starts one column after the mark

    @property
    def is_mapping(self) -> bool:
        return isinstance(self.value, dict)

    @property
    def is_list(self) -> bool:
        return isinstance(self.value, list)


class _Budget(Exception):
    pass


def _mark(file: str, node: yaml.Node) -> Mark:
    return Mark(file, node.start_mark.line + 1, node.start_mark.column + 1)


def _scalar(node: yaml.ScalarNode) -> Any:
    # Resolve plain scalars with the safe constructor's rules (ints, floats, bools, null).
    constructor = yaml.SafeLoader.__new__(yaml.SafeLoader)
    yaml.constructor.SafeConstructor.__init__(constructor)
    return constructor.construct_object(node, deep=True)


class _Converter:
    def __init__(self, file: str, problems: list[Problem]):
        self.file = file
        self.problems = problems
        self.visited = 0

    def convert(self, node: yaml.Node) -> Marked:
        self.visited += 1
        if self.visited > NODE_BUDGET:
            raise _Budget()
        mark = _mark(self.file, node)
        if isinstance(node, yaml.ScalarNode):
            try:
                return Marked(_scalar(node), mark, quoted=node.style in ("'", '"'))
            except yaml.YAMLError as exc:
                self.problems.append(Problem(mark, f"unreadable value: {_first_line(exc)}"))
                return Marked(None, mark)
        if isinstance(node, yaml.SequenceNode):
            return Marked([self.convert(item) for item in node.value], mark)
        if isinstance(node, yaml.MappingNode):
            out: dict[str, Marked] = {}
            keys: dict[str, Mark] = {}
            for key_node, value_node in node.value:
                key_mark = _mark(self.file, key_node)
                if key_node.tag == "tag:yaml.org,2002:merge":
                    self.problems.append(Problem(key_mark, "merge keys ('<<') are not supported"))
                    continue
                if not isinstance(key_node, yaml.ScalarNode):
                    self.problems.append(Problem(key_mark, "a key must be a plain name"))
                    continue
                key = _scalar(key_node)
                if not isinstance(key, str):
                    # YAML 1.1 turns on/off/yes/no into booleans; say so plainly.
                    self.problems.append(Problem(key_mark, f"key {key_node.value!r} must be a name; quote it"))
                    continue
                if key in out:
                    first = keys[key]
                    self.problems.append(Problem(key_mark, f"duplicate key '{key}' (first at line {first.line})"))
                    continue
                keys[key] = key_mark
                out[key] = self.convert(value_node)
            return Marked(out, mark, keys)
        raise AssertionError(f"unknown node {node!r}")  # PyYAML has only the three kinds


def _first_line(exc: Exception) -> str:
    text = str(getattr(exc, "problem", None) or exc).strip()
    return text.splitlines()[0] if text else "invalid YAML"


def load_marked(text: str, file: str) -> tuple[Marked | None, list[Problem]]:
    """Parse one YAML document into Marked values; problems instead of exceptions."""
    problems: list[Problem] = []
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as exc:
        where = exc.problem_mark or exc.context_mark
        mark = Mark(file, where.line + 1, where.column + 1) if where else Mark(file, 1, 1)
        return None, [Problem(mark, f"invalid YAML: {_first_line(exc)}")]
    except yaml.YAMLError as exc:
        return None, [Problem(Mark(file, 1, 1), f"invalid YAML: {_first_line(exc)}")]
    if node is None:
        return None, [Problem(Mark(file, 1, 1), "the file is empty")]
    converter = _Converter(file, problems)
    try:
        return converter.convert(node), problems
    except _Budget:
        return None, [Problem(_mark(file, node), f"too many values (over {NODE_BUDGET}); are aliases nested?")]
    except RecursionError:
        return None, [Problem(_mark(file, node), "values nested too deeply")]
