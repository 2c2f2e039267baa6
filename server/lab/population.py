"""A virtual cohort's make-up: which agent, and how each option varies between animals.

A population file (YAML) or `--vary` flags declare, per agent option, a fixed value or a
distribution; every animal draws its own values from its own seeded generator.

    agent: q_learner
    options:
      alpha: {uniform: [0.1, 0.6]}
      beta: {lognormal: {median: 5, sigma: 0.4}}
      omission: 0.03
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from server.protocol.marked import Mark, Marked, load_marked
from server.protocol.problems import InvalidFile, Problem
from server.protocol.reader import Reader


@dataclass(frozen=True)
class Spread:
    kind: str  # fixed | uniform | lognormal | normal
    a: float = 0.0  # fixed value, uniform low, lognormal median, normal mean
    b: float = 0.0  # uniform high, lognormal sigma, normal sd

    def draw(self, rng: np.random.Generator) -> float:
        if self.kind == "fixed":
            return self.a
        if self.kind == "uniform":
            return float(rng.uniform(self.a, self.b))
        if self.kind == "lognormal":
            return float(self.a * math.exp(self.b * rng.standard_normal()))
        return float(self.a + self.b * rng.standard_normal())


@dataclass(frozen=True)
class Population:
    agent: str
    spreads: dict[str, Spread] = field(default_factory=dict)
    warnings: tuple[Problem, ...] = ()  # old spellings read

    def draw(self, rng: np.random.Generator) -> dict[str, float]:
        """One animal's options, clipped to the ranges its agent declares."""
        from hardware_stubs.agents import AGENTS

        declared = {o.name: o for o in AGENTS[self.agent].OPTIONS}
        drawn = {}
        for name in sorted(self.spreads):
            value = self.spreads[name].draw(rng)
            option = declared[name]
            low, high = getattr(option, "low", None), getattr(option, "high", None)
            if low is not None:
                value = max(value, low)
            if high is not None:
                value = min(value, high)
            drawn[name] = round(value, 6)
        return drawn


def _read_spread(r: Reader, node: Marked, where: str) -> Spread | None:
    if not node.is_mapping:
        value = r.number(node, where)
        return None if value is None else Spread("fixed", float(value))
    f = r.mapping(node, where, ("uniform", "lognormal", "normal"))
    if not f or len(f) != 1:
        if f is not None:
            r.error(node.mark, f"{where}: expected one of uniform, lognormal, normal")
        return None
    kind, spec = next(iter(f.items()))
    if kind == "uniform":
        bounds = r.listing(spec, f"{where}.uniform")
        if len(bounds) != 2:
            r.error(spec.mark, f"{where}.uniform: expected [low, high]")
            return None
        low, high = r.number(bounds[0], f"{where}.uniform low"), r.number(bounds[1], f"{where}.uniform high")
        if low is None or high is None:
            return None
        if high < low:
            r.error(spec.mark, f"{where}.uniform: low {low:g} is above high {high:g}")
            return None
        return Spread("uniform", float(low), float(high))
    keys = ("median", "sigma") if kind == "lognormal" else ("mean", "sd")
    g = r.mapping(spec, f"{where}.{kind}", keys, required=keys)
    if g is None:
        return None
    first = r.number(
        g.get(keys[0]),
        f"{where}.{kind}.{keys[0]}",
        low=0 if kind == "lognormal" else None,
        low_open=kind == "lognormal",
    )
    second = r.number(g.get(keys[1]), f"{where}.{kind}.{keys[1]}", low=0)
    if first is None or second is None:
        return None
    return Spread(kind, float(first), float(second))


def read_population(text: str, file: str, default_agent: str) -> Population:
    from hardware_stubs.agents import AGENTS

    root, problems = load_marked(text, file)
    if root is None:
        raise InvalidFile(problems)
    r = Reader()
    r.problems.extend(problems)
    f = r.mapping(root, "population", ("agent", "traits"), renamed={"options": "traits"})
    agent = default_agent
    spreads: dict[str, Spread] = {}
    if f is not None:
        if "agent" in f:
            agent = r.choice(f["agent"], "agent", sorted(AGENTS)) or default_agent
        declared = [o.name for o in AGENTS[agent].OPTIONS] if agent in AGENTS else []
        for name, node, key_mark in r.items(f.get("traits"), "traits"):
            if name not in declared:
                from server.protocol.reader import did_you_mean

                r.error(key_mark, f"traits: agent '{agent}' has no trait '{name}'{did_you_mean(name, declared)}")
                continue
            spread = _read_spread(r, node, f"traits.{name}")
            if spread is not None:
                spreads[name] = spread
    if r.problems:
        raise InvalidFile(r.problems)
    return Population(agent, spreads, tuple(r.warnings))


def load_population(path: str | Path, default_agent: str) -> Population:
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InvalidFile([Problem(Mark(str(path), 1, 1), f"cannot read population file: {exc}")]) from None
    return read_population(text, str(path), default_agent)


def parse_vary(items: list[str], agent: str) -> Population:
    """`--vary alpha=0.1:0.6` (uniform), `--vary beta=lognormal:5:0.4`, `--vary omission=0.03`."""
    lines = []
    for item in items:
        name, _, spec = item.partition("=")
        parts = spec.split(":")
        if len(parts) == 1:
            lines.append(f"  {name}: {parts[0]}")
        elif len(parts) == 2:
            lines.append(f"  {name}: {{uniform: [{parts[0]}, {parts[1]}]}}")
        elif parts[0] == "lognormal" and len(parts) == 3:
            lines.append(f"  {name}: {{lognormal: {{median: {parts[1]}, sigma: {parts[2]}}}}}")
        elif parts[0] == "normal" and len(parts) == 3:
            lines.append(f"  {name}: {{normal: {{mean: {parts[1]}, sd: {parts[2]}}}}}")
        else:
            raise InvalidFile(
                [
                    Problem(
                        Mark("--vary", 1, 1),
                        f"cannot read '{item}': use NAME=VALUE, NAME=LOW:HIGH, "
                        "NAME=lognormal:MEDIAN:SIGMA or NAME=normal:MEAN:SD",
                    )
                ]
            )
    return read_population("traits:\n" + "\n".join(lines) + "\n" if lines else "{}\n", "--vary", agent)
