"""Independent re-statements of the choice models, for checking server.models against.

Written from the published update rules, in plain Python (likelihood) and in numpy across
animals (simulation), sharing no code with server.models: a mistake in the package's
vectorised code cannot hide behind the same mistake here.
"""

from __future__ import annotations

import math

import numpy as np

MODELS = ("q_learning", "q_dual_rate", "q_sticky", "q_forgetting")


def reference_loglik(model: str, p: dict, trials: list[tuple], q0: float = 0.0) -> float:
    """Log-likelihood of (session, choice label or None, reward) trials, one at a time.

    Q-learning with softmax (Sutton & Barto 2018, ch. 2); dual rates by sign of the
    prediction error; stickiness bonus kappa on the last choice of the session; forgetting:
    unchosen Q <- (1 - decay) Q after each choice. Omissions are skipped entirely.
    """
    labels: list[str] = []
    for _, c, _ in trials:
        if c is not None and c not in labels:
            labels.append(c)
    k = len(labels)
    ll, q, prev, session = 0.0, [], None, object()
    for s, c, r in trials:
        if s != session:
            q, prev, session = [q0] * k, None, s
        if c is None:
            continue
        i = labels.index(c)
        z = [p["beta"] * q[j] for j in range(k)]
        if model == "q_sticky" and prev is not None:
            z[prev] += p["kappa"]
        top = max(z)
        ll += z[i] - (top + math.log(sum(math.exp(v - top) for v in z)))
        delta = r - q[i]
        if model == "q_dual_rate":
            rate = p["alpha_pos"] if delta > 0 else p["alpha_neg"]
        else:
            rate = p["alpha"]
        if model == "q_forgetting":
            q = [v if j == i else (1.0 - p["decay"]) * v for j, v in enumerate(q)]
        q[i] = q[i] + rate * delta
        prev = i
    return ll


def three_armed(t: int, every: int = 30) -> np.ndarray:
    """Reward probabilities 0.9 / 0.5 / 0.1, rotating among the arms every `every` trials."""
    return np.roll(np.array([0.9, 0.5, 0.1]), (t // every) % 3)


def two_armed_reversal(t: int, every: int = 40) -> np.ndarray:
    """The 0.8 / 0.2 bandit with a reversal every `every` trials (common practice)."""
    return np.array([0.8, 0.2]) if (t // every) % 2 == 0 else np.array([0.2, 0.8])


def simulate(
    model: str, p: dict, n_trials: int, rng: np.random.Generator, schedule=three_armed, omission: float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """Simulate animals side by side; p maps each parameter to an array (one per animal).

    Returns choices (animals x trials; -1 = omission) and rewards (0/1).
    """
    n = len(p["beta"])
    k = len(schedule(0))
    q = np.zeros((n, k))
    prev = np.full(n, -1)
    rows = np.arange(n)
    choices = np.empty((n, n_trials), dtype=int)
    rewards = np.zeros((n, n_trials))
    for t in range(n_trials):
        z = p["beta"][:, None] * q
        if model == "q_sticky":
            z = z + p["kappa"][:, None] * (np.arange(k)[None, :] == prev[:, None])
        prob = np.exp(z - z.max(1, keepdims=True))
        prob /= prob.sum(1, keepdims=True)
        c = (rng.random(n)[:, None] > np.cumsum(prob, 1)).sum(1).clip(0, k - 1)
        r = (rng.random(n) < schedule(t)[c]).astype(float)
        made = rng.random(n) >= omission
        delta = r - q[rows, c]
        if model == "q_dual_rate":
            rate = np.where(delta > 0, p["alpha_pos"], p["alpha_neg"])
        else:
            rate = p["alpha"]
        new_q = q.copy()
        if model == "q_forgetting":
            new_q *= 1.0 - p["decay"][:, None]
            new_q[rows, c] = q[rows, c]
        new_q[rows, c] += rate * delta
        q = np.where(made[:, None], new_q, q)
        prev = np.where(made, c, prev)
        choices[:, t] = np.where(made, c, -1)
        rewards[:, t] = np.where(made, r, 0.0)
    return choices, rewards


def as_rows(choices: np.ndarray, rewards: np.ndarray, labels: str = "LRC", session: str = "s1") -> list[list[tuple]]:
    """Per animal: (session, trial, label or None, reward) rows."""
    return [
        [(session, t + 1, labels[c] if c >= 0 else None, float(r)) for t, (c, r) in enumerate(zip(ch, rw))]
        for ch, rw in zip(choices, rewards)
    ]
