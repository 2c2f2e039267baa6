"""The model interface of the particle estimator: one call per trial over many parameter sets.

A `TrialKernel` is what `particles.ParticleEstimator` needs of a learning model:

- `params`: the declared parameters (`params.Param`: range, spacing, prior);
- `start(n, options)`: the learned values of n parameter sets at a session's start, a tuple
  of arrays whose LAST axis indexes the parameter sets (so resampling is one take per array);
- `step(theta, values, trial)`: one trial for every parameter set at once, returning each
  set's log-probability of what the animal did and the new values. `theta` maps parameter
  names to arrays of length n; `trial` is a `KernelTrial` (first-stage choice as an option
  index, reward, and for two-stage trials the state reached, the transition and the second
  choice); an omission has `choice = -1` and must leave the values as they were with log
  probability 0;
- `probabilities(theta, values, options)`: next-trial choice probabilities (options x n),
  for summaries and `p_choice_at_least`;
- optionally `replay(theta, values, trials, weight)`: a stretch of trials in one call (see
  `replay` below), where a kernel can do it faster than trial by trial.

`ChoiceKernel` adapts today's single-stage models (`choice.ChoiceModel`: learn + drive)
through it. A two-stage model whose trial update is already numpy over parameter sets adapts
in a few lines: a class with its `params`, a `start` returning its value arrays, and a `step`
that calls its update and returns (log p, values); register it in `KERNELS`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple, Protocol

import numpy as np

from .choice import CHOICE_MODELS, ChoiceModel, get_choice_model
from .params import Param

Values = tuple[np.ndarray, ...]


class KernelTrial(NamedTuple):
    """One finished trial as the kernels read it (indices, not labels)."""

    choice: int  # first-stage option index, -1 for an omission
    reward: float
    options: int  # how many options were known when the trial was made
    state: int = -1  # second-stage state index (-1: single-stage trial)
    common: int = -1  # 1 common transition, 0 rare, -1 single-stage
    # second-stage option index; ANSWERED (-1): a single response was made, no option to choose
    # between; MISSED (-2): the second-stage window ran out (nothing is learned from it)
    choice2: int = -1


ANSWERED, MISSED = -1, -2


class TrialKernel(Protocol):
    @property
    def name(self) -> str: ...
    @property
    def params(self) -> tuple[Param, ...]: ...
    def start(self, n: int, options: int) -> Values: ...
    def grow(self, values: Values, options: int) -> Values: ...
    def step(
        self, theta: Mapping[str, np.ndarray], values: Values, trial: KernelTrial
    ) -> tuple[np.ndarray, Values]: ...
    def probabilities(self, theta: Mapping[str, np.ndarray], values: Values, options: int) -> np.ndarray: ...
    def option_values(self, values: Values, options: int) -> np.ndarray: ...


@dataclass(frozen=True)
class ChoiceKernel:
    """A single-stage choice model as a kernel: values (options x n) and the previous choice
    (one-hot, options x n), both through the model's own `learn` and `drive`."""

    model: ChoiceModel
    q0: float = 0.0

    @property
    def name(self) -> str:
        return self.model.name

    @property
    def params(self) -> tuple[Param, ...]:
        return self.model.params

    def start(self, n: int, options: int) -> Values:
        return np.full((options, n), self.q0), np.zeros((options, n))

    def grow(self, values: Values, options: int) -> Values:
        q, prev = values
        extra = options - q.shape[0]
        if extra <= 0:
            return values
        n = q.shape[1]
        return np.concatenate([q, np.full((extra, n), self.q0)]), np.concatenate([prev, np.zeros((extra, n))])

    def _logits(self, theta: Mapping[str, np.ndarray], values: Values, options: int) -> np.ndarray:
        q, prev = values
        return self.model.drive(theta, q[:options], prev[:options])

    def step(self, theta: Mapping[str, np.ndarray], values: Values, trial: KernelTrial) -> tuple[np.ndarray, Values]:
        q, prev = values
        if trial.choice < 0:
            return np.zeros(q.shape[1]), values
        logits = self._logits(theta, values, trial.options)
        top = logits.max(0)
        logp = logits[trial.choice] - top - np.log(np.exp(logits - top).sum(0))
        chosen = np.zeros((q.shape[0], 1))
        chosen[trial.choice] = 1.0
        q_new, _ = self.model.learn(theta, q, chosen, trial.reward)
        return logp, (q_new, np.broadcast_to(chosen, q.shape).copy())

    def probabilities(self, theta: Mapping[str, np.ndarray], values: Values, options: int) -> np.ndarray:
        logits = self._logits(theta, values, options)
        e = np.exp(logits - logits.max(0))
        return e / e.sum(0)

    def option_values(self, values: Values, options: int) -> np.ndarray:
        return values[0][:options]


def replay(
    kernel: TrialKernel, theta: Mapping[str, np.ndarray], values: Values, trials: Sequence[KernelTrial],
    weight: float = 1.0,
) -> tuple[np.ndarray, Values]:  # fmt: skip
    """Run a stretch of trials for every parameter set: (weight x summed log P, new values).

    A kernel with a `replay` of its own (a compiled loop over trials) runs the stretch in one
    call; any other steps through it trial by trial."""
    own = getattr(kernel, "replay", None)
    if own is not None:
        return own(theta, values, trials, weight)
    ll = np.zeros(values[0].shape[-1])
    for trial in trials:
        if trial.choice >= 0:
            logp, values = kernel.step(theta, values, trial)
            ll += weight * logp
    return ll, values


# The models the particle estimator offers, by name. A two-stage model whose kernel depends
# on the task's structure registers a factory instead: it gets the estimator's `task` (plain
# JSON, kept in the estimator's state: first-stage options, states with their options,
# transition probabilities), so a stored state rebuilds the same kernel.
KERNELS: dict[str, TrialKernel] = {name: ChoiceKernel(model) for name, model in CHOICE_MODELS.items()}
KERNEL_FACTORIES: dict[str, Callable[[Mapping[str, Any] | None, float], TrialKernel]] = {}


def get_kernel(name: str, q0: float = 0.0, task: Mapping[str, Any] | None = None) -> TrialKernel:
    """The kernel of a model by name (a did-you-mean on a typo, as for choice models)."""
    if name in CHOICE_MODELS:
        return ChoiceKernel(CHOICE_MODELS[name], q0)
    from . import kernels_two_stage  # noqa: F401  (registers the two-stage factories; imports this module)

    if name in KERNEL_FACTORIES:
        return KERNEL_FACTORIES[name](task, q0)
    if name in KERNELS:
        return KERNELS[name]
    get_choice_model(name)  # raises the usual unknown-model message
    raise AssertionError(name)
