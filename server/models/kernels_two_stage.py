"""The hybrid model-based/model-free learner (two_stage.py) as a particle-estimator kernel.

`hybrid_step` is already one call per trial over parameter sets, so the adapter only builds
the task from the estimator's `task` data, turns a `KernelTrial`'s indices into the step's
one-hot arrays (the estimator's states and second options are in the task's order), and
fills in a variant's fixed parameters.
"""

from __future__ import annotations

from collections.abc import Mapping
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

    def step(self, theta: Mapping[str, np.ndarray], values: Values, trial: KernelTrial) -> tuple[np.ndarray, Values]:
        if trial.choice < 0:
            return np.zeros(values[0].shape[-1]), values
        out = hybrid_step(self.model.theta(theta), HybridValues(*values), self.task, self._arrays(trial), self._valid)
        return out.logp, tuple(out.values)

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
        return HybridKernel(TWO_STAGE_MODELS[name], structure, q0)

    return build


for _name in TWO_STAGE_MODELS:
    KERNEL_FACTORIES[_name] = _factory(_name)
