"""Model parameters declared as data: name, valid range, spacing, prior.

Declaring parameters as data (rather than checking them by hand in each model) gives every
bad value the same-shaped error message, lets one conformance test check every model, and
lets grids, optimisers and priors be built from the declaration alone.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np


class ParamError(ValueError):
    """A parameter value outside its declared range, unknown or missing."""


@dataclass(frozen=True, slots=True)
class Prior:
    """A prior density over one parameter, used for MAP fits and the online grid.

    kind: "beta" (a, b), "gamma" (shape a, scale b), "normal" (mean a, sd b), "uniform".
    """

    kind: str
    a: float = 1.0
    b: float = 1.0

    def logpdf(self, x: np.ndarray | float) -> np.ndarray:
        x = np.asarray(x, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            if self.kind == "beta":
                norm = math.lgamma(self.a + self.b) - math.lgamma(self.a) - math.lgamma(self.b)
                out = norm + (self.a - 1) * np.log(x) + (self.b - 1) * np.log1p(-x)
                return np.where((x >= 0) & (x <= 1), out, -np.inf)
            if self.kind == "gamma":
                norm = -math.lgamma(self.a) - self.a * math.log(self.b)
                out = norm + (self.a - 1) * np.log(x) - x / self.b
                return np.where(x >= 0, out, -np.inf)
            if self.kind == "normal":
                z = (x - self.a) / self.b
                return -0.5 * z * z - math.log(self.b * math.sqrt(2 * math.pi))
            if self.kind == "uniform":
                return np.zeros_like(x)
        raise ParamError(f"unknown prior kind {self.kind!r}")


@dataclass(frozen=True, slots=True)
class Param:
    """One declared parameter.

    `scale` says how grids and the optimiser space the range: "linear" or "log" (for
    positive scale parameters such as the inverse temperature). `learning` is True when
    the parameter shapes the learned values (so the values need not be recomputed when
    only the choice-rule parameters change). `grid` is the online estimator's default
    number of grid points along this axis, over [grid_low, grid_high] (default: the range).
    """

    name: str
    low: float
    high: float
    scale: str
    prior: Prior
    learning: bool
    grid: int
    doc: str
    grid_low: float | None = None
    grid_high: float | None = None

    def check(self, model: str, value: object) -> float:
        ok = False
        if isinstance(value, (int, float, np.floating, np.integer)) and not isinstance(value, bool):
            v = float(value)
            ok = math.isfinite(v) and self.low <= v <= self.high
        if not ok:
            raise ParamError(f"{model}: {self.name} must be a number in [{self.low:g}, {self.high:g}], got {value!r}")
        return v

    # --- the unit cube: linear or log spacing of [low, high] onto [0, 1]

    def to_unit(self, x: np.ndarray | float, low: float | None = None, high: float | None = None) -> np.ndarray:
        lo, hi = (self.low if low is None else low), (self.high if high is None else high)
        x = np.asarray(x, dtype=float)
        if self.scale == "log":
            return (np.log(x) - math.log(lo)) / (math.log(hi) - math.log(lo))
        return (x - lo) / (hi - lo)

    def from_unit(self, u: np.ndarray | float, low: float | None = None, high: float | None = None) -> np.ndarray:
        lo, hi = (self.low if low is None else low), (self.high if high is None else high)
        u = np.asarray(u, dtype=float)
        if self.scale == "log":
            return np.exp(math.log(lo) + u * (math.log(hi) - math.log(lo)))
        return lo + u * (hi - lo)

    def grid_range(self) -> tuple[float, float]:
        lo = self.low if self.grid_low is None else self.grid_low
        hi = self.high if self.grid_high is None else self.grid_high
        return lo, hi


def check_params(model: str, declared: tuple[Param, ...], values: Mapping[str, object]) -> dict[str, float]:
    """Validate a full parameter set; every failure has the same shape of message."""
    names = [p.name for p in declared]
    unknown = [k for k in values if k not in names]
    if unknown:
        raise ParamError(f"{model}: unknown parameter {unknown[0]!r} (expected {', '.join(names)})")
    missing = [n for n in names if n not in values]
    if missing:
        raise ParamError(f"{model}: missing parameter {missing[0]!r}")
    return {p.name: p.check(model, values[p.name]) for p in declared}


class DeclaredParams:
    """What every model offers on top of its declared `params` and `name` (a mixin)."""

    __slots__ = ()
    name: str
    params: tuple[Param, ...]

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.params)

    def param(self, name: str) -> Param:
        for p in self.params:
            if p.name == name:
                return p
        raise KeyError(name)

    def check(self, values: Mapping[str, object]) -> dict[str, float]:
        return check_params(self.name, self.params, values)


# Shared declarations. Priors after Daw (2011) for learning rate and inverse temperature
# (Beta(1.1, 1.1), Gamma(1.2, scale 5); from memory); the stickiness prior is our choice.
def learning_rate(name: str, doc: str, grid: int = 48) -> Param:
    return Param(name, 0.0, 1.0, "linear", Prior("beta", 1.1, 1.1), True, grid, doc)


def inverse_temperature(grid: int = 64) -> Param:
    return Param(
        "beta",
        0.01,
        50.0,
        "log",
        Prior("gamma", 1.2, 5.0),
        False,
        grid,
        "inverse temperature of the softmax choice rule (higher = more exploitative)",
        grid_low=0.1,
        grid_high=30.0,
    )
