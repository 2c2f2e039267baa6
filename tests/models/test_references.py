"""Learning rules against textbook worked numbers (sources named beside each check)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from scipy.special import expit, softmax

from server.models.choice import CHOICE_MODELS, log_softmax
from server.models.pavlovian import (
    RESCORLA_WAGNER,
    response_probability,
    rw_loglik,
    rw_session,
    rw_update,
)
from server.models.td import (
    q_learning_target,
    random_walk_td0,
    sarsa_target,
    td0_episode,
    td_step,
)

# ---------------------------------------------------------------- Rescorla-Wagner


def test_rescorla_wagner_single_cs_worked_numbers_and_closed_form():
    # Rescorla & Wagner (1972): alpha = beta = 0.5, lambda = 100 -> 25, 43.75, 57.8125,
    # 68.359375; in general V_n = lambda [1 - (1 - alpha beta)^n] (CHECKS.md).
    v = np.zeros(1)
    seen = []
    for _ in range(20):
        v = rw_update(v, [1], 0.5, 0.5, 100.0)
        seen.append(float(v[0]))
    assert seen[:4] == pytest.approx([25.0, 43.75, 57.8125, 68.359375], abs=1e-12)
    closed = [100.0 * (1 - (1 - 0.25) ** n) for n in range(1, 21)]
    assert seen == pytest.approx(closed, rel=1e-12)


def test_rescorla_wagner_blocking_numbers():
    # Rescorla & Wagner (1972) blocking, alpha beta = 0.3, lambda = 1 (CHECKS.md):
    # 10 A+ then 10 AB+ -> V_B = 0.01412; 10 AB+ alone -> V_A = V_B = 0.49995.
    params = {"alpha": 0.6, "beta": 0.5, "slope": 1.0, "bias": 0.0}
    pretrained = rw_session(params, [[1, 0]] * 10 + [[1, 1]] * 10, [1.0] * 20)
    assert pretrained["v_after"][1] == pytest.approx(0.01412, abs=5e-6)
    control = rw_session(params, [[1, 1]] * 10, [1.0] * 10)
    assert control["v_after"] == pytest.approx([0.49995, 0.49995], abs=5e-6)


def test_rescorla_wagner_absent_cs_and_extinction():
    # An absent CS is not updated; a non-reinforced trial (lambda = 0) moves V towards 0
    # by alpha beta of the error (Rescorla & Wagner 1972).
    v = rw_update(np.array([0.8, 0.3]), [1, 0], 0.5, 0.4, 0.0)
    assert v == pytest.approx([0.8 - 0.2 * 0.8, 0.3])


def test_anticipatory_responding_is_logistic_in_summed_strength():
    # logistic mapping (scipy.special.expit as the reference)
    v = np.array([[0.2, 0.5], [0.9, 0.0]])
    present = np.array([[1, 1], [1, 0]])
    got = response_probability(v, present, slope=4.0, bias=-2.0)
    assert got == pytest.approx(expit(-2.0 + 4.0 * np.array([0.7, 0.9])), rel=1e-12)


def test_anticipatory_responding_log_likelihood_is_bernoulli():
    # each trial a Bernoulli draw with the model's P(response) (scipy.stats.bernoulli)
    params = {"alpha": 0.4, "beta": 0.5, "slope": 6.0, "bias": -2.5}
    present = [[1]] * 12
    lam = [1.0] * 8 + [0.0] * 4  # acquisition, then extinction
    responded = [0, 0, 1, 0, 1, 1, 1, 1, 1, 0, 1, 0]
    p = rw_session(params, present, lam)["p_response"]
    expected = stats.bernoulli.logpmf(responded, p).sum()
    assert rw_loglik(params, present, lam, responded) == pytest.approx(expected, rel=1e-12)


def test_rescorla_wagner_declares_valid_parameters():
    with pytest.raises(ValueError, match=r"^rescorla_wagner: beta must be a number in "):
        RESCORLA_WAGNER.check({"alpha": 0.5, "beta": 1.5, "slope": 1.0, "bias": 0.0})


# ---------------------------------------------------------------- temporal difference


def test_td0_single_episode_changes_only_the_last_state():
    # Sutton & Barto (2018), Example 6.2: V0 = 0.5, alpha = 0.1, episode C -> B -> A ->
    # exit left (reward 0) changes only V(A), to 0.45.
    v = np.full(5, 0.5)
    td0_episode(v, [2, 1, 0], [0.0, 0.0, 0.0], alpha=0.1)
    assert v == pytest.approx([0.45, 0.5, 0.5, 0.5, 0.5], abs=1e-15)


def test_td0_random_walk_converges_to_true_values():
    # Sutton & Barto (2018), Example 6.2: true values 1/6 .. 5/6. A small step size and
    # many episodes bring the estimate close (RMS error well under 0.05).
    v = random_walk_td0(3000, alpha=0.01, rng=np.random.default_rng(62))
    truth = np.arange(1, 6) / 6
    assert math.sqrt(np.mean((v - truth) ** 2)) < 0.04
    assert np.all(np.diff(v) > 0)


def test_sarsa_and_q_learning_targets():
    # Sutton & Barto (2018), ch. 6 (CHECKS.md): Q = 0.2, R = 1, gamma = 0.9, alpha = 0.1,
    # Q(S') = {x 0.5, y 0.9}, A' = x -> SARSA 0.325, Q-learning 0.361.
    assert td_step(0.2, sarsa_target(1.0, 0.9, 0.5), 0.1) == pytest.approx(0.325, abs=1e-12)
    q_next = np.array([0.5, 0.9])
    assert td_step(0.2, q_learning_target(1.0, 0.9, q_next), 0.1) == pytest.approx(0.361, abs=1e-12)


def test_q_learning_update_is_the_one_state_td_step():
    # the bandit update is TD with target r and no successor (Sutton & Barto 2018, ch. 2)
    m = CHOICE_MODELS["q_learning"]
    q = np.array([[0.2], [0.7]])
    new, delta = m.learn({"alpha": 0.1}, q, np.array([[1.0], [0.0]]), 1.0)
    assert new[:, 0] == pytest.approx([td_step(0.2, 1.0, 0.1), 0.7])
    assert delta == pytest.approx([0.8])


# ---------------------------------------------------------------- softmax


def test_softmax_worked_values_and_two_option_logistic():
    # Sutton & Barto (2018), eq. 2.11 (CHECKS.md): Q = (0.8, 0.2), beta = 3 ->
    # P = (0.858149, 0.141851) = 1 / (1 + e^-1.8).
    m = CHOICE_MODELS["q_learning"]
    q = np.array([0.8, 0.2])
    p = np.exp(log_softmax(m.drive({"beta": 3.0}, q, np.zeros(2))))
    assert p == pytest.approx([0.858149, 0.141851], abs=5e-7)
    assert p[0] == pytest.approx(1 / (1 + math.exp(-1.8)), rel=1e-12)


def test_softmax_matches_scipy_and_ignores_a_common_shift():
    rng = np.random.default_rng(5)
    q = rng.normal(size=(4, 7))  # 4 options, 7 grid points
    beta = rng.uniform(0.5, 20, size=7)
    logits = beta * q
    # scipy.special.softmax over the option axis as the reference
    assert np.exp(log_softmax(logits)) == pytest.approx(softmax(logits, axis=0), rel=1e-12)
    assert log_softmax(beta * (q + 3.0)) == pytest.approx(log_softmax(logits), abs=1e-12)
    # large logits do not overflow
    assert np.isfinite(log_softmax(np.array([[900.0], [0.0]]))).all()
