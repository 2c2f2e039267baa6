"""Signatures of the stay analysis on simulated learners (Daw et al. 2011, fig. 2): a
model-free learner repeats rewarded first-stage choices whatever the transition (main
effect of reward, no reward x transition interaction); a model-based learner repeats them
after common transitions and switches after rare ones (the interaction). The learners are
the independent simulator of two_stage_simulation.py, not server.models."""

from __future__ import annotations

from two_stage_simulation import simulate_two_stage

from server.engine.stay import stay_analysis


def _pooled(w, animals=8, trials=500):
    choices, common, rewarded, sessions = [], [], [], []
    p = dict(alpha1=0.5, alpha2=0.5, beta1=5.0, beta2=5.0, w=w, persev=0.0, **{"lambda": 1.0})
    for i in range(animals):
        for s, _, a, tr, _, _, r in simulate_two_stage(p, trials, seed=500 + i, session=f"rat{i}"):
            choices.append(a)
            common.append(None if tr is None else tr == "common")
            rewarded.append(r > 0)
            sessions.append(s)
    return stay_analysis(choices, common, rewarded, sessions)


def test_model_free_learner_shows_a_main_effect_of_reward_only():
    s = _pooled(w=0.0)
    reg = s.regression
    assert reg is not None and reg.converged
    assert reg["reward"].estimate > 0 and reg["reward"].p_value < 1e-6
    assert reg["reward:transition"].p_value > 0.01
    assert abs(reg["reward:transition"].estimate) < 0.25 * reg["reward"].estimate
    for common in (True, False):
        assert s.cell(True, common).p > s.cell(False, common).p


def test_model_based_learner_shows_the_reward_by_transition_interaction():
    s = _pooled(w=1.0)
    reg = s.regression
    assert reg is not None and reg.converged
    assert reg["reward:transition"].estimate > 0 and reg["reward:transition"].p_value < 1e-6
    assert abs(reg["reward"].estimate) < 0.5 * reg["reward:transition"].estimate
    assert s.cell(True, True).p > s.cell(True, False).p
    assert s.cell(False, False).p > s.cell(False, True).p
