"""The online estimator's parameter grid: axes, prior mass per cell, marginals, drift.

The grid is a product of cells of equal width on each parameter's declared spacing
(linear, or log for beta), so a marginal posterior is a sum over the other axes and its
quantiles come from a piecewise-constant density. Values depend only on the learning
parameters, so they are kept on the learning axes alone (size 1 on the others) and
broadcast: every grid point still has its own value vector, stored once per distinct
setting of the learning rates.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from .choice import ChoiceModel
from .sums import dot


@dataclass(frozen=True, eq=False)
class Grid:
    model: ChoiceModel
    sizes: tuple[int, ...]
    centres: tuple[np.ndarray, ...]  # natural values of the cell centres, per axis
    theta: dict[str, np.ndarray]  # per parameter, shaped to broadcast over the grid
    log_prior: np.ndarray  # grid-shaped log prior mass per cell (normalised)
    edges: tuple[np.ndarray, ...]  # cell edges per axis on the unit coordinate

    @property
    def qshape(self) -> tuple[int, ...]:
        return tuple(n if p.learning else 1 for p, n in zip(self.model.params, self.sizes))

    @property
    def choice_axes(self) -> tuple[int, ...]:
        return tuple(i for i, p in enumerate(self.model.params) if not p.learning)

    @property
    def points(self) -> int:
        return int(np.prod(self.sizes))

    def axis_of(self, name: str) -> int:
        return self.model.names.index(name)

    def marginal_summaries(self, w: np.ndarray) -> list[tuple[float, float, float]]:
        """Posterior mean and equal-tailed 95 % interval of each parameter.

        The marginal is piecewise constant over cells on the declared spacing, so its
        quantiles are linear in the unit coordinate within a cell.
        """
        out = []
        axes = range(w.ndim)
        for i, p in enumerate(self.model.params):
            m = w.sum(axis=tuple(j for j in axes if j != i))
            cdf = np.empty(len(m) + 1)
            cdf[0] = 0.0
            np.cumsum(m, out=cdf[1:])
            lo_u, hi_u = np.interp(_TAILS * cdf[-1], cdf, self.edges[i])
            lo, hi = p.grid_range()
            out.append(
                (
                    dot(m, self.centres[i]) / float(cdf[-1]),
                    float(p.from_unit(lo_u, lo, hi)),
                    float(p.from_unit(hi_u, lo, hi)),
                )
            )
        return out


_TAILS = np.array([0.025, 0.975])


def build_grid(model: ChoiceModel, sizes: Mapping[str, int] | None = None, use_prior: bool = True) -> Grid:
    """Cell-centred product grid over each parameter's grid range."""
    sizes = dict(sizes or {})
    unknown = [k for k in sizes if k not in model.names]
    if unknown:
        raise ValueError(f"{model.name}: no parameter {unknown[0]!r} to size a grid for")
    dims = tuple(int(sizes.get(p.name, p.grid)) for p in model.params)
    if any(n < 2 for n in dims):
        raise ValueError(f"{model.name}: every grid axis needs at least 2 points")
    centres, theta = [], {}
    log_prior = np.zeros(dims)
    for i, (p, n) in enumerate(zip(model.params, dims)):
        u = (np.arange(n) + 0.5) / n
        lo, hi = p.grid_range()
        x = p.from_unit(u, lo, hi)
        centres.append(x)
        shape = [1] * len(dims)
        shape[i] = n
        theta[p.name] = x.reshape(shape)
        if use_prior:
            # mass of a cell = density x cell width on the natural scale
            lp = p.prior.logpdf(x) + (np.log(x) if p.scale == "log" else 0.0)
            log_prior = log_prior + lp.reshape(shape)
    log_prior = log_prior - _logsumexp(log_prior)
    edges = tuple(np.arange(n + 1) / n for n in dims)
    return Grid(model, dims, tuple(centres), theta, log_prior, edges)


def _logsumexp(a: np.ndarray) -> float:
    top = float(a.max())
    return top + math.log(float(np.exp(a - top).sum()))


def drift_kernel(grid: Grid, step: float, name: str = "beta") -> np.ndarray | None:
    """Column-stochastic matrix spreading mass along the log-beta axis by a random walk.

    Cell j's mass goes to cell i with the probability that a Gaussian step of sd `step`
    (in log beta) from j's centre lands in cell i; mass leaving the grid is returned
    (each column renormalised), so the walk never loses probability.
    """
    if step <= 0:
        return None
    axis = grid.axis_of(name)
    p = grid.model.params[axis]
    n = grid.sizes[axis]
    lo, hi = p.grid_range()
    width = (math.log(hi) - math.log(lo)) / n if p.scale == "log" else (hi - lo) / n
    edges = (np.arange(n + 1) - np.arange(n)[:, None] - 0.5) * width / step  # (src, edge)
    cdf = 0.5 * (1.0 + np.array([[math.erf(x / math.sqrt(2)) for x in row] for row in edges]))
    mass = np.diff(cdf, axis=1)  # (src, dst)
    mass /= mass.sum(1, keepdims=True)
    return np.ascontiguousarray(mass.T)  # (dst, src): new = kernel @ old
