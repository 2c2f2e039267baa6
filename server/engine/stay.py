"""The stay analysis of two-stage choice tasks (Daw, Gershman, Seymour, Dayan & Dolan 2011):
how often the first-stage choice is repeated after rewarded or unrewarded trials reached by
a common or a rare transition, and its logistic regression.

Pure functions over plain sequences, here in the engine layer because it is the lowest one
that the models, the rules, the store and everything above can all import. A model-free
learner repeats a rewarded choice whatever the transition (a main effect of reward); a
model-based one repeats it after a common transition and switches after a rare one (a
reward x transition interaction).

What counts: within a session, the trials with a first-stage choice and an outcome (a
first- or second-stage omission is skipped, as win-stay/lose-shift skips omissions), each
paired with the one before it. The regression codes reward and transition as +1 / -1
(rewarded / not, common / rare), so main effects and interaction are on one scale. With
`lags` > 1, trial t-k (k >= 2) enters signed: +1 where its choice was the choice of trial
t-1, -1 where not, which makes "stay" the choice regression over past trials' outcomes for
two first-stage options (after Miller, Botvinick & Brody 2017), plus a `choice@k` term for
the pull of that past choice itself.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from .records import TrialOutcome, TrialRecord

Z95 = 1.959963984540054


def wilson_interval(k: int, n: int, z: float = Z95) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion (Wilson 1927)."""
    if n == 0:
        return (math.nan, math.nan)
    p = k / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return (max(0.0, centre - half), min(1.0, centre + half))


@dataclass(frozen=True, slots=True)
class StayCell:
    """P(stay) after trials of one kind, with its count and Wilson 95 % interval."""

    rewarded: bool
    common: bool
    n: int
    stays: int

    @property
    def p(self) -> float | None:
        return self.stays / self.n if self.n else None

    @property
    def interval(self) -> tuple[float, float] | None:
        return wilson_interval(self.stays, self.n) if self.n else None

    @property
    def label(self) -> str:
        return f"{'rewarded' if self.rewarded else 'unrewarded'}-{'common' if self.common else 'rare'}"


@dataclass(frozen=True, slots=True)
class Coefficient:
    name: str
    estimate: float
    se: float
    z: float
    p_value: float  # two-sided, normal approximation (Wald)


@dataclass(frozen=True, slots=True)
class StayRegression:
    """Logistic regression of stay on the past trials' reward and transition."""

    coefficients: tuple[Coefficient, ...]
    n: int
    lags: int
    loglik: float
    converged: bool  # False on separation or a singular design: estimates then unreliable

    def __getitem__(self, name: str) -> Coefficient:
        for c in self.coefficients:
            if c.name == name:
                return c
        raise KeyError(name)


@dataclass(frozen=True, slots=True)
class StayAnalysis:
    cells: tuple[StayCell, ...]  # rewarded-common, rewarded-rare, unrewarded-common, unrewarded-rare
    regression: StayRegression | None  # None with too few pairs to fit it

    def cell(self, rewarded: bool, common: bool) -> StayCell:
        return next(c for c in self.cells if (c.rewarded, c.common) == (rewarded, common))

    def to_dict(self) -> dict:
        reg = self.regression
        return {
            "cells": [
                {"condition": c.label, "n": c.n, "stays": c.stays, "p_stay": c.p, "interval": c.interval}
                for c in self.cells
            ],
            "regression": None
            if reg is None
            else {
                "n": reg.n,
                "lags": reg.lags,
                "loglik": reg.loglik,
                "converged": reg.converged,
                "coefficients": {
                    c.name: {"estimate": c.estimate, "se": c.se, "z": c.z, "p": c.p_value} for c in reg.coefficients
                },
            },
        }


