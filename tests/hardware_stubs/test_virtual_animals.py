"""The agents' behaviour against published formulas and the trade's own numbers."""

from __future__ import annotations

import math

import numpy as np
import pytest
from box_trials import TrialLoop, new_box
from scipy import stats

from hardware_stubs.agents import make_agent
from server.engine.records import PulseOutput, SetOutput

QUIET = {"check_every_s": 0.0}  # no spontaneous magazine checks muddying a measurement


# ---------------------------------------------------------------- random responder


def test_random_responder_chooses_uniformly():
    box = new_box(make_agent("random", omission=0.0, **QUIET), seed=3)
    choices = [c for c, _ in TrialLoop(box, iti_s=5.0).run(400)]
    assert None not in choices
    west = choices.count("press_west")
    # Uniform over two presented levers: binomial with p = 1/2 (scipy.stats.binomtest).
    assert stats.binomtest(west, len(choices), 0.5).pvalue > 1e-3


def test_random_responder_latency_is_lognormal_and_omissions_match_their_rate():
    options = dict(omission=0.3, satiety=0.0, latency_s=1.0, latency_sigma=0.5, pause_s=1e5)
    box = new_box(make_agent("random", **options, **QUIET), seed=4)
    results = TrialLoop(box, window_s=10.0, iti_s=5.0).run(400)
    latencies = [lat for c, lat in results if c is not None]
    omitted = sum(c is None for c, _ in results)
    # P(no response in 10 s) = p_omit + (1 - p_omit) * P(latency > 10), lognormal tail from scipy.
    tail = stats.lognorm(s=0.5, scale=1.0).sf(10.0)
    assert stats.binomtest(omitted, len(results), 0.3 + 0.7 * tail).pvalue > 1e-3
    # Latency from presentation to press: lognormal with median 1 s (Kolmogorov-Smirnov).
    assert stats.kstest(latencies, stats.lognorm(s=0.5, scale=1.0).cdf).pvalue > 1e-3


def test_free_operant_responding_follows_the_inter_response_time_distribution():
    box = new_box(make_agent("random", omission=0.0, irt_s=2.0, irt_sigma=0.3, **QUIET), seed=5)
    loop = TrialLoop(box)
    box.apply(SetOutput("lever_west", 1, True), 0.0)
    loop.drain(1200.0)
    presses = [t for t, n, r in loop.log if n == "press_west" and r]
    irts = np.diff(presses)
    assert len(irts) > 400
    assert stats.kstest(irts, stats.lognorm(s=0.3, scale=2.0).cdf).pvalue > 1e-3


def test_fixed_ratio_gives_a_press_stream_with_pellet_collection():
    box = new_box(make_agent("q_learner", omission=0.0, satiety=0.0, **QUIET), seed=6)
    loop = TrialLoop(box)
    box.apply(SetOutput("lever_west", 1, True), 0.0)
    presses, pellets = 0, []
    while (t := box.next_time()) <= 600.0:
        for when, event in box.pop_due(t):
            loop.log.append((when, event.name, event.rising))
            if event.name == "press_west" and event.rising:
                presses += 1
                # FR 5: every fifth response reinforced (Ferster & Skinner 1957).
                if presses % 5 == 0:
                    box.apply(PulseOutput("pellet_feeder", 4, 40), when)
                    pellets.append(when)
    entries = [t for t, n, r in loop.log if n == "head_entry" and r]
    assert len(pellets) == presses // 5 >= 30
    # Every pellet is collected by a head entry within a few seconds...
    assert all(any(p < e < p + 10.0 for e in entries) for p in pellets[:-1])
    assert box.pellets_eaten >= box.pellets_delivered - 1
    # ...and responding resumes afterwards, all session long.
    per_minute = np.histogram([t for t, n, r in loop.log if n == "press_west" and r], bins=10, range=(0.0, 600.0))[0]
    assert per_minute.min() > 0


# ---------------------------------------------------------------- q-learner


