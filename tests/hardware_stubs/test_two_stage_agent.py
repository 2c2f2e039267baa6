"""The two-stage virtual animal on an emulated nose-poke box, against textbook behaviour.

The task is run by a loop written here (not the session core): two lit side ports, a
transition (0.8 common / 0.2 rare) to one of two further ports, a pellet with a probability
per state that drifts as a Gaussian walk (sd 0.025, reflected in [0.25, 0.75]; Daw et al.
2011). The stay analysis is the classic one (Daw et al. 2011, Neuron 69:1204, Fig. 2):
P(repeat the first choice) after rewarded/unrewarded x common/rare trials, and its logistic
regression stay ~ reward x transition (statsmodels Logit as the reference fitter). A
model-free animal shows a main effect of reward and no interaction; a model-based one the
reward x transition interaction.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from hardware_stubs.agents import AgentError, make_agent
from hardware_stubs.emulated_box import EmulatedBox
from server.engine.records import PulseOutput, SetOutput
from server.protocol.wiring import InputLine, OutputLine, Wiring

PORTS = {"poke_left": 1, "poke_right": 2, "poke_up": 3, "poke_down": 4}
COMMON = {"poke_left": "poke_up", "poke_right": "poke_down"}
OTHER = {"poke_up": "poke_down", "poke_down": "poke_up"}


def nose_poke_wiring() -> Wiring:
    """A box of our own: four ports with a cue light each, a feeder and a magazine."""
    outputs = [OutputLine(f"light_{p[5:]}", "cue_light", c) for p, c in PORTS.items()]
    outputs.append(OutputLine("feeder", "feeder", 9, pulse_ms=40))
    inputs = [InputLine(p, "nose_poke", c, presented_by=f"light_{p[5:]}") for p, c in PORTS.items()]
    inputs.append(InputLine("magazine", "head_entry", 9))
    return Wiring({o.name: o for o in outputs}, {i.name: i for i in inputs})


def run_task(agent_options: dict, trials: int, seed: int) -> list[tuple[str, bool, bool]]:
    """(first choice, common transition, rewarded) per completed trial."""
    rng = np.random.default_rng(seed)
    wiring = nose_poke_wiring()
    box = EmulatedBox(wiring, make_agent("two_stage_learner", **agent_options), np.random.default_rng(seed + 1))
    p_reward = {"poke_up": rng.uniform(0.25, 0.75), "poke_down": rng.uniform(0.25, 0.75)}
    t, out = 1.0, []

    def light(ports, on, at):
        for port in ports:
            line = wiring.outputs[f"light_{port[5:]}"]
            box.apply(SetOutput(line.name, line.channel, on), at)

    def wait_for(ports, start, window=20.0):
        while (when := box.next_time()) <= start + window:
            for w, e in box.pop_due(when):
                if e.rising and e.name in ports:
                    return e.name, w
        return None, start + window

    def drain(until):
        while (when := box.next_time()) <= until:
            box.pop_due(when)

    for _ in range(trials):
        light(("poke_left", "poke_right"), True, t)
        first, t = wait_for(("poke_left", "poke_right"), t)
        light(("poke_left", "poke_right"), False, t)
        if first is None:
            continue
        common = rng.random() < 0.8
        state = COMMON[first] if common else OTHER[COMMON[first]]
        light((state,), True, t)
        answer, t = wait_for((state,), t)
        light((state,), False, t)
        rewarded = answer is not None and rng.random() < p_reward[state]
        if rewarded:
            box.apply(PulseOutput("feeder", 9, 40), t)
        if answer is not None:
            out.append((first, common, rewarded))
        for s in p_reward:  # reflected Gaussian walk of each state's reward probability
            x = p_reward[s] + 0.025 * rng.standard_normal()
            p_reward[s] = 1.5 - x if x > 0.75 else 0.5 - x if x < 0.25 else x
        t += 4.0
        drain(t)
    return out


def stay_analysis(trials: list[tuple[str, bool, bool]]):
    """Stay probabilities per (rewarded, common) and Logit stay ~ reward * transition (+/-1 codes)."""
    prev, this = trials[:-1], trials[1:]
    stay = np.array([a[0] == b[0] for a, b in zip(prev, this)], dtype=float)
    reward = np.array([1.0 if a[2] else -1.0 for a in prev])
    common = np.array([1.0 if a[1] else -1.0 for a in prev])
    p = {(r, c): stay[(reward == r) & (common == c)].mean() for r in (1.0, -1.0) for c in (1.0, -1.0)}
    x = sm.add_constant(np.column_stack([reward, common, reward * common]))
    fit = sm.Logit(stay, x).fit(disp=0)
    return p, fit.params, fit.bse


FAST = {"latency_s": 0.5, "omission": 0.0, "satiety": 0.0, "check_every_s": 0.0, "beta1": 5.0, "beta2": 5.0}


def test_a_model_free_animal_repeats_after_reward_whatever_the_transition():
    p, coef, se = stay_analysis(run_task({**FAST, "w": 0.0, "alpha": 0.5, "lam": 1.0}, 1500, seed=3))
    assert coef[1] > 4 * se[1]  # main effect of reward
    assert abs(coef[3]) < 3 * se[3]  # no reward x transition interaction
    assert p[(1.0, -1.0)] > p[(-1.0, -1.0)]  # rewarded after a rare transition: still stays more


def test_a_model_based_animal_shows_the_reward_by_transition_interaction():
    p, coef, se = stay_analysis(run_task({**FAST, "w": 1.0, "alpha": 0.5, "lam": 1.0}, 1500, seed=4))
    assert coef[3] > 4 * se[3]  # the interaction
    assert p[(1.0, 1.0)] > p[(1.0, -1.0)]  # rewarded: stays after common, switches after rare
    assert p[(-1.0, -1.0)] > p[(-1.0, 1.0)]  # unrewarded: the reverse


def test_learned_values_carry_to_the_next_session():
    first = make_agent("two_stage_learner", **FAST)
    box = EmulatedBox(nose_poke_wiring(), first, np.random.default_rng(0))
    assert box.presented_operants == ()
    first.q1, first.q2 = {"poke_left": 0.4}, {"poke_up": {"poke_up": 0.7}}
    again = make_agent("two_stage_learner", **FAST)
    again.restore(first.learned_state())
    assert again.learned_state() == first.learned_state()
    assert again.first_probabilities(("poke_left", "poke_right"))[0] > 0.5


def test_options_are_checked():
    with pytest.raises(AgentError, match=r"trait 'w' of agent 'two_stage_learner' must be between 0 and 1"):
        make_agent("two_stage_learner", w=1.5)


def test_a_population_file_draws_its_options():
    from server.lab.population import read_population

    text = (
        "agent: two_stage_learner\ntraits:\n  w: {uniform: [0.0, 1.0]}\n  beta1: {lognormal: {median: 4, sigma: 0.3}}\n"
    )
    population = read_population(text, "cohort.yaml", "q_learner")
    drawn = [population.draw(np.random.default_rng(i)) for i in range(50)]
    assert {"w", "beta1"} == set(drawn[0])
    assert 0.0 <= min(d["w"] for d in drawn) < 0.2 and 0.8 < max(d["w"] for d in drawn) <= 1.0
    make_agent("two_stage_learner", **drawn[0])
