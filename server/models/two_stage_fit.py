"""Maximum-likelihood (or MAP) fits of the two-stage models, their comparison by BIC, and
per-trial regressors at the fitted parameters.

The hybrid has seven parameters, too many for the product grid that starts the single-stage
fits (server/models/fitting.py), so the starts here come from a Halton sequence over the
unit cube of the free parameters (the same points for every animal, so a fit is
deterministic); the best few of each animal are then refined by the same damped Newton
search, and the intervals are the same Wald intervals, as the single-stage fits.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from .batch import ValueSettings
from .fitting import FitResult, fit_results, refine
from .params import Param
from .two_stage import HYBRID_PARAMS, TwoStageModel
from .two_stage_trials import TwoStageStack, TwoStageTrials, run_hybrid, stack_two_stage

START_POINTS = 256  # Halton points evaluated per animal
STARTS = 3  # of which the best are refined
_PRIMES = (2, 3, 5, 7, 11, 13, 17, 19)


def halton(n: int, d: int) -> np.ndarray:
    """The first n points (after 0) of the d-dimensional Halton sequence (Halton 1960)."""
    out = np.empty((n, d))
    for j in range(d):
        base = _PRIMES[j]
        for i in range(n):
            k, f, x = i + 1, 1.0, 0.0
            while k:
                f /= base
                x += f * (k % base)
                k //= base
            out[i, j] = x
    return out


class _Problem:
    """The objective of one variant over a stack of animals, on the unit cube of free params."""

    def __init__(self, model: TwoStageModel, stack: TwoStageStack, use_prior: bool, values: ValueSettings):
        self.model, self.stack, self.use_prior, self.values = model, stack, use_prior, values
        self.free: list[Param] = list(model.params)

    def at(self, u: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        free = {p.name: p.from_unit(u[..., i]) for i, p in enumerate(self.free)}
        ll, _ = run_hybrid(self.model.theta(free), self.stack.take(rows), (u.shape[1],), self.values)
        f = -ll
        if self.use_prior:
            f = f - sum(p.prior.logpdf(free[p.name]) for p in self.free)
        return np.where(np.isfinite(f), f, np.inf), ll


def _fit_group(
    model: TwoStageModel, animals: Sequence[TwoStageTrials], use_prior: bool, values: ValueSettings
) -> list[FitResult]:
    model = model.for_task(animals[0].task)  # the group shares one task
    problem = _Problem(model, stack_two_stage(animals), use_prior, values)
    n, d = len(animals), len(problem.free)
    points = halton(START_POINTS, d)
    f, _ = problem.at(np.broadcast_to(points, (n, START_POINTS, d)), np.arange(n))
    pick = np.argsort(f, axis=1)[:, :STARTS]
    u = points[pick].reshape(-1, d)
    fu = np.take_along_axis(f, pick, 1).ravel()
    rows = np.repeat(np.arange(n), STARTS)
    u, fu = refine(problem, u, fu, rows)
    best = fu.reshape(n, STARTS).argmin(1)
    u_best = u.reshape(n, STARTS, d)[np.arange(n), best]
    names = tuple(p.name for p in HYBRID_PARAMS)
    return fit_results(problem, model.name, names, animals, problem.free, model.fixed, u_best, use_prior)


def fit_two_stage(
    model: TwoStageModel,
    animals: Sequence[TwoStageTrials],
    *,
    use_prior: bool = False,
    values: ValueSettings = ValueSettings(),
) -> list[FitResult]:
    """Fit one two-stage variant to each animal (ML, or MAP under the declared priors), in
    order; `FitResult.params` lists all seven parameters, the variant's fixed ones too."""
    for a in animals:
        if a.n_choices == 0:
            raise ValueError(f"animal {a.animal}: no choice trials to fit")
    groups: list[list[int]] = []
    for i, a in enumerate(animals):
        for g in groups:
            if animals[g[0]].task.same_as(a.task):
                g.append(i)
                break
        else:
            groups.append([i])
    out: dict[int, FitResult] = {}
    for g in groups:
        out.update(zip(g, _fit_group(model, [animals[i] for i in g], use_prior, values)))
    return [out[i] for i in range(len(animals))]


@dataclass(frozen=True, slots=True, eq=False)
class TwoStageRegressors:
    """Model variables per trial, before the trial's choice (values) or from its outcome
    (prediction errors, NaN where undefined: omissions)."""

    animal: str
    model: str
    q_mf: np.ndarray  # (T, K1) model-free first-stage values
    q_mb: np.ndarray  # (T, K1) model-based first-stage values
    q_net: np.ndarray  # (T, K1) w Q_MB + (1 - w) Q_MF
    p_first: np.ndarray  # (T, K1) first-stage choice probabilities
    q2: np.ndarray  # (T, S, B) second-stage values
    delta1: np.ndarray  # (T,) stage-1 prediction error
    delta2: np.ndarray  # (T,) stage-2 prediction error
    loglik: np.ndarray  # (T,) log-probability of what the animal did


def two_stage_regressors(
    model: TwoStageModel, animal: TwoStageTrials, params: Mapping[str, float], values: ValueSettings = ValueSettings()
) -> TwoStageRegressors:
    free = model.check({k: v for k, v in params.items() if k not in model.fixed})
    _, kept = run_hybrid(model.theta(free), stack_two_stage([animal]), (), values, keep=True)
    assert kept is not None  # kept: keep=True
    responded = animal.second.sum(1) > 0

    def col(arrays: list[np.ndarray]) -> np.ndarray:
        return np.stack([a[..., 0] for a in arrays])  # drop the one-animal axis

    logits = col([s.logits1 for _, s in kept])
    p = np.exp(logits - logits.max(1, keepdims=True))
    return TwoStageRegressors(
        animal.animal,
        model.name,
        col([v.q1 for v, _ in kept]),
        col([s.q_mb for _, s in kept]),
        col([s.q_net for _, s in kept]),
        p / p.sum(1, keepdims=True),
        col([v.q2 for v, _ in kept]),
        np.where(responded, col([s.delta1 for _, s in kept]), np.nan),
        np.where(responded, col([s.delta2 for _, s in kept]), np.nan),
        col([s.logp for _, s in kept]),
    )
