"""The hybrid model-based/model-free learner (two_stage.py) as a particle-estimator kernel.

The trial update runs compiled (`compiled_hybrid.hybrid_trials`, checked against the numpy
`hybrid_step` that the offline fit runs): the adapter builds the task from the estimator's
`task` data, turns `KernelTrial`s into the kernel's index arrays (the estimator's states and
second options are in the task's order), and fills in a variant's fixed parameters. `replay`
runs a stretch of stored trials in one call, which is what the estimator's moves spend their
time on.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .kernels import ANSWERED, KERNEL_FACTORIES, KernelTrial, Values
from .params import Param
from .two_stage import (
    TWO_STAGE_MODELS,
    HybridValues,
    TrialArrays,
    TwoStageModel,
    TwoStageTask,
    hybrid_step,
    initial_values,
    model_based_values,
)


class HybridKernel:
    def __init__(self, model: TwoStageModel, task: TwoStageTask, q0: float = 0.0):
        self.model, self.task, self.q0 = model, task, q0
        self._second_labels = [o for opts in task.options for o in opts]
        self._valid = task.valid
        self._transitions = np.ascontiguousarray(task.transitions, dtype=float)
        self._n_slots = np.array([max(1, len(o)) for o in task.options], dtype=np.int64)
        self._packs: dict[int, tuple[Mapping[str, np.ndarray], np.ndarray]] = {}
        # imported here, not at the top: numba's import costs about a second, which only a
        # process that estimates a two-stage model should pay
        from . import compiled_hybrid

        self._pack = compiled_hybrid.pack_theta
        self._run = compiled_hybrid.kernel_for(len(task.first), self._n_slots)
        self.replay({p.name: np.full(1, p.low) for p in self.params}, self.start(1, 0),
                    (KernelTrial(0, 0.0, 1, 0, 1, ANSWERED),))  # fmt: skip
        # ^ the first call loads the machine code (compiles it in a fresh install): here, when
        # the lab builds its sessions, not on a box's first trial

    @property
    def name(self) -> str:
        return self.model.name

    @property
    def params(self) -> tuple[Param, ...]:
        return self.model.params

    def start(self, n: int, options: int) -> Values:
        return tuple(initial_values(self.task, (n,), self.q0))

    def grow(self, values: Values, options: int) -> Values:
        return values

    def _arrays(self, trial: KernelTrial) -> TrialArrays:
        task = self.task
        first, reached = np.zeros((len(task.first), 1)), np.zeros((len(task.states), 1))
        offered, second = np.zeros((task.slots, 1)), np.zeros((task.slots, 1))
        if trial.choice >= 0:
            first[trial.choice] = 1.0
            reached[trial.state] = 1.0
            opts = task.options[trial.state]
            offered[: max(1, len(opts)), 0] = 1.0
            # as TwoStageTask.encode: a chosen option, a single response (slot 0), or a
            # missed second stage (no slot: its values learn nothing)
            if trial.choice2 >= 0:
                second[opts.index(self._second_labels[trial.choice2]) if opts else 0] = 1.0
            elif trial.choice2 == ANSWERED:
                second[0] = 1.0
        return TrialArrays(first, reached, offered, second, np.full((1,), trial.reward))

    def reference_step(
        self, theta: Mapping[str, np.ndarray], values: Values, trial: KernelTrial
    ) -> tuple[np.ndarray, Values]:
        """The same trial through the numpy reference (`hybrid_step`): for the tests."""
        if trial.choice < 0:
            return np.zeros(values[0].shape[-1]), values
        out = hybrid_step(self.model.theta(theta), HybridValues(*values), self.task, self._arrays(trial), self._valid)
        return out.logp, tuple(out.values)

    def _slot(self, trial: KernelTrial) -> int:
        """The option slot taken at the second stage; -1 for a missed one (nothing learned)."""
        if trial.choice2 >= 0:
            opts = self.task.options[trial.state]
            return opts.index(self._second_labels[trial.choice2]) if opts else 0
        return 0 if trial.choice2 == ANSWERED else -1

    def _packed(self, theta: Mapping[str, np.ndarray], n: int) -> np.ndarray:
        """theta as the compiled kernel's rows; the estimator passes the same mapping until its
        particles move, so the last few packings are kept (with the mapping, so ids stay theirs)."""
        hit = self._packs.get(id(theta))
        if hit is not None and hit[0] is theta:
            return hit[1]
        rows = self._pack(self.model.theta(theta), n)
        if len(self._packs) >= 4:
            self._packs.pop(next(iter(self._packs)))
        self._packs[id(theta)] = (theta, rows)
        return rows

    def replay(
        self, theta: Mapping[str, np.ndarray], values: Values, trials: Sequence[KernelTrial], weight: float = 1.0
    ) -> tuple[np.ndarray, Values]:
        """Run `trials` in order for every parameter set: (weight x the summed log P, the new
        values). Omitted trials are skipped; the inputs are not changed."""
        q1, q2, prev = (np.array(v, dtype=float, order="C") for v in values)
        n = q1.shape[-1]
        ll = np.zeros(n)
        if trials:
            choice = np.fromiter((t.choice for t in trials), np.int64, len(trials))
            state = np.fromiter((t.state for t in trials), np.int64, len(trials))
            slot = np.fromiter((self._slot(t) if t.choice >= 0 else -1 for t in trials), np.int64, len(trials))
            reward = np.fromiter((t.reward for t in trials), float, len(trials))
            self._run(self._packed(theta, n), q1, q2, prev, self._transitions, self._n_slots, choice, state, slot,
                      reward, float(weight), ll)  # fmt: skip
        return ll, (q1, q2, prev)

    def step(self, theta: Mapping[str, np.ndarray], values: Values, trial: KernelTrial) -> tuple[np.ndarray, Values]:
        if trial.choice < 0:
            return np.zeros(values[0].shape[-1]), values
        return self.replay(theta, values, (trial,))

    def _logits(self, theta: Mapping[str, np.ndarray], values: Values) -> np.ndarray:
        q1, q2, prev = values
        full = self.model.theta(theta)
        w = full["w"]
        q_net = w * model_based_values(self.task, q2, self._valid) + (1.0 - w) * q1
        return full["beta1"] * (q_net + full["persev"] * prev)

    def probabilities(self, theta: Mapping[str, np.ndarray], values: Values, options: int) -> np.ndarray:
        z = self._logits(theta, values)
        e = np.exp(z - z.max(0))
        return e / e.sum(0)

    def option_values(self, values: Values, options: int) -> np.ndarray:
        return values[0][:options]  # the model-free first-stage values


def _factory(name: str):
    def build(task: Mapping[str, Any] | None, q0: float) -> HybridKernel:
        if task is None:
            raise ValueError(f"model {name!r} needs the two-stage task's structure")
        structure = TwoStageTask.build(task["first"], task["states"], task["transitions"])
        return HybridKernel(TWO_STAGE_MODELS[name].for_task(structure), structure, q0)

    return build


for _name in TWO_STAGE_MODELS:
    KERNEL_FACTORIES[_name] = _factory(_name)
