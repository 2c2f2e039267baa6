"""Maximum-likelihood (or MAP) fits per animal, vectorised over candidates and animals.

Two stages, both built on the batch likelihood so that Python never loops over trials
once per candidate:

1. a coarse product grid over the free parameters (spaced as declared: linear, or log for
   the inverse temperature) finds the best few local minima for every animal at once;
2. a damped Newton search (Levenberg-Marquardt along the eigenvectors of a numerical
   Hessian, clipped to the declared box) refines every start of every animal at once.
   Each step evaluates a whole line of damping values in one batch and keeps the best.

Intervals are Wald intervals from the observed information (the numerical Hessian at the
optimum), taken on the fitting scale: symmetric for rates, symmetric in log for beta.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from .batch import ValueSettings, loglik
from .choice import ChoiceModel
from .params import Param
from .trials import AnimalTrials, TrialStack, stack_animals

COARSE_POINTS = {1: 48, 2: 24, 3: 9}
STARTS = 3  # local minima of the coarse grid refined per animal
STENCIL_H = 1e-4  # finite-difference step on the unit cube
MAX_STEPS = 40
DAMPING = np.array([0.0, 1e-4, 1e-3, 1e-2, 1e-1, 1.0, 10.0, 100.0])
Z95 = 1.959963984540054
_STACK_ELEMENTS = 3_000_000


@dataclass(frozen=True, slots=True)
class FitResult:
    """One animal's fit. `loglik` is at the estimate (also for MAP fits)."""

    animal: str
    model: str
    params: dict[str, float]
    intervals: dict[str, tuple[float, float] | None]
    loglik: float
    n_trials: int
    k: int
    objective: str  # "ml" or "map"
    log_prior: float | None = None
    fixed: tuple[str, ...] = field(default=())

    @property
    def aic(self) -> float:
        return 2 * self.k - 2 * self.loglik

    @property
    def bic(self) -> float:
        # BIC = k ln n - 2 ln L (Schwarz 1978), n = choice trials
        return self.k * math.log(self.n_trials) - 2 * self.loglik

    def to_dict(self) -> dict:
        return {
            "animal": self.animal,
            "model": self.model,
            "params": dict(self.params),
            "loglik": self.loglik,
            "n_trials": self.n_trials,
            "aic": self.aic,
            "bic": self.bic,
            "intervals": {k: (list(v) if v else None) for k, v in self.intervals.items()},
            "fit": self.objective,
        }


class Objective(Protocol):
    """What the refinement needs of a fit: the objective (to minimise) and log-likelihood at
    points u (M, P, d) of the unit cube of free parameters, for the animals `rows` (M,)."""

    def at(self, u: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]: ...


