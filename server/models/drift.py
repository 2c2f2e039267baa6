"""The between-trial random walk of log beta on the estimator's grid.

A Gaussian step of sd `step` is far narrower than a grid cell at the usual settings (0.02
against cells ~0.09 wide in log beta), and a kernel that asks "where does a step from the
cell's centre land?" then moves almost nothing: its variance depends on the cell width, so
the posterior's spread depended on the grid. Here the walk is the lazy nearest-neighbour
walk whose variance per trial is exactly step²: move one cell up or down with probability
p = step² / (2 h²) each (the explicit finite-difference scheme for the diffusion equation;
common practice), split into m equal substeps whenever p would exceed 1/2, so every
transition probability stays non-negative. Mass that would leave the grid stays in the edge
cell, so the walk never loses probability.

It is applied in place of a dense matrix: three passes over the weights per substep, and the
caller's normalising factor is folded into the same passes.
"""

from __future__ import annotations

import math

import numpy as np

from .grid import Grid


class BetaWalk:
    """The walk along one axis of a grid-shaped weight array."""

    def __init__(self, grid: Grid, step: float, name: str = "beta"):
        self.axis = grid.axis_of(name)
        p = grid.model.params[self.axis]
        n = grid.sizes[self.axis]
        lo, hi = p.grid_range()
        width = (math.log(hi) - math.log(lo)) / n if p.scale == "log" else (hi - lo) / n
        ratio = (step / width) ** 2  # variance of one trial's step, in cells squared
        self.substeps = max(1, math.ceil(ratio))
        self.p = ratio / (2 * self.substeps)
        self.cells = n
        before = int(np.prod(grid.sizes[: self.axis]))
        after = int(np.prod(grid.sizes[self.axis + 1:]))
        # (before, n, after) with axes of one dropped: numpy is slow along a length-1 axis
        self._shape = tuple(d for d in (before, n, after) if d > 1)  # n >= 2 on every grid
        self._at = 1 if before > 1 else 0
        padded = list(self._shape)
        padded[self._at] += 2
        self._padded = np.empty(padded)
        self._spare = np.empty(self._shape)
        index = [slice(None)] * len(self._shape)

        def along(s):
            return tuple(index[: self._at] + [s] + index[self._at + 1:])

        self._mid, self._below, self._above = along(slice(1, -1)), along(slice(None, -2)), along(slice(2, None))
        self._first, self._second = along(0), along(1)
        self._last, self._next_to_last = along(-1), along(-2)

    def apply(self, src: np.ndarray, out: np.ndarray, scale: float = 1.0) -> None:
        """out = scale x walk(src); src and out are grid-shaped and must not overlap."""
        v, o = src.reshape(self._shape), out.reshape(self._shape)
        pad, p = self._padded, self.p
        for i in range(self.substeps):
            target = o if (self.substeps - i) % 2 == 1 else self._spare
            np.multiply(v, p * scale, out=pad[self._mid])
            pad[self._first] = pad[self._second]  # reflecting edges: what would step off
            pad[self._last] = pad[self._next_to_last]  # the grid stays where it is
            np.multiply(v, (1 - 2 * p) * scale, out=target)
            target += pad[self._below]
            target += pad[self._above]
            v, scale = target, 1.0

    def matrix(self) -> np.ndarray:
        """The walk as an (n, n) column-stochastic matrix: new = matrix @ old (for checks)."""
        eye = np.eye(self.cells)
        out = np.empty_like(eye)
        size = int(np.prod(self._shape))
        line = tuple(slice(None) if i == self._at else 0 for i in range(len(self._shape)))
        for j in range(self.cells):
            col = np.zeros(size)
            col.reshape(self._shape)[line] = eye[:, j]
            moved = np.empty_like(col)
            self.apply(col, moved)
            out[:, j] = moved.reshape(self._shape)[line]
        return out


def beta_walk(grid: Grid, step: float) -> BetaWalk | None:
    """The walk for a drift of sd `step` in log beta per trial, or None when static."""
    return BetaWalk(grid, step) if step > 0 else None
