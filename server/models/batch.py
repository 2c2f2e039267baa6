"""Log-likelihood of many candidate parameter sets at once, for many animals at once.

Python loops over trials once per batch, never once per candidate: each step updates the
values of every (animal, candidate) pair with the model's own `learn`. Values depend only
on the learning parameters, so a grid over the choice-rule parameters (beta, kappa) shares
one value history; the softmax part is then evaluated over all trials in one go.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from .choice import ChoiceModel, log_choice_probability
from .trials import TrialStack

_CHUNK_ELEMENTS = 1_500_000


@dataclass(frozen=True, slots=True)
class ValueSettings:
    """How values start: Q0 for every option, and whether they carry across sessions."""

    q0: float = 0.0
    carry_values: bool = False


def value_history(
    model: ChoiceModel,
    theta: Mapping[str, np.ndarray | float],
    stack: TrialStack,
    qshape: tuple[int, ...],
    values: ValueSettings = ValueSettings(),
    keep_delta: bool = False,
) -> tuple[np.ndarray, np.ndarray | None]:
    """Values before each trial, shape (K, T, N, *qshape), and optionally the TD errors.

    Learning parameters in `theta` must broadcast against (N, *qshape).
    """
    k, t_len, n = stack.shape
    ones = (1,) * len(qshape)
    chosen = stack.chosen.reshape(k, t_len, n, *ones)
    reward = stack.reward.reshape(t_len, n, *ones)
    start = stack.start.reshape(t_len, n, *ones)
    q = np.full((k, n, *qshape), values.q0)
    hist = np.empty((k, t_len, n, *qshape))
    deltas = np.zeros((t_len, n, *qshape)) if keep_delta else None
    reset = not values.carry_values
    learn = model.learn
    for t in range(t_len):
        if reset and stack.start_any[t]:
            q = np.where(start[t], values.q0, q)
        hist[:, t] = q
        if stack.chose_any[t]:
            q, delta = learn(theta, q, chosen[:, t], reward[t])
            if deltas is not None:
                deltas[t] = delta
    return hist, deltas


def loglik(
    model: ChoiceModel,
    theta: Mapping[str, np.ndarray | float],
    stack: TrialStack,
    qshape: tuple[int, ...],
    values: ValueSettings = ValueSettings(),
) -> np.ndarray:
    """Summed log-likelihood of the choices: broadcast shape of (N, *qshape) and theta."""
    hist, _ = value_history(model, theta, stack, qshape, values)
    return loglik_from_history(model, theta, stack, hist)


def loglik_from_history(
    model: ChoiceModel, theta: Mapping[str, np.ndarray | float], stack: TrialStack, hist: np.ndarray
) -> np.ndarray:
    k, t_len, n = stack.shape
    ones = (1,) * (hist.ndim - 3)
    chosen = stack.chosen.reshape(k, t_len, n, *ones)
    previous = stack.previous.reshape(k, t_len, n, *ones)
    full = np.broadcast_shapes(hist.shape[2:], *(np.shape(v) for v in theta.values()))
    per_trial = max(1, int(np.prod(full)) * k)
    step = max(1, _CHUNK_ELEMENTS // per_trial)
    total = np.zeros(full)
    for t0 in range(0, t_len, step):
        sl = slice(t0, t0 + step)
        logits = model.drive(theta, hist[:, sl], previous[:, sl])
        total += log_choice_probability(logits, chosen[:, sl]).sum(0)
    return total


def choice_probabilities(
    model: ChoiceModel, theta: Mapping[str, np.ndarray | float], stack: TrialStack, hist: np.ndarray
) -> np.ndarray:
    """Softmax choice probabilities before each trial, same shape as `hist`."""
    k, t_len, n = stack.shape
    ones = (1,) * (hist.ndim - 3)
    logits = model.drive(theta, hist, stack.previous.reshape(k, t_len, n, *ones))
    e = np.exp(logits - logits.max(0))
    return e / e.sum(0)