class _Problem:
    """The objective for one model over a stack of animals, on the unit cube of free params."""

    def __init__(
        self,
        model: ChoiceModel,
        stack: TrialStack,
        free: Sequence[Param],
        fixed: Mapping[str, float],
        use_prior: bool,
        values: ValueSettings,
    ):
        self.model, self.stack, self.free = model, stack, list(free)
        self.fixed, self.use_prior, self.values = dict(fixed), use_prior, values

    def _objective(self, theta: dict, qshape: tuple[int, ...], stack: TrialStack) -> tuple[np.ndarray, np.ndarray]:
        ll = loglik(self.model, theta, stack, qshape, self.values)
        f = -ll
        if self.use_prior:
            f = f - sum(p.prior.logpdf(theta[p.name]) for p in self.free)
        return np.where(np.isfinite(f), f, np.inf), ll

    def at(self, u: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Objective and log-likelihood at points u (M, P, d) of the animals `rows` (M,)."""
        theta: dict[str, np.ndarray | float] = {p.name: p.from_unit(u[..., i]) for i, p in enumerate(self.free)}
        theta.update(self.fixed)
        return self._objective(theta, (u.shape[1],), self.stack.take(rows))

    def coarse(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """Objective on the product grid of cell centres: (N, n, ..., n), and the centres."""
        centres = (np.arange(n) + 0.5) / n
        d = len(self.free)
        theta: dict = dict(self.fixed)
        for i, p in enumerate(self.free):
            shape = [1] * (d + 1)
            shape[i + 1] = n
            theta[p.name] = p.from_unit(centres).reshape(shape)
        qshape = tuple(n if p.learning else 1 for p in self.free)
        f, _ = self._objective(theta, qshape, self.stack)
        return np.broadcast_to(f, (self.stack.shape[2],) + (n,) * d), centres


def _starts(f: np.ndarray, centres: np.ndarray, count: int) -> tuple[np.ndarray, np.ndarray]:
    """The `count` best local minima of each animal's grid: u (N, S, d), objective (N, S)."""
    n_animals, d = f.shape[0], f.ndim - 1
    is_min = np.ones(f.shape, dtype=bool)
    for ax in range(1, d + 1):
        pad = [(0, 0)] * f.ndim
        pad[ax] = (1, 1)
        g = np.pad(f, pad, constant_values=np.inf)
        lo = np.take(g, np.arange(0, f.shape[ax]), axis=ax)
        hi = np.take(g, np.arange(2, f.shape[ax] + 2), axis=ax)
        is_min &= (f <= lo) & (f <= hi)
    flat = f.reshape(n_animals, -1)
    ranked = np.argsort(np.where(is_min.reshape(n_animals, -1), flat, np.inf), axis=1)
    pick = ranked[:, :count]
    best = flat.argmin(1)[:, None]
    pick = np.where(is_min.reshape(n_animals, -1)[np.arange(n_animals)[:, None], pick], pick, best)
    idx = np.stack(np.unravel_index(pick, f.shape[1:]), axis=-1)
    return centres[idx], np.take_along_axis(flat, pick, 1)


def _stencil(d: int) -> np.ndarray:
    rows = [np.zeros(d)]
    for i in range(d):
        for s in (1, -1):
            e = np.zeros(d)
            e[i] = s
            rows.append(e)
    for i in range(d):
        for j in range(i + 1, d):
            for si, sj in ((1, 1), (1, -1), (-1, 1), (-1, -1)):
                e = np.zeros(d)
                e[i], e[j] = si, sj
                rows.append(e)
    return np.array(rows)


def derivatives(problem: Objective, u: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, ...]:
    """Objective and log-likelihood at u (M, d), and gradient and Hessian by central
    differences near u."""
    m, d = u.shape
    h = STENCIL_H
    offsets = _stencil(d) * h
    centre = np.clip(u, h, 1 - h)
    pts = np.concatenate([u[:, None, :], centre[:, None, :] + offsets], axis=1)
    f_all, ll_all = problem.at(pts, rows)
    f0, fs = f_all[:, 1], f_all[:, 1:]
    grad = np.empty((m, d))
    hess = np.empty((m, d, d))
    for i in range(d):
        fp, fm = fs[:, 1 + 2 * i], fs[:, 2 + 2 * i]
        grad[:, i] = (fp - fm) / (2 * h)
        hess[:, i, i] = (fp - 2 * f0 + fm) / (h * h)
    col = 1 + 2 * d
    for i in range(d):
        for j in range(i + 1, d):
            fpp, fpm, fmp, fmm = (fs[:, col + c] for c in range(4))
            hess[:, i, j] = hess[:, j, i] = (fpp - fpm - fmp + fmm) / (4 * h * h)
            col += 4
    # near a bound the stencil sits a step inside; carry the gradient back to u
    grad += np.einsum("...ij,...j->...i", hess, u - centre)
    bad = ~(np.isfinite(grad).all(-1) & np.isfinite(hess).all((-2, -1)))
    grad[bad] = 0.0
    hess[bad] = np.eye(d)
    return f_all[:, 0], ll_all[:, 0], grad, hess


def _damped_steps(u: np.ndarray, grad: np.ndarray, hess: np.ndarray) -> np.ndarray:
    """Candidates along the Levenberg-Marquardt path, one per damping value: (..., L, d).

    A coordinate on its bound whose gradient points outwards stays put (active set), so the
    Newton step is taken in the remaining coordinates only.
    """
    d = u.shape[-1]
    held = ((u <= 0.0) & (grad > 0)) | ((u >= 1.0) & (grad < 0))
    grad = np.where(held, 0.0, grad)
    pair = held[..., :, None] | held[..., None, :]
    hess = np.where(pair, 0.0, hess) + np.where(held[..., None], np.eye(d), 0.0)
    e, v = np.linalg.eigh(hess)
    ae = np.abs(e)  # a saddle's negative curvature is treated as positive (move downhill)
    scale = ae.max(-1, keepdims=True) + 1e-12
    ae = np.maximum(ae, 1e-9 * scale)
    gv = np.einsum("...ji,...j->...i", v, grad)
    denom = ae[..., None, :] + DAMPING[:, None] * scale[..., None]
    steps = -np.einsum("...ij,...lj->...li", v, gv[..., None, :] / denom)
    return np.clip(u[..., None, :] + steps, 0.0, 1.0)


def refine(problem: Objective, u: np.ndarray, fu: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Damped Newton from every start (u: (M, d)); only unconverged starts are evaluated."""
    u, fu = u.copy(), fu.copy()
    active = np.ones(len(u), dtype=bool)
    for _ in range(MAX_STEPS):
        idx = np.flatnonzero(active)
        if not len(idx):
            break
        _, _, grad, hess = derivatives(problem, u[idx], rows[idx])
        cands = _damped_steps(u[idx], grad, hess)
        fc, _ = problem.at(cands, rows[idx])
        best = fc.argmin(1)
        fb = fc[np.arange(len(idx)), best]
        gain = fu[idx] - fb
        move = gain > 0
        u[idx[move]] = cands[np.flatnonzero(move), best[move]]
        fu[idx[move]] = fb[move]
        active[idx] = gain > 1e-10 * np.maximum(1.0, np.abs(fu[idx]))
    return u, fu


def wald_intervals(free: Sequence[Param], u: np.ndarray, grad: np.ndarray, hess: np.ndarray) -> list[dict]:
    """Wald 95 % intervals on the unit cube, mapped back to each parameter's scale.

    A parameter held on a bound by its gradient gets no interval; the others use the
    Hessian of the remaining coordinates.
    """
    out = []
    for ui, gi, hi in zip(u, grad, hess):
        held = ((ui <= 0.0) & (gi > 0)) | ((ui >= 1.0) & (gi < 0))
        keep = np.flatnonzero(~held)
        row: dict = {p.name: None for p in free}
        if len(keep):
            sub = hi[np.ix_(keep, keep)]
            e = np.linalg.eigvalsh(sub) if np.isfinite(sub).all() else np.array([-1.0])
            if np.all(e > 0):
                se = np.sqrt(np.diag(np.linalg.inv(sub)))
                for j, i in enumerate(keep):
                    p = free[int(i)]
                    lo = float(p.from_unit(max(0.0, ui[i] - Z95 * se[j])))
                    up = float(p.from_unit(min(1.0, ui[i] + Z95 * se[j])))
                    row[p.name] = (lo, up)
        out.append(row)
    return out


def _fit_stack(
    model: ChoiceModel,
    animals: Sequence[AnimalTrials],
    free: list[Param],
    fixed: dict,
    use_prior: bool,
    values: ValueSettings,
    chunk: int,
) -> list[FitResult]:
    problem = _Problem(model, stack_animals(animals), free, fixed, use_prior, values)
    n, d = len(animals), len(free)
    starts, f_starts = [], []
    for c0 in range(0, n, chunk):  # the coarse grid is the memory-hungry stage
        part = _Problem(model, problem.stack.take(np.arange(c0, min(n, c0 + chunk))), free, fixed, use_prior, values)
        f, centres = part.coarse(COARSE_POINTS.get(d, 7))
        u, fu = _starts(f, centres, STARTS)
        starts.append(u)
        f_starts.append(fu)
    u = np.concatenate(starts).reshape(-1, d)
    fu = np.concatenate(f_starts).ravel()
    rows = np.repeat(np.arange(n), STARTS)
    u, fu = refine(problem, u, fu, rows)
    best = fu.reshape(n, STARTS).argmin(1)
    u_best = u.reshape(n, STARTS, d)[np.arange(n), best]
    return fit_results(problem, model.name, model.names, animals, free, fixed, u_best, use_prior)


def fit_results(
    problem: Objective,
    model: str,
    names: Sequence[str],
    animals: Sequence,
    free: Sequence[Param],
    fixed: Mapping[str, float],
    u_best: np.ndarray,
    use_prior: bool,
) -> list[FitResult]:
    """FitResults at the optimum u_best (N, d) of each animal (with `animal`, `n_choices`)."""
    n, d = u_best.shape
    f_best, ll_best, grad, hess = derivatives(problem, u_best, np.arange(n))
    intervals = wald_intervals(free, u_best, grad, hess)
    results = []
    for i, a in enumerate(animals):
        params = {p.name: float(p.from_unit(u_best[i, j])) for j, p in enumerate(free)}
        params.update(fixed)
        ordered = {name: params[name] for name in names}
        ll = float(ll_best[i])
        results.append(
            FitResult(
                a.animal,
                model,
                ordered,
                intervals[i],
                ll,
                a.n_choices,
                d,
                "map" if use_prior else "ml",
                float(-f_best[i] - ll) if use_prior else None,
                tuple(sorted(fixed)),
            )
        )
    return results


def fit_animals(
    model: ChoiceModel,
    animals: Sequence[AnimalTrials],
    *,
    use_prior: bool = False,
    fixed: Mapping[str, float] | None = None,
    values: ValueSettings = ValueSettings(),
) -> list[FitResult]:
    """Fit one model to each animal (ML, or MAP with the declared priors); keeps order.

    `fixed` holds parameters to keep at given values (they do not count in k).
    """
    fixed = dict(fixed or {})
    for name, v in fixed.items():
        if name not in model.names:
            model.check({name: v})  # raises the usual unknown-parameter message
        fixed[name] = model.param(name).check(model.name, v)
    free = [p for p in model.params if p.name not in fixed]
    if not free:
        raise ValueError(f"{model.name}: every parameter is fixed; nothing to fit")
    for a in animals:
        if a.n_choices == 0:
            raise ValueError(f"animal {a.animal}: no choice trials to fit")
    out: dict[int, FitResult] = {}
    by_k: dict[int, list[int]] = {}
    for i, a in enumerate(animals):
        by_k.setdefault(len(a.options), []).append(i)
    n_coarse = COARSE_POINTS.get(len(free), 7)
    q_cells = int(np.prod([n_coarse if p.learning else 1 for p in free]))
    for k, idx in by_k.items():
        t_max = max(len(animals[i].choice) for i in idx)
        per_animal = max(1, t_max * q_cells * k, n_coarse ** len(free) * k)
        chunk = max(1, _STACK_ELEMENTS // per_animal)
        fits = _fit_stack(model, [animals[i] for i in idx], free, fixed, use_prior, values, chunk)
        out.update(zip(idx, fits))
    return [out[i] for i in range(len(animals))]
