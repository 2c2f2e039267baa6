"""The hybrid model (server/models/two_stage.py) through the particle estimator's kernel.

Its per-trial log-probabilities are checked against the stand-in hybrid kernel of
tests/models/hybrid_standin.py, written apart from it from the same paper (Daw et al. 2011),
with the parameters mapped (one learning rate for both stages; the stand-in's
perseveration is in logit units, the model's in units of beta1).
"""

from __future__ import annotations

import numpy as np
from hybrid_standin import COMMON, HybridStandIn, simulate

from server.engine.records import SecondStage
from server.models.kernels import KernelTrial, get_kernel
from server.models.online import make_online_estimator

TASK = {
    "first": ["L", "R"],
    "states": {"A": ["x", "y"], "B": ["x2", "y2"]},
    "transitions": {"L": {"A": COMMON, "B": 1 - COMMON}, "R": {"A": 1 - COMMON, "B": COMMON}},
}
SECONDS = ["x", "y", "x2", "y2"]


def test_the_adapted_hybrid_gives_the_stand_in_likelihood():
    kernel = get_kernel("hybrid", task=TASK)
    standin = HybridStandIn()
    n = 4
    rng = np.random.default_rng(2)
    mine = {"w": rng.uniform(0, 1, n), "alpha": rng.uniform(0.1, 0.9, n), "beta1": rng.uniform(1, 6, n),
            "beta2": rng.uniform(1, 6, n), "lam": rng.uniform(0, 1, n), "persev": rng.uniform(-1, 1, n)}  # fmt: skip
    theirs = {"alpha1": mine["alpha"], "alpha2": mine["alpha"], "lambda": mine["lam"], "beta1": mine["beta1"],
              "beta2": mine["beta2"], "w": mine["w"], "persev": mine["persev"] / mine["beta1"]}  # fmt: skip
    a, b = kernel.start(n, 2), standin.start(n, 2)
    total_a, total_b = np.zeros(n), np.zeros(n)
    for a1, s, common, a2, r in simulate({k: float(v[0]) for k, v in mine.items()}, 200, seed=9):
        la, a = kernel.step(theirs, a, KernelTrial(a1, r, 2, s, common, 2 * s + a2))
        lb, b = standin.step(mine, b, KernelTrial(a1, r, 2, s, common, a2))
        total_a += la
        total_b += lb
    assert np.allclose(total_a, total_b, atol=1e-9)


def test_the_lab_estimator_runs_the_hybrid_from_a_protocol_like_config():
    est = make_online_estimator("hybrid", ["L", "R"], states=["A", "B"], second_options=SECONDS, task=TASK,
                                particles=256, seed=1)  # fmt: skip
    truth = {"w": 0.8, "alpha": 0.5, "beta1": 5.0, "beta2": 5.0, "lam": 0.5, "persev": 0.0}
    for a1, s, common, a2, r in simulate(truth, 200, seed=4):
        e = est.update("LR"[a1], r, second=SecondStage("AB"[s], bool(common), SECONDS[2 * s + a2]))
    assert e.model == "hybrid" and set(e.params) == {"alpha1", "alpha2", "lambda", "beta1", "beta2", "w", "persev"}
    assert e.params["w"].low < e.params["w"].mean < e.params["w"].high
    restored = type(est).from_state(est.state_dict())
    assert restored.estimate().to_dict() == e.to_dict()


def test_single_response_and_missed_second_stages_are_encoded_as_the_fit_encodes_them():
    # A five-port task: each state offers one port, so the second stage is a single response.
    # The estimator's kernel must read such a trial as the offline fit does
    # (TwoStageTask.encode): answered -> its one slot learns from the outcome; missed -> no slot.
    from server.models.kernels import ANSWERED, MISSED
    from server.models.two_stage import TwoStageTask

    task = {
        "first": ["west", "east"],
        "states": {"north": ["north_port"], "south": ["south_port"]},
        "transitions": {"west": {"north": 0.8, "south": 0.2}, "east": {"north": 0.2, "south": 0.8}},
    }
    kernel = get_kernel("hybrid", task=task)
    fit_task = TwoStageTask.build(task["first"], task["states"], task["transitions"])
    cases = [
        (KernelTrial(0, 1.0, 2, 0, 1, ANSWERED), fit_task.encode("west", "north", None, 1.0)),
        (KernelTrial(1, 0.0, 2, 0, 0, ANSWERED), fit_task.encode("east", "north", None, 0.0)),
        (KernelTrial(0, 0.0, 2, 1, 0, MISSED), fit_task.encode("west", "south", None, 0.0, omitted2=True)),
    ]
    for trial, encoded in cases:
        arrays = kernel._arrays(trial)
        assert np.array_equal(arrays.second[:, 0], encoded.second)
        assert np.array_equal(arrays.offered[:, 0], encoded.offered)


def test_the_estimator_learns_from_single_response_second_stages():
    # After rewarded single responses at one state only, that state's second-stage value must
    # have moved away from its start in every particle (it did not when they read as missed).
    est = make_online_estimator(
        "hybrid", ["west", "east"], states=["north", "south"], second_options=["north_port", "south_port"],
        task={"first": ["west", "east"], "states": {"north": ["north_port"], "south": ["south_port"]},
              "transitions": {"west": {"north": 0.8, "south": 0.2}, "east": {"north": 0.2, "south": 0.8}}},
        particles=64, seed=3,
    )  # fmt: skip
    before = est.estimate()
    for _ in range(30):
        est.update("west", 1.0, second=SecondStage("north", True, None, "poke_north", 0.5))
    after = est.estimate()
    # The animal keeps choosing west and is paid: the choice probability of west must rise.
    assert after.p_choice["west"] > before.p_choice["west"] + 0.2
