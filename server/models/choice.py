"""Choice models over K options: one pure value update and one choice rule per model.

Every model is two pure functions over numpy arrays. The FIRST axis indexes options; the
other axes index anything the caller likes (grid points, candidate parameters, animals,
trials). Options go first because there are few of them: numpy is slow along a short
innermost axis and fast across whole blocks.

- `learn(theta, q, chosen, reward) -> (q_new, delta)`: the trial's value update. `chosen`
  is one-hot over options (all zeros on an omission, which leaves `q` unchanged).
- `drive(theta, q, previous) -> logits`: the softmax input; `previous` is the one-hot of
  the last non-omitted choice in the session (all zeros at session start). It must be
  linear in `q` and `previous` together (every rule here is): the online estimator takes
  the logit gap of two options as the drive of their differences.

The online estimator and the offline fit both call these same functions, which is why
replaying stored trials reproduces the online result exactly. Parameter values in
`theta` must broadcast against `q.shape[1:]`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from server.protocol.reader import did_you_mean

from .params import DeclaredParams, Param, Prior, inverse_temperature, learning_rate

Theta = Mapping[str, np.ndarray | float]


def _q_learning(theta: Theta, q: np.ndarray, chosen: np.ndarray, reward) -> tuple:
    # Q(c) <- Q(c) + alpha (r - Q(c)) (Sutton & Barto 2018, ch. 2, constant step size)
    delta = reward - (q * chosen).sum(0)
    return q + theta["alpha"] * delta * chosen, delta


def _q_dual_rate(theta: Theta, q: np.ndarray, chosen: np.ndarray, reward) -> tuple:
    # separate rates for positive and negative prediction errors (Frank et al. 2007)
    delta = reward - (q * chosen).sum(0)
    rate = np.where(delta > 0, theta["alpha_pos"], theta["alpha_neg"])
    return q + rate * delta * chosen, delta


def _q_forgetting(theta: Theta, q: np.ndarray, chosen: np.ndarray, reward) -> tuple:
    # unchosen values decay towards 0 after each choice (Ito & Doya 2009)
    delta = reward - (q * chosen).sum(0)
    unchosen = chosen.sum(0) - chosen
    return q + theta["alpha"] * delta * chosen - theta["decay"] * unchosen * q, delta


def _softmax_drive(theta: Theta, q: np.ndarray, previous: np.ndarray) -> np.ndarray:
    # P(a) = exp(beta Q(a)) / sum_b exp(beta Q(b)) (Sutton & Barto 2018, eq. 2.11)
    return theta["beta"] * q


def _sticky_drive(theta: Theta, q: np.ndarray, previous: np.ndarray) -> np.ndarray:
    # P(a) proportional to exp(beta Q(a) + kappa [a = previous choice]) (Lau & Glimcher 2005)
    return theta["beta"] * q + theta["kappa"] * previous


@dataclass(frozen=True, slots=True)
class ChoiceModel(DeclaredParams):
    """A choice model: declared parameters plus its pure update and choice rule."""

    name: str
    params: tuple[Param, ...]
    learn: Callable[..., tuple[np.ndarray, np.ndarray]]
    drive: Callable[..., np.ndarray]
    summary: str


CHOICE_MODELS: dict[str, ChoiceModel] = {
    m.name: m
    for m in (
        ChoiceModel(
            "q_learning",
            (learning_rate("alpha", "learning rate"), inverse_temperature()),
            _q_learning,
            _softmax_drive,
            "Q-learning with a softmax choice rule",
        ),
        ChoiceModel(
            "q_dual_rate",
            (
                learning_rate("alpha_pos", "learning rate after positive prediction errors", 16),
                learning_rate("alpha_neg", "learning rate after negative prediction errors", 16),
                inverse_temperature(24),
            ),
            _q_dual_rate,
            _softmax_drive,
            "Q-learning with separate rates for better- and worse-than-expected outcomes",
        ),
        ChoiceModel(
            "q_sticky",
            (
                learning_rate("alpha", "learning rate", 16),
                inverse_temperature(24),
                Param(
                    "kappa",
                    -5.0,
                    5.0,
                    "linear",
                    Prior("normal", 0.0, 2.0),
                    False,
                    16,
                    "bonus for repeating the previous choice (negative = alternation)",
                    grid_low=-4.0,
                    grid_high=4.0,
                ),
            ),
            _q_learning,
            _sticky_drive,
            "Q-learning plus a bonus for repeating the previous choice",
        ),
        ChoiceModel(
            "q_forgetting",
            (
                learning_rate("alpha", "learning rate", 16),
                inverse_temperature(24),
                Param(
                    "decay",
                    0.0,
                    1.0,
                    "linear",
                    Prior("beta", 1.1, 1.1),
                    True,
                    16,
                    "fraction of an unchosen value lost after each choice",
                ),
            ),
            _q_forgetting,
            _softmax_drive,
            "Q-learning whose unchosen values decay towards zero",
        ),
    )
}


def get_choice_model(name: str) -> ChoiceModel:
    """Look a choice model up by name, with a did-you-mean on a typo."""
    try:
        return CHOICE_MODELS[name]
    except KeyError:
        hint = did_you_mean(name, CHOICE_MODELS, aside=True)
        known = ", ".join(CHOICE_MODELS)
        raise ValueError(f"unknown model {name!r}{hint}; known: {known}") from None


def log_softmax(logits: np.ndarray) -> np.ndarray:
    """Log choice probabilities over the option axis (first), stable for large logits."""
    shifted = logits - logits.max(0)
    return shifted - np.log(np.exp(shifted).sum(0))


def log_choice_probability(logits: np.ndarray, chosen: np.ndarray) -> np.ndarray:
    """log P(chosen option) under the softmax of `logits` (0 where nothing was chosen)."""
    top = logits.max(0)
    lse = top + np.log(np.exp(logits - top).sum(0))
    return (logits * chosen).sum(0) - lse * chosen.sum(0)


__all__ = [
    "CHOICE_MODELS",
    "ChoiceModel",
    "Prior",
    "get_choice_model",
    "log_choice_probability",
    "log_softmax",
]
