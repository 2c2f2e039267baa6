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

The caller writes the weights to move into `inbox`, a view into a buffer with one spare
cell at each end of the beta axis (the reflecting edges); `settle` then moves them, scales
them and floors them in a handful of passes. The three taps are written out rather than
handed to `np.convolve`, whose dot products go to BLAS: its kernels differ by processor, and
a seed must give the same bits everywhere (server/models/sums.py).
"""

from __future__ import annotations

import math

import numpy as np

from .grid import Grid


class BetaWalk:
    """The walk along one axis of a grid-shaped weight array."""

    def __init__(self, grid: Grid, step: float, name: str = "beta"):
        axis = grid.axis_of(name)
        p = grid.model.params[axis]
        n = grid.sizes[axis]
        lo, hi = p.grid_range()
        width = (math.log(hi) - math.log(lo)) / n if p.scale == "log" else (hi - lo) / n
        ratio = (step / width) ** 2  # variance of one trial's step, in cells squared
        self.substeps = max(1, math.ceil(ratio))
        self.p = ratio / (2 * self.substeps)
        self.cells = n
        self.sizes = grid.sizes
        before = int(np.prod(grid.sizes[:axis]))
        after = int(np.prod(grid.sizes[axis + 1 :]))
        self._pad = np.zeros((before, n + 2, after))
        self._mid = self._pad[:, 1:-1]
        self.inbox = self._mid.reshape(grid.sizes)  # a view: writing here fills the buffer
        assert np.shares_memory(self.inbox, self._pad)
        self._spare = np.empty((before, n, after))
        self._sum = np.empty((before, n, after))

    def settle(self, out: np.ndarray, scale: float, floor: float) -> None:
        """out = max(scale x walk(inbox), floor); out is grid-shaped, apart from the inbox."""
        pad, mid, p = self._pad, self._mid, self.p
        o = out.reshape(self._spare.shape)
        for i in range(self.substeps):
            last = i == self.substeps - 1
            pad[:, 0] = pad[:, 1]  # reflecting edges: what would step off the grid stays
            pad[:, -1] = pad[:, -2]
            moved = self._spare
            np.add(pad[:, :-2], pad[:, 2:], out=self._sum)
            np.multiply(mid, (1.0 - 2.0 * p) * scale, out=moved)
            self._sum *= p * scale
            moved += self._sum
            if last:
                np.maximum(moved, floor, out=o)
            else:
                mid[...] = moved
            scale = 1.0

    def matrix(self) -> np.ndarray:
        """The walk as an (n, n) column-stochastic matrix: new = matrix @ old (for checks)."""
        out = np.empty((self.cells, self.cells))
        moved = np.empty(self.sizes)
        line = (0, slice(None), 0)
        for j in range(self.cells):
            self.inbox[...] = 0.0
            self._mid[(0, j, 0)] = 1.0
            self.settle(moved, 1.0, 0.0)
            out[:, j] = moved.reshape(self._spare.shape)[line]
        return out


def beta_walk(grid: Grid, step: float) -> BetaWalk | None:
    """The walk for a drift of sd `step` in log beta per trial, or None when static."""
    return BetaWalk(grid, step) if step > 0 else None
