"""The stay analysis of two-stage trials: how the previous trial's outcome and transition
move the next first choice (Daw, Gershman, Seymour, Dayan & Dolan 2011, Neuron 69:1204).

A model-free learner repeats a rewarded first choice whatever the transition (a main effect
of reward); a model-based learner repeats it after a common transition and switches after a
rare one (a reward x transition interaction). Pure and in the lowest layer that knows trial
records, so the rules, the page and the fit all count it the same way: one pairing rule
(`stay_pairs`) serves the counts, the contrasts and the regression.

The regression (`stay_analysis`) codes reward and transition as +1 / -1 (rewarded / not,
common / rare), so main effects and interaction are on one scale. With `lags` > 1, trial
t-k (k >= 2) enters signed: +1 where its choice was the choice of trial t-1, -1 where not,
which makes "stay" the choice regression over past trials' outcomes for two first-stage
options (after Miller, Botvinick & Brody 2017), plus a `choice@k` term for the pull of that
past choice itself.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from server.engine.records import SecondStage

CONDITIONS = ((True, True), (True, False), (False, True), (False, False))  # (rewarded, common)
CONDITION_NAMES = {
    (True, True): "rewarded, common",
    (True, False): "rewarded, rare",
    (False, True): "unrewarded, common",
    (False, False): "unrewarded, rare",
}


class TwoStageTrial(Protocol):
    """What the analysis reads of a trial (a TrialOutcome or a stored TrialRecord)."""

    @property
    def choice(self) -> str | None: ...
    @property
    def rewarded(self) -> bool: ...
    @property
    def second(self) -> SecondStage | None: ...


@dataclass(frozen=True, slots=True)
class StayCount:
    stays: int
    pairs: int

    @property
    def p(self) -> float | None:
        return self.stays / self.pairs if self.pairs else None

    @property
    def interval(self) -> tuple[float, float] | None:
        """Wilson 95 % interval of p."""
        return wilson_interval(self.stays, self.pairs) if self.pairs else None


def _as_sequences(trials: Sequence[TwoStageTrial]) -> tuple[list, list, list]:
    """Trials as the sequences `stay_pairs` reads."""
    choices: list[str | None] = []
    common: list[bool | None] = []
    rewarded: list[bool | None] = []
    for t in trials:
        second = t.second
        choices.append(t.choice)
        common.append(None if second is None else second.common)
        rewarded.append(None if second is None or second.omitted else t.rewarded)
    return choices, common, rewarded


def stay_pairs(
    choices: Sequence[str | None],
    common: Sequence[bool | None],
    rewarded: Sequence[bool | None],
    sessions: Sequence[object] | None = None,
    lags: int = 1,
) -> list[int]:
    """The trials t whose stay (first choice of t equal to that of t-1) counts: t has a first
    choice and each of the `lags` trials before it, in the same session, had a first choice
    whose second stage played out (common not None, rewarded not None: omissions and missed
    second stages are left out)."""
    out = []
    for t in range(lags, len(choices)):
        if choices[t] is None:
            continue
        ok = True
        for k in range(1, lags + 1):
            p = t - k
            if choices[p] is None or common[p] is None or rewarded[p] is None:
                ok = False
                break
            if sessions is not None and sessions[p] != sessions[t]:
                ok = False
                break
        if ok:
            out.append(t)
    return out


def _counts(choices, common, rewarded, sessions) -> dict[tuple[bool, bool], StayCount]:
    counts = {key: [0, 0] for key in CONDITIONS}
    for t in stay_pairs(choices, common, rewarded, sessions):
        cell = counts[(bool(rewarded[t - 1]), bool(common[t - 1]))]
        cell[0] += choices[t] == choices[t - 1]
        cell[1] += 1
    return {key: StayCount(stays, pairs) for key, (stays, pairs) in counts.items()}


def stay_counts(trials: Sequence[TwoStageTrial]) -> dict[tuple[bool, bool], StayCount]:
    """Per (rewarded, common) condition of a trial, how often the next trial repeated its
    first choice; over successive pairs of trials that both have a first choice, the earlier
    one's second stage played out (omissions and missed second stages are left out)."""
    return _counts(*_as_sequences(trials), None)


