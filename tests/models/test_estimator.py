"""The online estimator: exact filtering, replay, persistence, options, drift, summaries."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from model_simulation import as_rows, reference_loglik, simulate, two_armed_reversal

from server.models import CHOICE_MODELS, OnlineEstimator, encode_animal
from server.models.batch import loglik
from server.models.trials import stack_animals


def _session_trials(seed: int, n: int = 60, model: str = "q_learning", omission: float = 0.1):
    rng = np.random.default_rng(seed)
    p = {
        "alpha": np.array([0.3]),
        "beta": np.array([4.0]),
        "kappa": np.array([1.0]),
        "alpha_pos": np.array([0.5]),
        "alpha_neg": np.array([0.2]),
        "decay": np.array([0.2]),
    }
    ch, rw = simulate(model, p, n, rng, omission=omission)
    return [(c, r) for (_, _, c, r) in as_rows(ch, rw)[0]]


@pytest.mark.parametrize("model", list(CHOICE_MODELS))
def test_static_posterior_is_prior_times_the_batch_likelihood(model):
    # Bayes' rule on a grid: log posterior - log prior = log-likelihood + constant, and the
    # likelihood of every grid point is the batch one (same learn) and the plain-Python one.
    est = OnlineEstimator(model, options=["L", "R", "C"], grid={p.name: 5 for p in CHOICE_MODELS[model].params})
    trials = _session_trials(1, model=model)
    for c, r in trials:
        est.update(c, r)
    animal = encode_animal("R1", [("s", i + 1, c, r) for i, (c, r) in enumerate(trials)], options=("L", "R", "C"))
    theta = {k: v[None] for k, v in est.grid.theta.items()}
    batch = loglik(CHOICE_MODELS[model], theta, stack_animals([animal]), est.grid.qshape)[0]
    logw = np.log(est._w)
    online = logw - est.grid.log_prior
    keep = est._w > 1e-250  # points at the weight floor have left the exact regime
    diff = (online - batch)[keep]
    assert keep.sum() > est.grid.points // 4
    assert np.ptp(diff) < 1e-9
    # one grid point against the independent implementation
    idx = np.unravel_index(np.argmax(logw), est.grid.sizes)
    params = {p.name: float(est.grid.centres[i][idx[i]]) for i, p in enumerate(CHOICE_MODELS[model].params)}
    ref = reference_loglik(model, params, [("s", c, r) for c, r in trials])
    # the reference only knows options it has seen; all three were chosen here
    assert {c for c, _ in trials if c} == {"L", "R", "C"}
    assert batch[idx] == pytest.approx(ref, abs=1e-9)


def _sessions():
    out = []
    for s, seed in enumerate((3, 4, 5)):
        trials = _session_trials(seed, n=40)
        if s == 1:  # a new option appears mid-session
            trials[20] = ("D", 1.0)
        out += [(f"day{s}", c, r) for c, r in trials]
    return out


def _run_live(trials, **config):
    est, seen, current = OnlineEstimator(**config), [], None
    for session, c, r in trials:
        if current is not None and session != current:
            est.new_session()
        current = session
        seen.append(est.update(c, r))
    return est, seen


def test_replay_rebuilds_bit_for_bit():
    config = {"model": "q_sticky", "options": ["L", "R", "C"], "drift": 0.1}
    trials = _sessions()
    live, live_estimates = _run_live(trials, **config)
    replayed, estimates = OnlineEstimator.replay(trials, **config)
    assert [e.to_dict() for e in estimates] == [e.to_dict() for e in live_estimates]
    assert json.dumps(replayed.state_dict()) == json.dumps(live.state_dict())
    assert "D" in replayed.options


def test_state_round_trips_through_json_and_resumes_identically():
    trials = _sessions()
    config = {"model": "q_learning", "options": ["L", "R"], "drift": 0.05}
    first = [t for t in trials if t[0] != "day2"]
    last = [t for t in trials if t[0] == "day2"]
    whole, whole_estimates = _run_live(trials, **config)
    part, _ = _run_live(first, **config)
    saved = json.loads(json.dumps(part.state_dict(), allow_nan=False))
    resumed, estimates = OnlineEstimator.replay(last, state=saved)
    assert [e.to_dict() for e in estimates] == [e.to_dict() for e in whole_estimates[-40:]]
    assert resumed.state_dict() == whole.state_dict()


def test_new_session_tempers_the_evidence_and_resets_values():
    est = OnlineEstimator("q_learning", options=["L", "R", "C"], temper=0.5)
    for c, r in _session_trials(7, n=80):
        est.update(c, r)
    before = est.estimate()
    logw, prior = np.log(est._w), est.grid.log_prior
    est.new_session()
    expected = prior + 0.5 * (logw - prior)
    expected -= np.log(np.exp(expected - expected.max()).sum()) + expected.max()
    assert np.log(est._w) == pytest.approx(expected, abs=1e-9)
    after = est.estimate()
    for name in ("alpha", "beta"):
        width = before.params[name].high - before.params[name].low
        assert after.params[name].high - after.params[name].low > width
    assert after.values == {"L": 0.0, "R": 0.0, "C": 0.0}
    assert after.session_trial == 0 and after.reward_rate is None


def test_omission_changes_neither_posterior_nor_values():
    est = OnlineEstimator("q_learning", options=["L", "R"])
    for c, r in _session_trials(2, n=20, omission=0.0):
        est.update(c, r)
    w, q = est._w.copy(), est._q.copy()
    e = est.update(None, 0.0)
    assert np.array_equal(est._w, w) and np.array_equal(est._q, q)
    assert e.prediction_error is None and e.surprise is None
    assert est.update("", 0.0).prediction_error is None  # empty label = omission too


def test_options_declared_or_discovered():
    est = OnlineEstimator("q_learning", options=["L", "R"])
    e0 = est.estimate()
    assert e0.p_choice == pytest.approx({"L": 0.5, "R": 0.5})
    assert e0.best is None and e0.exploration is None  # values tie before any trial
    est.update("L", 1.0)
    e = est.update("X", 0.0)  # a third option appears mid-session
    assert list(e.values) == ["L", "R", "X"]
    assert sum(e.p_choice.values()) == pytest.approx(1.0)
    assert sum(e.p_prefers.values()) == pytest.approx(1.0)
    assert e.values["X"] == 0.0 and e.values["L"] > 0
    assert e.best == "L"
    assert e.exploration == pytest.approx(1.0 - e.p_choice["L"])
    assert e.p_prefers_best == e.p_prefers["L"]


def test_prediction_error_surprise_and_reward_rate():
    est = OnlineEstimator("q_learning", options=["L", "R"], reward_rate_step=0.5)
    e1 = est.update("L", 1.0)
    # first choice from Q0 = 0: delta = 1 at every grid point; P(L) = 1/2 everywhere
    assert e1.prediction_error == pytest.approx(1.0)
    assert e1.surprise == pytest.approx(math.log(2))
    e2 = est.update("R", 0.0)
    assert e2.prediction_error == pytest.approx(0.0)
    # bias-corrected exponential filter: (0.5*0 + 0.25*1) / (0.5 + 0.25)
    assert e2.reward_rate == pytest.approx(1 / 3)


def test_drift_spreads_beta_but_keeps_mass():
    static = OnlineEstimator("q_learning", options=["L", "R"])
    drifting = OnlineEstimator("q_learning", options=["L", "R"], drift=0.3)
    assert static._walk is None
    for c, r in _session_trials(9, n=120, omission=0.0):
        a, b = static.update(c, r), drifting.update(c, r)
    assert drifting._w.sum() == pytest.approx(1.0)

    def log_width(e):
        return math.log(e.params["beta"].high) - math.log(e.params["beta"].low)

    assert log_width(b) > log_width(a)


def test_drift_tracks_a_drop_in_beta():
    # an animal that stops caring about value half way (beta 8 -> 0.5): a drifting filter
    # follows, a static one averages over the whole session
    rng = np.random.default_rng(12)
    one = {"alpha": np.array([0.3])}
    first = simulate("q_learning", {**one, "beta": np.array([8.0])}, 150, rng, schedule=two_armed_reversal)
    second = simulate("q_learning", {**one, "beta": np.array([0.5])}, 150, rng, schedule=two_armed_reversal)
    static = OnlineEstimator("q_learning", options=["L", "R"])
    drifting = OnlineEstimator("q_learning", options=["L", "R"], drift=0.15)
    for ch, rw in (first, second):
        for c, r in zip(ch[0], rw[0]):
            a, b = static.update("LR"[c], r), drifting.update("LR"[c], r)
    assert b.params["beta"].mean < a.params["beta"].mean
    assert b.params["beta"].low < 2.0


def test_estimate_is_json_ready_and_consistent():
    est = OnlineEstimator("q_dual_rate", options=["L", "R", "C"], drift=0.05)
    for c, r in _session_trials(6, n=30, model="q_dual_rate"):
        e = est.update(c, r)
    d = json.loads(json.dumps(e.to_dict(), allow_nan=False))
    assert set(d) >= {
        "params",
        "values",
        "p_choice",
        "prediction_error",
        "exploration",
        "p_prefers_best",
        "reward_rate",
    }
    for name, s in d["params"].items():
        assert s["low"] <= s["mean"] <= s["high"], name
    assert sum(d["p_choice"].values()) == pytest.approx(1.0)
    assert 0.0 <= d["p_prefers_best"] <= 1.0
    assert est.grid.points >= 2500


def test_two_parameter_grid_has_at_least_2500_points():
    assert OnlineEstimator("q_learning").grid.points >= 2500


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"model": "q_learnin"}, r"unknown model 'q_learnin' \(did you mean 'q_learning'\?\)"),
        ({"drift": -1.0}, r"drift must be a number >= 0"),
        ({"temper": 0.0}, r"temper must be in \(0, 1\]"),
        ({"options": ["L", "L"]}, r"option labels must be distinct"),
        ({"grid": {"gamma": 4}}, r"no parameter 'gamma'"),
    ],
)
def test_bad_configuration_is_refused_with_a_short_message(kwargs, message):
    with pytest.raises(ValueError, match=message):
        OnlineEstimator(**kwargs)


def test_bad_reward_is_refused():
    with pytest.raises(ValueError, match=r"^reward must be a finite number, got nan$"):
        OnlineEstimator().update("L", float("nan"))


def test_state_from_another_format_is_refused():
    state = OnlineEstimator().state_dict()
    with pytest.raises(ValueError, match="estimator state format 99 is not 2"):
        OnlineEstimator.from_state({**state, "format": 99})
    with pytest.raises(ValueError, match="does not match its grid"):
        OnlineEstimator.from_state({**state, "weights": [1.0]})
    with pytest.raises(ValueError, match="weights that are not positive numbers"):
        OnlineEstimator.from_state({**state, "weights": [0.0] * len(state["weights"])})


def test_resuming_mid_session_continues_identically():
    trials = _session_trials(8, n=50)
    whole = OnlineEstimator("q_sticky", options=["L", "R", "C"], drift=0.05)
    half = OnlineEstimator("q_sticky", options=["L", "R", "C"], drift=0.05)
    for c, r in trials[:25]:
        whole.update(c, r)
        half.update(c, r)
    resumed = OnlineEstimator.from_state(json.loads(json.dumps(half.state_dict())))
    assert resumed.estimate().to_dict() == whole.estimate().to_dict()
    for c, r in trials[25:]:
        assert resumed.update(c, r).to_dict() == whole.update(c, r).to_dict()


@pytest.mark.parametrize("model", ["q_learning", "q_sticky"])
def test_two_option_shortcut_agrees_with_the_full_softmax(model):
    # The logistic form for two options (P = 1 / (1 + exp(-gap))) is the softmax
    # (Sutton & Barto 2018, eq. 2.11) with K = 2; both paths must give the same posterior.
    trials = [(c if c in ("L", "R") else None, r) for c, r in _session_trials(13, n=80, model=model)]
    est = OnlineEstimator(model, options=["L", "R"], drift=0.05)
    for c, r in trials:
        before = est._w.copy()
        probs = est._probs()
        expected = None if c is None else before * probs[est.options.index(c)]
        est.update(c, r, summarise=False)
        if expected is not None:
            assert est.estimate().surprise == pytest.approx(-math.log(expected.sum()), rel=1e-12)
        for label in ("L", "R"):
            for level in (0.6, 0.75, 0.9):
                by_softmax = float(((est._probs()[est.options.index(label)] >= level) * est._w).sum())
                assert est.p_choice_at_least(label, level) == pytest.approx(by_softmax, abs=1e-12)


def test_a_choice_every_point_all_but_ruled_out_keeps_the_posterior_finite():
    # A reward of 10^6 makes the value gap so large that P(R) underflows to 0 in doubles at
    # every grid point (beta >= 0.1, alpha >= 0.005: gap >= 500); the update falls back to
    # log space instead of dividing by zero.
    est = OnlineEstimator("q_learning", options=["L", "R"])
    est.update("L", 1e6)
    e = est.update("R", 0.0)
    assert np.isfinite(est._w).all() and est._w.sum() == pytest.approx(1.0)
    assert math.isfinite(e.surprise) and e.surprise > 700
    json.dumps(e.to_dict(), allow_nan=False)
