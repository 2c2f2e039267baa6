"""The particle estimator on a six-parameter hybrid model-based/model-free learner.

The model is a stand-in (tests/models/hybrid_standin.py, written from Daw et al. 2011 apart
from server.models), so the estimator's machinery is checked on a kernel it shares nothing
with; the animals come from its plain-Python simulator, and the reference for one animal is
scipy's optimum of the plain-Python likelihood written below, apart from the kernel. The
project's own hybrid, at the lab's particle count, is checked in
test_particles_hybrid_coverage.py.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hybrid_standin import COMMON, HybridStandIn, simulate
from scipy import optimize

from server.engine.records import SecondStage
from server.models.kernels import KERNELS
from server.models.online import chosen_method, make_online_estimator, replay_estimator
from server.models.particles import ParticleEstimator, _truncated_prior_draws

KERNELS.setdefault("hybrid_standin", HybridStandIn())
TWO_STAGE = {"states": ["A", "B"], "second_options": ["x", "y"]}


def _estimate(trials, seed: int, particles: int | None = 512):
    est = ParticleEstimator("hybrid_standin", ["L", "R"], particles=particles, seed=seed, **TWO_STAGE)
    for a1, s, common, a2, r in trials:
        est.update("LR"[a1], r, second=SecondStage("AB"[s], bool(common), "xy"[a2]), summarise=False)
    return est.estimate()


def reference_nll(x, trials) -> float:
    """-log L of the hybrid (Daw et al. 2011), one trial at a time in plain Python."""
    w, alpha, beta1, beta2, lam, persev = x
    q_mf = [0.0, 0.0]
    q2 = [[0.0, 0.0], [0.0, 0.0]]
    prev, ll = None, 0.0
    for a1, s, _, a2, r in trials:
        mb = [COMMON * max(q2[a]) + (1 - COMMON) * max(q2[1 - a]) for a in (0, 1)]
        z = [beta1 * (w * mb[a] + (1 - w) * q_mf[a]) + (persev if a == prev else 0.0) for a in (0, 1)]
        ll += z[a1] - math.log(math.exp(z[0]) + math.exp(z[1]))
        z2 = [beta2 * q2[s][b] for b in (0, 1)]
        ll += z2[a2] - math.log(math.exp(z2[0]) + math.exp(z2[1]))
        stage1_error = q2[s][a2] - q_mf[a1]
        q_mf[a1] += alpha * stage1_error
        stage2_error = r - q2[s][a2]
        q2[s][a2] += alpha * stage2_error
        q_mf[a1] += alpha * lam * stage2_error
        prev = a1
    return -ll


def test_the_posterior_holds_the_scipy_optimum_of_an_independent_likelihood():
    truth = {"w": 0.7, "alpha": 0.5, "beta1": 5.0, "beta2": 4.0, "lam": 0.6, "persev": 0.4}
    trials = simulate(truth, 600, seed=11)
    e = _estimate(trials, seed=1, particles=1024)
    bounds = [(0.0, 1.0), (0.01, 0.99), (0.05, 40.0), (0.05, 40.0), (0.0, 1.0), (-5.0, 5.0)]
    best = min(
        (optimize.minimize(reference_nll, x0, args=(trials,), method="L-BFGS-B", bounds=bounds) for x0 in
         ([0.5, 0.5, 3.0, 3.0, 0.5, 0.0], [0.8, 0.3, 6.0, 5.0, 0.8, 0.5], [0.2, 0.7, 2.0, 2.0, 0.2, -0.5])),
        key=lambda res: res.fun,
    )  # fmt: skip
    # at 600 trials the posterior is near its likelihood peak: each maximum-likelihood value
    # lies within the particle 95 % interval
    for name, value in zip(("w", "alpha", "beta1", "beta2", "lam", "persev"), best.x):
        assert e.params[name].low <= value <= e.params[name].high, (name, value, e.params[name])


@pytest.fixture(scope="module")
def cohort():
    # truths drawn from the declared prior; 300 trials each
    rng = np.random.default_rng(8)
    n = 60
    draws = {p.name: _truncated_prior_draws(p, n, rng) for p in HybridStandIn.params}
    out = []
    for i in range(n):
        truth = {k: float(v[i]) for k, v in draws.items()}
        out.append((truth, _estimate(simulate(truth, 300, seed=1000 + i), seed=i)))
    return out


@pytest.mark.slow
def test_w_tracks_the_truth_where_the_animal_is_engaged(cohort):
    # the bar: Pearson r >= 0.8 between w and its posterior mean where beta1 >= 2
    pairs = np.array([(t["w"], e.params["w"].mean) for t, e in cohort if t["beta1"] >= 2])
    r = float(np.corrcoef(pairs[:, 0], pairs[:, 1])[0, 1])
    print(f"w Pearson r {r:.3f} over {len(pairs)} animals with beta1 >= 2")
    assert len(pairs) >= 30 and r >= 0.8


def test_two_stage_trials_replay_bit_for_bit_across_sessions():
    truth = {"w": 0.5, "alpha": 0.4, "beta1": 4.0, "beta2": 3.0, "lam": 0.5, "persev": 0.2}
    rows = [
        (f"day{t // 60}", "LR"[a1], r, SecondStage("AB"[s], bool(common), "xy"[a2]))
        for t, (a1, s, common, a2, r) in enumerate(simulate(truth, 120, seed=5))
    ]
    config = {"model": "hybrid_standin", "options": ["L", "R"], "particles": 128, "seed": 3, **TWO_STAGE}
    assert chosen_method("hybrid_standin") == "particles"
    live, seen = make_online_estimator(**config), []
    for i, (session, c, r, second) in enumerate(rows):
        if i and session != rows[i - 1][0]:
            live.new_session()
        seen.append(live.update(c, r, second=second).to_dict())
    replayed, estimates = replay_estimator(rows, **config)
    assert [e.to_dict() for e in estimates] == seen
    assert replayed.state_dict() == live.state_dict() and live.rejuvenations > 0