def test_softmax_choice_probability_matches_the_worked_example():
    agent = make_agent("q_learner", beta=3.0)
    agent.values.update(press_west=0.8, press_east=0.2)
    # Sutton & Barto (2018) eq. 2.11; Q = (0.8, 0.2), beta = 3 -> 0.858149 = 1/(1 + e^-1.8).
    p_west, p_east = agent.choice_probabilities(("press_west", "press_east"))
    assert p_west == pytest.approx(0.858149, abs=1e-6)
    assert p_west == pytest.approx(1.0 / (1.0 + math.exp(-1.8)), rel=1e-12)
    assert p_west + p_east == pytest.approx(1.0)
    # Adding a constant to every Q leaves the choice probabilities alone.
    agent.values.update(press_west=5.8, press_east=5.2)
    assert agent.choice_probabilities(("press_west", "press_east"))[0] == pytest.approx(p_west)


def test_q_learner_choice_frequencies_at_fixed_values_follow_softmax():
    agent = make_agent("q_learner", alpha=0.0, beta=3.0, omission=0.0, satiety=0.0, **QUIET)
    agent.values.update(press_west=0.8, press_east=0.2)  # alpha = 0 keeps them fixed
    box = new_box(agent, seed=8)
    choices = [c for c, _ in TrialLoop(box, iti_s=2.0).run(1500)]
    west = choices.count("press_west")
    # Softmax, Sutton & Barto (2018) eq. 2.11: P(west) = 0.858149; binomial test (scipy).
    assert stats.binomtest(west, len(choices), 0.858149).pvalue > 1e-3
    # The test has the power to tell softmax from probability matching (P = 0.8).
    assert stats.binomtest(west, len(choices), 0.8).pvalue < 1e-3


def test_q_update_follows_the_delta_rule():
    agent = make_agent("q_learner", alpha=0.3, omission=0.0, satiety=0.0, **QUIET)
    loop = TrialLoop(new_box(agent), presses=("press_west",), reward=lambda c, i: i < 2)
    seen = []
    for i in range(4):
        loop.trial(i)
        seen.append(agent.values.get("press_west", 0.0))
    # Q <- Q + alpha (r - Q), Q0 = 0 (Sutton & Barto 2018, eq. 2.5, from memory): rewards 1, 1, 0
    # give 0.3, 0.51, 0.357; the third trial's zero is only known when the next trial starts.
    assert seen[:2] == pytest.approx([0.3, 0.51])
    assert seen[3] == pytest.approx(0.357)


def test_q_learner_learns_a_two_armed_bandit():
    reward_rng = np.random.default_rng(99)
    # 0.8 / 0.2 reward odds, typical of reversal tasks (common practice).
    p_reward = {"press_west": 0.8, "press_east": 0.2}
    agent = make_agent("q_learner", alpha=0.3, beta=5.0, **QUIET)
    loop = TrialLoop(new_box(agent, seed=9), iti_s=5.0, reward=lambda c, i: reward_rng.random() < p_reward[c])
    choices = [c for c, _ in loop.run(300)]
    late = [c for c in choices[-100:] if c is not None]
    assert sum(c == "press_west" for c in late) / len(late) > 0.75
    assert agent.values["press_west"] > agent.values["press_east"]


def test_omissions_grow_with_satiety():
    agent = make_agent("q_learner", omission=0.0, satiety=0.004, pause_s=1e5, **QUIET)
    loop = TrialLoop(new_box(agent, seed=10), presses=("press_west",), iti_s=5.0, reward=lambda c, i: True)
    choices = [c for c, _ in loop.run(200)]
    early, late = choices[:50].count(None), choices[-50:].count(None)
    assert late >= 15 and late > 2 * early


# ---------------------------------------------------------------- pavlovian


def pca_index(lp, ce, p_lever, p_mag, lat_lever, lat_mag, cs_s=8.0):
    """Pavlovian conditioned approach index (Meyer et al. 2012): mean of three scores."""
    bias = (lp - ce) / (lp + ce) if lp + ce else 0.0
    return (bias + (p_lever - p_mag) + (lat_mag - lat_lever) / cs_s) / 3.0


def test_pca_index_helper_reproduces_the_published_examples():
    # Worked numbers from the PCA definition (Meyer et al. 2012, PLoS ONE 7:e38987).
    assert pca_index(90, 10, 0.96, 0.24, 1.5, 7.0) == pytest.approx(0.7358, abs=1e-4)
    assert pca_index(5, 45, 0.2, 0.9, 7.0, 2.5) == pytest.approx(-0.6875, abs=1e-4)