def stay_contrasts(trials: Sequence[TwoStageTrial]) -> tuple[float | None, float | None]:
    """(reward effect, reward x transition interaction) on P(stay):
      reward effect = P(stay | rewarded) - P(stay | unrewarded)
      interaction   = [P(stay | rewarded, common) - P(stay | rewarded, rare)]
                      - [P(stay | unrewarded, common) - P(stay | unrewarded, rare)]
    None while a condition they need has no pair yet."""
    c = stay_counts(trials)
    won = [c[(True, k)] for k in (True, False)]
    lost = [c[(False, k)] for k in (True, False)]
    n_won, n_lost = sum(x.pairs for x in won), sum(x.pairs for x in lost)
    effect = None
    if n_won and n_lost:
        effect = sum(x.stays for x in won) / n_won - sum(x.stays for x in lost) / n_lost
    p = {key: count.p for key, count in c.items()}
    interaction = None
    if all(v is not None for v in p.values()):
        rc, rr, uc, ur = (p[key] for key in CONDITIONS)
        assert rc is not None and rr is not None and uc is not None and ur is not None
        interaction = (rc - rr) - (uc - ur)
    return effect, interaction


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


def logistic_regression(x: np.ndarray, y: np.ndarray, names: Sequence[str], lags: int = 1) -> StayRegression:
    """Maximum-likelihood logistic regression by Newton-Raphson (iteratively reweighted least
    squares; McCullagh & Nelder 1989), Wald standard errors from the Fisher information."""
    n, d = x.shape
    b = np.zeros(d)
    converged = False
    info = np.eye(d)
    for _ in range(100):
        eta = x @ b
        mu = _logistic(eta)
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
    mu = _logistic(eta)
    info = x.T @ (x * (mu * (1 - mu))[:, None])
    try:
        var = np.diag(np.linalg.inv(info))
    except np.linalg.LinAlgError:
        var = np.full(d, math.nan)
    if not np.all(var > 0):  # singular, or nearly: no standard errors to give
        var = np.full(d, math.nan)
        converged = False
    se = np.sqrt(var)
    coefs = []
    for name, est, s in zip(names, b, se):
        z = float(est / s) if s > 0 else math.nan
        p = math.erfc(abs(z) / math.sqrt(2)) if math.isfinite(z) else math.nan
        coefs.append(Coefficient(name, float(est), float(s), z, p))
    return StayRegression(tuple(coefs), n, lags, loglik, converged)


def regressor_names(lags: int) -> list[str]:
    names = ["intercept", "reward", "transition", "reward:transition"]
    for k in range(2, lags + 1):
        names += [f"choice@{k}", f"reward@{k}", f"transition@{k}", f"reward:transition@{k}"]
    return names


@dataclass(frozen=True, slots=True)
class StayAnalysis:
    counts: dict[tuple[bool, bool], StayCount]  # per (rewarded, common), as `stay_counts`
    regression: StayRegression | None  # None with too few pairs to fit it

    def cell(self, rewarded: bool, common: bool) -> StayCount:
        return self.counts[(rewarded, common)]

    def to_dict(self) -> dict:
        reg = self.regression
        return {
            "cells": [
                {
                    "condition": CONDITION_NAMES[key],
                    "pairs": c.pairs,
                    "stays": c.stays,
                    "p_stay": c.p,
                    "interval": c.interval,
                }
                for key, c in self.counts.items()
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
    rows, ys = [], []
    for t in stay_pairs(choices, common, rewarded, sessions, lags):
        row = [1.0]
        for k in range(1, lags + 1):
            sign = 1.0 if choices[t - k] == choices[t - 1] else -1.0
            rr, tt = (1.0 if rewarded[t - k] else -1.0), (1.0 if common[t - k] else -1.0)
            row += ([] if k == 1 else [sign]) + [sign * rr, sign * tt, sign * rr * tt]
        rows.append(row)
        ys.append(1.0 if choices[t] == choices[t - 1] else 0.0)
    names = regressor_names(lags)
    regression = None
    if len(ys) > len(names):
        regression = logistic_regression(np.array(rows), np.array(ys), names, lags)
    return StayAnalysis(_counts(choices, common, rewarded, sessions), regression)


def stay_from_records(records: Sequence[TwoStageTrial], lags: int = 1) -> StayAnalysis:
    """The stay analysis of one session's two-stage trials (records or outcomes)."""
    return stay_analysis(*_as_sequences(records), lags=lags)


def _logistic(eta: np.ndarray) -> np.ndarray:
    """1 / (1 + exp(-eta)), written through tanh so that a large |eta| cannot overflow."""
    return 0.5 * (1.0 + np.tanh(0.5 * eta))
