"""The compiled hybrid update (server/models/compiled_hybrid.py) against the numpy reference.

The reference is `two_stage.hybrid_step`, the update the offline fit runs (itself checked
against hand-computed values and an independently written likelihood in test_two_stage.py).
Every case a trial can take is covered: a two-option second stage, a single-response state, a
three-option state, a missed second stage, a first-stage omission, and three first-stage
options; the values after each trial and each trial's log-probability must agree.
"""

from __future__ import annotations

import numpy as np
import pytest

from server.models import compiled_hybrid
from server.models.kernels import ANSWERED, MISSED, KernelTrial, get_kernel, replay

TWO_BY_TWO = {
    "first": ["L", "R"],
    "states": {"A": ["x", "y"], "B": ["u", "v"]},
    "transitions": {"L": {"A": 0.7, "B": 0.3}, "R": {"A": 0.3, "B": 0.7}},
}
FIVE_PORT = {  # each state a single lit port: the second stage is one response
    "first": ["L", "R"],
    "states": {"A": [], "B": []},
    "transitions": {"L": {"A": 0.8, "B": 0.2}, "R": {"A": 0.2, "B": 0.8}},
}
HALF = {  # one state with a choice, one with a single response
    "first": ["L", "R"],
    "states": {"A": ["x", "y"], "B": []},
    "transitions": {"L": {"A": 0.75, "B": 0.25}, "R": {"A": 0.25, "B": 0.75}},
}
MIXED = {  # three first options; a single-response state, a two-option and a three-option one
    "first": ["L", "M", "R"],
    "states": {"A": [], "B": ["u", "v"], "C": ["p", "q", "r"]},
    "transitions": {"L": {"A": 0.8, "B": 0.1, "C": 0.1}, "M": {"A": 0.1, "B": 0.8, "C": 0.1},
                    "R": {"A": 0.2, "B": 0.2, "C": 0.6}},
}  # fmt: skip


def random_trials(task: dict, n: int, seed: int) -> list[KernelTrial]:
    rng = np.random.default_rng(seed)
    states = list(task["states"])
    labels = [o for s in states for o in task["states"][s]]
    out = []
    for _ in range(n):
        roll = rng.random()
        if roll < 0.05:
            out.append(KernelTrial(-1, 0.0, len(task["first"])))  # first-stage omission
            continue
        c = int(rng.integers(len(task["first"])))
        s = int(rng.integers(len(states)))
        opts = task["states"][states[s]]
        if roll < 0.12:
            c2 = MISSED
        elif not opts:
            c2 = ANSWERED
        else:
            c2 = labels.index(opts[int(rng.integers(len(opts)))])
        out.append(KernelTrial(c, float(rng.random() < 0.5), len(task["first"]), s, int(rng.random() < 0.7), c2))
    return out


def random_theta(kernel, n: int, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {p.name: p.from_unit(rng.uniform(0.02, 0.98, n)) for p in kernel.params}


@pytest.mark.parametrize("task", [TWO_BY_TWO, FIVE_PORT, HALF, MIXED], ids=["two-by-two", "five-port", "half", "mixed"])
@pytest.mark.parametrize("model", ["hybrid", "model_free", "model_based"])
def test_the_compiled_update_gives_the_reference_trial_by_trial(task, model):
    kernel = get_kernel(model, q0=0.25, task=task)
    n = 64
    theta = random_theta(kernel, n, 3)
    mine = theirs = kernel.start(n, len(task["first"]))
    for trial in random_trials(task, 300, 5):
        lp_mine, mine = kernel.step(theta, mine, trial)
        lp_ref, theirs = kernel.reference_step(theta, theirs, trial)
        np.testing.assert_allclose(lp_mine, lp_ref, rtol=1e-10, atol=1e-12)
        for a, b in zip(mine, theirs):
            np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-12)


def test_a_stretch_in_one_call_is_the_trials_one_by_one_and_leaves_its_inputs_alone():
    kernel = get_kernel("hybrid", task=MIXED)
    n = 32
    theta = random_theta(kernel, n, 7)
    start = kernel.start(n, 3)
    kept = [v.copy() for v in start]
    trials = random_trials(MIXED, 120, 8)
    ll, values = replay(kernel, theta, start, trials, weight=0.25)
    one, step_values = np.zeros(n), start
    for trial in trials:
        lp, step_values = kernel.reference_step(theta, step_values, trial)
        one += 0.25 * lp
    np.testing.assert_allclose(ll, one, rtol=1e-10)
    for a, b in zip(values, step_values):
        np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-12)
    for a, b in zip(start, kept):
        assert np.array_equal(a, b)


@pytest.mark.parametrize("task", [TWO_BY_TWO, FIVE_PORT, HALF], ids=["two-by-two", "five-port", "half"])
def test_the_two_by_two_kernel_is_the_general_one_on_its_shapes(task):
    kernel = get_kernel("hybrid", task=task)
    assert kernel._run is compiled_hybrid.hybrid_trials_2x2
    n = 16
    theta = compiled_hybrid.pack_theta(kernel.model.theta(random_theta(kernel, n, 11)), n)
    trials = random_trials(task, 200, 12)
    arrays = [np.array([getattr(t, f) for t in trials]) for f in ("choice", "state")]
    slot = np.array([kernel._slot(t) if t.choice >= 0 else -1 for t in trials])
    reward = np.array([t.reward for t in trials])
    out = []
    for run in (compiled_hybrid.hybrid_trials, compiled_hybrid.hybrid_trials_2x2):
        q1, q2, prev = (np.array(v) for v in kernel.start(n, 2))
        ll = np.zeros(n)
        run(theta, q1, q2, prev, kernel._transitions, kernel._n_slots, *arrays, slot, reward, 1.0, ll)
        out.append((ll, q1, q2, prev))
    for a, b in zip(*out):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-14)


def test_extreme_inverse_temperatures_stay_finite():
    # beta 50 with values far apart: the two-way softmax must not overflow (log P -> the gap)
    kernel = get_kernel("hybrid", task=TWO_BY_TWO)
    theta = {p.name: np.full(2, p.high if p.name.startswith("beta") else 0.5) for p in kernel.params}
    theta["w"] = np.array([0.0, 1.0])
    values = kernel.start(2, 2)
    trials = [KernelTrial(0, 1.0, 2, 0, 1, 0)] * 40 + [KernelTrial(1, 0.0, 2, 1, 1, 3)] * 3
    ll, _ = replay(kernel, theta, values, trials)
    ref = np.zeros(2)
    v = values
    for t in trials:
        lp, v = kernel.reference_step(theta, v, t)
        ref += lp
    assert np.all(np.isfinite(ll))
    np.testing.assert_allclose(ll, ref, rtol=1e-9)