def autoshaping(agent, trials=50, seed=12):
    """Lever CS for 8 s, then retraction with one pellet; variable ITI (common practice).

    Returns per-trial (presses, entries, first press latency, first entry latency) during
    the CS; a latency is the CS length when there was no response.
    """
    box = new_box(agent, seed=seed)
    loop = TrialLoop(box, presses=("press_west",))
    iti = np.random.default_rng(seed + 1000)
    per_trial = []
    t = 30.0
    for _ in range(trials):
        loop.drain(t)
        box.apply(SetOutput("lever_west", 1, True), t)
        start = len(loop.log)
        loop.drain(t + 8.0)
        box.apply(SetOutput("lever_west", 1, False), t + 8.0)
        box.apply(PulseOutput("pellet_feeder", 4, 40), t + 8.0)
        during = [(w - t, n) for w, n, r in loop.log[start:] if r and w <= t + 8.0]
        lp = [w for w, n in during if n == "press_west"]
        ce = [w for w, n in during if n == "head_entry"]
        per_trial.append((len(lp), len(ce), min(lp, default=8.0), min(ce, default=8.0)))
        t += 8.0 + iti.uniform(30.0, 90.0)
    loop.drain(t)
    assert box.pellets_eaten == box.pellets_delivered == trials  # both kinds retrieve it
    return per_trial


def session_pca(per_trial):
    n = len(per_trial)
    lp = sum(x[0] for x in per_trial)
    ce = sum(x[1] for x in per_trial)
    p_lever = sum(x[0] > 0 for x in per_trial) / n
    p_mag = sum(x[1] > 0 for x in per_trial) / n
    lat_lever = sum(x[2] for x in per_trial) / n
    lat_mag = sum(x[3] for x in per_trial) / n
    return pca_index(lp, ce, p_lever, p_mag, lat_lever, lat_mag)


def test_sign_tracker_presses_the_lever_cs_and_goal_tracker_visits_the_magazine():
    sign = autoshaping(make_agent("pavlovian", tracking="sign"))
    goal = autoshaping(make_agent("pavlovian", tracking="goal"))
    # Second session's worth of trials (26-50): cut-offs +-0.5 from Meyer et al. (2012).
    assert session_pca(sign[25:]) >= 0.5
    assert session_pca(goal[25:]) <= -0.5
    assert sum(x[0] for x in sign[25:]) > 3 * sum(x[1] for x in sign[25:])
    assert sum(x[1] for x in goal[25:]) > 3 * sum(x[0] for x in goal[25:])
    # Acquisition: more lever presses, sooner, late in training than early.
    assert sum(x[0] for x in sign[:10]) < sum(x[0] for x in sign[-10:])
    assert np.mean([x[2] for x in sign[:10]]) > np.mean([x[2] for x in sign[-10:]])


def test_intermediate_animal_does_both():
    per_trial = autoshaping(make_agent("pavlovian", sign_bias=0.0))
    late = per_trial[25:]
    assert sum(x[0] for x in late) > 10 and sum(x[1] for x in late) > 10
    assert -0.5 < session_pca(late) < 0.5


def test_cs_association_follows_rescorla_wagner():
    agent = make_agent("pavlovian", tracking="sign", learning_rate=0.25)
    box = new_box(agent)
    loop = TrialLoop(box, presses=("press_west",))
    strengths = []
    for k in range(4):
        t = 20.0 + 30.0 * k
        loop.drain(t)
        box.apply(SetOutput("lever_west", 1, True), t)
        loop.drain(t + 8.0)
        box.apply(SetOutput("lever_west", 1, False), t + 8.0)
        box.apply(PulseOutput("pellet_feeder", 4, 40), t + 8.0)
        strengths.append(agent.v * 100.0)
    # Rescorla & Wagner (1972), one CS from V0 = 0 with alpha*beta = 0.25, lambda = 100:
    # 25, 43.75, 57.8125, 68.359375.
    assert strengths == pytest.approx([25.0, 43.75, 57.8125, 68.359375])
    # A CS with no pellet (extinction, lambda = 0) is counted when the next CS starts.
    for t in (200.0, 240.0):
        box.apply(SetOutput("lever_west", 1, True), t)
        box.apply(SetOutput("lever_west", 1, False), t + 8.0)
    assert agent.v * 100.0 == pytest.approx(68.359375 * 0.75)
    assert agent.cs_trials == 6
