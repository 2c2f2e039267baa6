"""Typed reading of Marked YAML values that collects problems instead of stopping.

Each accessor returns the value, or None after recording a problem, so one pass over a
file reports everything wrong with it. Messages follow one shape: where, which key, what
was expected, what was found.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Iterable, Mapping
from typing import Any, Literal, overload

from server.protocol.marked import Mark, Marked
from server.protocol.problems import Problem


def describe(value: Any) -> str:
    """How a found value is named in messages."""
    if value is None:
        return "nothing"
    if isinstance(value, bool):
        return f"{str(value).lower()} (a yes/no value)"
    if isinstance(value, dict):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, str):
        return f"'{value}'" if len(value) < 40 else "a long text"
    return repr(value)


def did_you_mean(word: str, choices: Iterable[str], *, aside: bool = False) -> str:
    """The closest of `choices` to a mistyped `word`, as a hint to end a message with:
    "; did you mean 'x'?" (or " (did you mean 'x'?)" as an aside); "" when none is close."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    if not close:
        return ""
    return f" (did you mean {close[0]!r}?)" if aside else f"; did you mean '{close[0]}'?"


class Reader:
    def __init__(self) -> None:
        self.problems: list[Problem] = []
        # Names declared but invalid: references to them are not reported again.
        self.broken: set[str] = set()
        # Old spellings still read, each with a warning naming the new one.
        self.warnings: list[Problem] = []

    def error(self, mark: Mark, message: str) -> None:
        self.problems.append(Problem(mark, message))

    # ------------------------------------------------------------ structure

    def mapping(
        self,
        node: Marked | None,
        where: str,
        allowed: Iterable[str],
        required: Iterable[str] = (),
        renamed: Mapping[str, str] | None = None,
    ) -> dict[str, Marked] | None:
        """Check a mapping's keys: unknown keys (with did-you-mean) and missing ones.

        `renamed` maps old key names to new ones: an old one is read as the new one, with a
        warning that names the new one (an error when both are given)."""
        if node is None:
            return None
        if not node.is_mapping:
            self.error(node.mark, f"{where}: expected a mapping, found {describe(node.value)}")
            return None
        allowed = list(allowed)
        renamed = renamed or {}
        values = dict(node.value)
        for old, new in renamed.items():
            if old not in values:
                continue
            assert node.keys is not None
            if new in values:
                self.error(node.keys[old], f"{where}: '{old}' is the old name of '{new}'; give only '{new}'")
            else:
                why = f"{where}: '{old}' is now called '{new}'; the old name is read until the next format version"
                self.warnings.append(Problem(node.keys[old], why))
                values[new] = values[old]
            del values[old]
        for key in node.value:
            if key not in allowed and key not in renamed:
                assert node.keys is not None
                self.error(
                    node.keys[key],
                    f"{where}: unknown key '{key}'{did_you_mean(key, allowed)}",
                )
        for key in required:
            if key not in values:
                self.error(node.mark, f"{where}: missing required key '{key}'")
        return {k: v for k, v in values.items() if k in allowed}

    def items(self, node: Marked | None, where: str) -> list[tuple[str, Marked, Mark]]:
        """Entries of a name -> value mapping whose keys are free names."""
        if node is None:
            return []
        if not node.is_mapping:
            self.error(node.mark, f"{where}: expected a mapping, found {describe(node.value)}")
            return []
        assert node.keys is not None
        return [(k, v, node.keys[k]) for k, v in node.value.items()]

    def listing(self, node: Marked | None, where: str, *, allow_single: bool = False) -> list[Marked]:
        if node is None:
            return []
        if allow_single and not node.is_list and not node.is_mapping:
            return [node]
        if not node.is_list:
            self.error(node.mark, f"{where}: expected a list, found {describe(node.value)}")
            return []
        return node.value

    # ------------------------------------------------------------ scalars

    def text(self, node: Marked | None, where: str) -> str | None:
        if node is None:
            return None
        if not isinstance(node.value, str) or not node.value.strip():
            self.error(node.mark, f"{where}: expected a name or text, found {describe(node.value)}")
            return None
        return node.value

    def flag(self, node: Marked | None, where: str) -> bool | None:
        if node is None:
            return None
        if not isinstance(node.value, bool):
            self.error(node.mark, f"{where}: expected true or false, found {describe(node.value)}")
            return None
        return node.value

    @overload
    def number(
        self,
        node: Marked | None,
        where: str,
        *,
        low: float | None = None,
        high: float | None = None,
        low_open: bool = False,
        integer: Literal[True],
    ) -> int | None: ...

    @overload
    def number(
        self,
        node: Marked | None,
        where: str,
        *,
        low: float | None = None,
        high: float | None = None,
        low_open: bool = False,
        integer: Literal[False] = False,
    ) -> float | None: ...

    def number(
        self,
        node: Marked | None,
        where: str,
        *,
        low: float | None = None,
        high: float | None = None,
        low_open: bool = False,
        integer: bool = False,
    ) -> float | None:
        """A number within [low, high] (or (low, high] when low_open); an int when `integer`."""
        if node is None:
            return None
        value = node.value
        kind = "a whole number" if integer else "a number"
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.error(node.mark, f"{where}: expected {kind}, found {describe(value)}")
            return None
        if integer and not isinstance(value, int):
            self.error(node.mark, f"{where}: expected {kind}, found {describe(value)}")
            return None
        if not math.isfinite(value):
            self.error(node.mark, f"{where}: expected a finite number, found {describe(value)}")
            return None
        too_low = low is not None and (value <= low if low_open else value < low)
        too_high = high is not None and value > high
        if too_low or too_high:
            self.error(node.mark, f"{where}: expected {_range(low, high, low_open)}, found {value}")
            return None
        return value

    def probability(self, node: Marked | None, where: str) -> float | None:
        return self.number(node, where, low=0.0, high=1.0)

    def reference(self, node: Marked | None, where: str, known: Iterable[str], what: str) -> str | None:
        """A name that must refer to something defined elsewhere in the file."""
        name = self.text(node, where)
        if name is None:
            return None
        known = list(known)
        if name not in known:
            if name in self.broken:
                return None
            assert node is not None
            self.error(node.mark, f"{where}: no {what} named '{name}'{did_you_mean(name, known)}")
            return None
        return name

    def choice(self, node: Marked | None, where: str, allowed: Iterable[str]) -> str | None:
        name = self.text(node, where)
        if name is None:
            return None
        allowed = list(allowed)
        if name not in allowed:
            assert node is not None
            options = ", ".join(allowed)
            self.error(
                node.mark,
                f"{where}: expected one of {options}, found '{name}'{did_you_mean(name, allowed)}",
            )
            return None
        return name

    def named_list(
        self,
        nodes: list[Marked],
        where: str,
        owner: str,
        keys: tuple[str, ...],
        required: tuple[str, ...],
        name_key: str,
        reserved: str,
        reserved_for: str,
    ) -> list[tuple[str, dict[str, Marked], Marked]]:
        """Entries of a list of mappings each named by `name_key`, names unique and never
        the reserved word; (name, fields, node) for every well-formed entry, in order."""
        named: list[tuple[str, dict[str, Marked], Marked]] = []
        seen: set[str] = set()
        for i, node in enumerate(nodes):
            fields = self.mapping(node, f"{where}[{i + 1}]", keys, required=required)
            if fields is None:
                continue
            name = self.text(fields.get(name_key), f"{where}[{i + 1}].{name_key}")
            if name is None:
                continue
            if name in seen or name == reserved:
                why = f"is reserved for {reserved_for}" if name == reserved else "is used twice"
                self.error(fields[name_key].mark, f"{owner}: {name_key} name '{name}' {why}")
                continue
            seen.add(name)
            named.append((name, fields, node))
        return named


def _range(low: float | None, high: float | None, low_open: bool) -> str:
    if low is not None and high is not None:
        return f"a value from {low:g} to {high:g}" if not low_open else f"a value above {low:g} up to {high:g}"
    if low is not None:
        return f"a value above {low:g}" if low_open else f"a value of at least {low:g}"
    return f"a value of at most {high:g}"
