"""The particle estimator (resample-move SMC) against the exact grid, and its determinism.

The reference posterior is the exact grid filter on a grid four times finer in each axis
than the default, whose likelihood tests/models/test_estimator.py checks point by point
against the independent plain-Python likelihood of model_simulation.py; the animals are
simulated by model_simulation.simulate, which shares no code with server.models.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from model_simulation import reference_loglik, simulate, two_armed_reversal

from server.models import OnlineEstimator
from server.models.kernels import ChoiceKernel, KernelTrial, get_kernel
from server.models.online import chosen_method, estimator_from_state, make_online_estimator, replay_estimator
from server.models.particles import DEFAULT_PARTICLES, ParticleEstimator, default_particles

TOLERANCE = 0.02  # of each parameter's range, on its declared spacing (the accuracy bar)


def _animals(n: int, trials: int, seed: int, model: str = "q_learning"):
    rng = np.random.default_rng(seed)
    p = {"alpha": rng.uniform(0.15, 0.85, n), "beta": rng.uniform(1.0, 8.0, n), "kappa": rng.uniform(-1, 1, n)}
    return p, simulate(model, p, trials, rng, schedule=two_armed_reversal)


def _unit_summary(estimate, model: str, ranges=None) -> np.ndarray:
    out = []
    for p in get_kernel(model).params:
        lo, hi = p.grid_range()
        s = estimate.params[p.name]
        out += [float(p.to_unit(x, lo, hi)) for x in (s.mean, s.low, s.high)]
    return np.array(out)


def _run(est, choices, rewards):
    for c, r in zip(choices, rewards):
        est.update(None if c < 0 else "LR"[c], r, summarise=False)
    return est.estimate()


@pytest.mark.parametrize("model", ["q_learning", "q_sticky"])
def test_particles_agree_with_the_exact_grid_within_two_percent_of_the_range(model):
    _, (ch, rw) = _animals(3, 300, seed=21, model=model)
    # the grid, twice as fine as the default in every axis (four times for two axes)
    fine = {p.name: (4 if model == "q_learning" else 2) * p.grid for p in get_kernel(model).params}
    for i in range(3):
        exact = _run(OnlineEstimator(model, ["L", "R"], grid=fine), ch[i], rw[i])
        smc = _run(ParticleEstimator(model, ["L", "R"], seed=i), ch[i], rw[i])
        gap = np.abs(_unit_summary(smc, model) - _unit_summary(exact, model))
        assert gap.max() <= TOLERANCE, (i, gap.round(4))
        for label in ("L", "R"):
            assert smc.p_choice[label] == pytest.approx(exact.p_choice[label], abs=0.01)


def test_the_default_particle_count_is_within_two_percent_of_four_times_as_many():
    # the accuracy by which DEFAULT_PARTICLES was chosen (bench/estimator.py prints the same)
    _, (ch, rw) = _animals(3, 300, seed=22)
    for i in range(3):
        base = _run(ParticleEstimator("q_learning", ["L", "R"], seed=i), ch[i], rw[i])
        ref = _run(
            ParticleEstimator("q_learning", ["L", "R"], seed=100 + i, particles=4 * DEFAULT_PARTICLES), ch[i], rw[i]
        )
        gap = np.abs(_unit_summary(base, "q_learning") - _unit_summary(ref, "q_learning"))
        assert gap.max() <= TOLERANCE, (i, gap.round(4))


def test_the_kernel_gives_the_independent_likelihood():
    # summed kernel log-probabilities = plain-Python log-likelihood (model_simulation.py)
    _, (ch, rw) = _animals(1, 80, seed=23, model="q_sticky")
    kernel = get_kernel("q_sticky")
    assert isinstance(kernel, ChoiceKernel)
    theta = {"alpha": np.array([0.3, 0.6]), "beta": np.array([2.0, 5.0]), "kappa": np.array([0.5, -0.7])}
    values, ll = kernel.start(2, 2), np.zeros(2)
    for c, r in zip(ch[0], rw[0]):
        logp, values = kernel.step(theta, values, KernelTrial(int(c), float(r), 2))
        ll += logp
    for j in range(2):
        params = {k: float(v[j]) for k, v in theta.items()}
        trials = [("s", None if c < 0 else "LR"[c], float(r)) for c, r in zip(ch[0], rw[0])]
        assert ll[j] == pytest.approx(reference_loglik("q_sticky", params, trials), abs=1e-9)


def _days():
    _, (ch, rw) = _animals(1, 120, seed=24)
    rows = [(f"day{t // 40}", None if c < 0 else "LR"[c], float(r)) for t, (c, r) in enumerate(zip(ch[0], rw[0]))]
    rows[50] = ("day1", "C", 1.0)  # a third option appears on day 2
    return rows


def test_replay_rebuilds_the_live_estimate_bit_for_bit_and_the_state_resumes():
    config = {"model": "q_learning", "options": ["L", "R"], "method": "particles", "particles": 256, "seed": 5}
    rows = _days()
    live, seen, current = make_online_estimator(**config), [], None
    for session, c, r in rows:
        if current is not None and session != current:
            live.new_session()
        current = session
        seen.append(live.update(c, r).to_dict())
    replayed, estimates = replay_estimator(rows, **config)
    assert [e.to_dict() for e in estimates] == seen
    assert json.dumps(replayed.state_dict()) == json.dumps(live.state_dict())
    assert live.rejuvenations > 0 and "C" in live.options
    # resume from the JSON state of the first two days
    first = [row for row in rows if row[0] != "day2"]
    part, _ = replay_estimator(first, **config)
    saved = json.loads(json.dumps(part.state_dict(), allow_nan=False))
    resumed, rest = replay_estimator([row for row in rows if row[0] == "day2"], state=saved)
    assert [e.to_dict() for e in rest] == seen[len(first) :]
    assert resumed.state_dict() == live.state_dict()


def test_new_session_tempers_earlier_evidence():
    _, (ch, rw) = _animals(1, 200, seed=25)
    est = ParticleEstimator("q_learning", ["L", "R"], particles=512, temper=0.3)
    before = _run(est, ch[0], rw[0])
    est.new_session()
    after = est.estimate()
    for name in ("alpha", "beta"):
        assert after.params[name].high - after.params[name].low > before.params[name].high - before.params[name].low
    assert after.values == {"L": 0.0, "R": 0.0} and after.session_trial == 0


def test_the_particle_count_follows_the_model_size():
    assert ParticleEstimator("q_learning").config["particles"] == default_particles(2) == DEFAULT_PARTICLES
    assert default_particles(6) > DEFAULT_PARTICLES


def test_the_method_follows_the_model():
    assert chosen_method("q_learning") == "grid"
    assert chosen_method("q_sticky", "particles") == "particles"
    assert isinstance(make_online_estimator("q_learning", ["L", "R"]), OnlineEstimator)
    grid_state = make_online_estimator("q_learning", ["L", "R"]).state_dict()
    assert isinstance(estimator_from_state(grid_state), OnlineEstimator)


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"particles": 4}, r"particles must be a whole number >= 16"),
        ({"drift": 0.02}, r"drift is tracked by the grid estimator only"),
        ({"ess": 1.5}, r"ess must be in \(0, 1\)"),
        ({"model": "q_learnin"}, r"did you mean 'q_learning'"),
    ],
)
def test_bad_configuration_is_refused(kwargs, message):
    with pytest.raises(ValueError, match=message):
        ParticleEstimator(**kwargs)
    with pytest.raises(ValueError, match="estimator method must be one of auto, grid, particles"):
        make_online_estimator("q_learning", method="exact")


def test_a_state_of_another_format_is_refused():
    state = ParticleEstimator("q_learning", ["L", "R"], particles=32).state_dict()
    with pytest.raises(ValueError, match="particle estimator state format 9 is not 1"):
        estimator_from_state({**state, "format": 9})
    with pytest.raises(ValueError, match="does not match its particle count"):
        estimator_from_state({**state, "z": state["z"][:3]})


@pytest.mark.parametrize("model", ["q_learning"])
def test_intervals_cover_the_truth_at_their_nominal_rate_after_300_trials(model):
    # Calibration of a Bayesian interval (common practice): with truths drawn from the
    # declared prior (Beta(1.1, 1.1) for alpha, Gamma(1.2, scale 5) for beta within its
    # declared range), the 95 % intervals hold the truth in 93-97 % of the (animal,
    # parameter) pairs; 2 x 200 pairs at 95 % give a binomial sd of 1.1 %. Half the default
    # particle count keeps the test near 20 s (fewer particles can only widen the errors).
    rng = np.random.default_rng(31)
    n = 200
    alpha = rng.beta(1.1, 1.1, n)
    beta = rng.gamma(1.2, 5.0, 4 * n)
    beta = beta[(beta > 0.01) & (beta < 50.0)][:n]
    ch, rw = simulate(model, {"alpha": alpha, "beta": beta}, 300, rng, schedule=two_armed_reversal)
    hits = {"alpha": 0, "beta": 0}
    for i in range(n):
        e = _run(ParticleEstimator(model, ["L", "R"], seed=i, particles=512), ch[i], rw[i])
        for name, truth in (("alpha", alpha[i]), ("beta", beta[i])):
            hits[name] += e.params[name].low <= truth <= e.params[name].high
    rate = sum(hits.values()) / (2 * n)
    print(f"coverage {hits} of {n} animals: {rate:.3f}")
    assert 0.93 <= rate <= 0.97, hits
    for name, count in hits.items():
        assert 0.90 <= count / n <= 0.99, (name, count)


def test_resuming_mid_session_continues_to_the_last_bit():
    _, (ch, rw) = _animals(1, 120, seed=26)
    whole = ParticleEstimator("q_sticky", ["L", "R"], particles=128, seed=2)
    half = ParticleEstimator("q_sticky", ["L", "R"], particles=128, seed=2)
    rows = [("LR"[c] if c >= 0 else None, float(r)) for c, r in zip(ch[0], rw[0])]
    for c, r in rows[:60]:
        whole.update(c, r)
        half.update(c, r)
    resumed = estimator_from_state(json.loads(json.dumps(half.state_dict())))
    assert resumed.estimate().to_dict() == whole.estimate().to_dict()
    for c, r in rows[60:]:
        assert resumed.update(c, r).to_dict() == whole.update(c, r).to_dict()
    assert whole.rejuvenations > 1