def logistic_regression(x: np.ndarray, y: np.ndarray, names: Sequence[str], lags: int = 1) -> StayRegression:
    """Maximum-likelihood logistic regression by Newton-Raphson (iteratively reweighted least
    squares; McCullagh & Nelder 1989), Wald standard errors from the Fisher information."""
    n, d = x.shape
    b = np.zeros(d)
    converged = False
    info = np.eye(d)
    for _ in range(100):
        eta = x @ b
        mu = 1.0 / (1.0 + np.exp(-eta))
        info = x.T @ (x * (mu * (1 - mu))[:, None])
        try:
            step = np.linalg.solve(info, x.T @ (y - mu))
        except np.linalg.LinAlgError:
            break
        b = b + step
        if not np.all(np.isfinite(b)) or np.abs(b).max() > 30:  # separation: estimates diverge
            break
        if np.abs(step).max() < 1e-10:
            converged = True
            break
    eta = x @ b
    loglik = float(np.sum(y * eta - np.logaddexp(0.0, eta)))
    mu = 1.0 / (1.0 + np.exp(-eta))
    info = x.T @ (x * (mu * (1 - mu))[:, None])
    try:
        se = np.sqrt(np.diag(np.linalg.inv(info)))
    except np.linalg.LinAlgError:
        se = np.full(d, math.nan)
        converged = False
    coefs = []
    for name, est, s in zip(names, b, se):
        z = float(est / s) if s > 0 else math.nan
        p = math.erfc(abs(z) / math.sqrt(2)) if math.isfinite(z) else math.nan
        coefs.append(Coefficient(name, float(est), float(s), z, p))
    return StayRegression(tuple(coefs), n, lags, loglik, converged)


def _runs(
    choices: Sequence[str | None],
    common: Sequence[bool | None],
    rewarded: Sequence[bool | None],
    sessions: Sequence[object] | None,
) -> list[list[tuple[str, bool, bool]]]:
    """Per session, its complete trials in order: (choice, common, rewarded)."""
    runs: list[list[tuple[str, bool, bool]]] = []
    last = object()
    for i, (c, t, r) in enumerate(zip(choices, common, rewarded, strict=True)):
        s = sessions[i] if sessions is not None else None
        if not runs or s != last:
            runs.append([])
            last = s
        if c is not None and t is not None and r is not None:
            runs[-1].append((c, bool(t), bool(r)))
    return runs


def regressor_names(lags: int) -> list[str]:
    names = ["intercept", "reward", "transition", "reward:transition"]
    for k in range(2, lags + 1):
        names += [f"choice@{k}", f"reward@{k}", f"transition@{k}", f"reward:transition@{k}"]
    return names


def stay_analysis(
    choices: Sequence[str | None],
    common: Sequence[bool | None],
    rewarded: Sequence[bool | None],
    sessions: Sequence[object] | None = None,
    lags: int = 1,
) -> StayAnalysis:
    """The four stay probabilities and the regression stay ~ reward x transition (+ lags).

    Per trial: first-stage choice (None = omission), common transition (None = none
    happened), rewarded (None = no outcome, a second-stage omission); `sessions` labels
    each trial's session (pairs never span two).
    """
    if lags < 1:
        raise ValueError(f"lags must be 1 or more, got {lags}")
    counts = {(r, c): [0, 0] for r in (True, False) for c in (True, False)}
    rows, ys = [], []
    for run in _runs(choices, common, rewarded, sessions):
        for i in range(1, len(run)):
            stay = run[i][0] == run[i - 1][0]
            cell = counts[(run[i - 1][2], run[i - 1][1])]
            cell[0] += 1
            cell[1] += stay
            if i < lags:
                continue
            row = []
            for k in range(1, lags + 1):
                c, t, r = run[i - k]
                sign = 1.0 if c == run[i - 1][0] else -1.0
                rr, tt = (1.0 if r else -1.0), (1.0 if t else -1.0)
                row += ([] if k == 1 else [sign]) + [sign * rr, sign * tt, sign * rr * tt]
            rows.append([1.0] + row)
            ys.append(1.0 if stay else 0.0)
    cells = tuple(StayCell(r, c, *counts[(r, c)]) for r in (True, False) for c in (True, False))
    names = regressor_names(lags)
    regression = None
    if len(ys) > len(names):
        regression = logistic_regression(np.array(rows), np.array(ys), names, lags)
    return StayAnalysis(cells, regression)


def stay_from_records(records: Iterable[TrialRecord | TrialOutcome], lags: int = 1) -> StayAnalysis:
    """The stay analysis of one session's two-stage trial records (trials without a second
    stage are skipped)."""
    choices, common, rewarded = [], [], []
    for rec in records:
        second = rec.second
        if second is None or rec.omission or rec.choice is None:
            continue
        choices.append(rec.choice)
        common.append(second.common)
        rewarded.append(None if second.omitted else rec.rewarded)
    return stay_analysis(choices, common, rewarded, lags=lags)
