"""The random walk of log beta between trials: its variance, its limit, and that the
posterior it gives does not depend on how finely the grid is cut."""

from __future__ import annotations

import math

import numpy as np
import pytest
from model_simulation import simulate, two_armed_reversal
from scipy import stats

from server.models import CHOICE_MODELS, OnlineEstimator
from server.models.drift import BetaWalk
from server.models.grid import build_grid


def _cell_width(grid) -> float:
    p = grid.model.param("beta")
    lo, hi = p.grid_range()
    return (math.log(hi) - math.log(lo)) / grid.sizes[grid.axis_of("beta")]


@pytest.mark.parametrize("model", ["q_learning", "q_sticky"])
@pytest.mark.parametrize("step", [0.02, 0.09, 0.3])
def test_one_trial_moves_log_beta_by_exactly_the_declared_variance(model, step):
    # A random walk with steps of sd s has variance s^2 per step (definition); away from
    # the edges the grid walk must match it exactly, whatever the cell width.
    grid = build_grid(CHOICE_MODELS[model])
    walk = BetaWalk(grid, step)
    m = walk.matrix()
    assert np.all(m >= 0) and m.sum(0) == pytest.approx(np.ones(len(m)), abs=1e-14)
    n, h = len(m), _cell_width(grid)
    j = n // 2
    offsets = (np.arange(n) - j) * h
    assert float(m[:, j] @ offsets) == pytest.approx(0.0, abs=1e-15)
    assert float(m[:, j] @ offsets**2) == pytest.approx(step**2, rel=1e-10)


def test_many_trials_approach_the_normal_distribution():
    # Central limit theorem: after k trials from one cell the mass per cell approaches the
    # Normal(0, k s^2) probability of that cell (scipy.stats.norm as the reference).
    grid = build_grid(CHOICE_MODELS["q_learning"])
    step, k = 0.02, 400
    walk = BetaWalk(grid, step)
    n, h = grid.sizes[1], _cell_width(grid)
    mass = np.linalg.matrix_power(walk.matrix(), k)[:, n // 2]
    edges = (np.arange(n + 1) - n // 2 - 0.5) * h
    expected = np.diff(stats.norm.cdf(edges, scale=step * math.sqrt(k)))
    assert np.abs(mass - expected).max() < 0.005
    assert float(mass @ ((np.arange(n) - n // 2) * h) ** 2) == pytest.approx(k * step**2, rel=1e-6)


def test_substeps_keep_every_probability_non_negative():
    grid = build_grid(CHOICE_MODELS["q_learning"])
    big = BetaWalk(grid, 3 * _cell_width(grid))
    assert big.substeps == 9 and big.p <= 0.5
    assert np.all(big.matrix() >= 0)


def test_the_posterior_with_drift_does_not_depend_on_the_grid():
    # The model is continuous; a grid only approximates it. With a drifting beta, a grid of
    # 48 x 64 points and one of 32 x 40 must give the same posterior within a small part of
    # its width (a kernel whose variance depends on the cell width fails this).
    rng = np.random.default_rng(21)
    ch, rw = simulate(
        "q_learning", {"alpha": np.array([0.3]), "beta": np.array([5.0])}, 600, rng, schedule=two_armed_reversal
    )
    found = []
    for sizes in ({"alpha": 48, "beta": 64}, {"alpha": 32, "beta": 40}):
        est = OnlineEstimator("q_learning", options=["L", "R"], drift=0.02, grid=sizes)
        for c, r in zip(ch[0], rw[0]):
            est.update("LR"[c] if c >= 0 else None, r, summarise=False)
        found.append(est.estimate().params)
    fine, coarse = found
    for name in ("alpha", "beta"):
        width = fine[name].high - fine[name].low
        for field in ("mean", "low", "high"):
            assert abs(getattr(fine[name], field) - getattr(coarse[name], field)) < 0.06 * width, (name, field)
