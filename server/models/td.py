"""Temporal-difference updates: TD(0) state values and the SARSA / Q-learning targets.

The choice models above are the one-state case of these; keeping the general updates here
lets them be checked against textbook worked examples and used for multi-step tasks
(e.g. a chain of cue, lever and magazine states).
"""

from __future__ import annotations

import numpy as np


def td0_update(
    v: np.ndarray, state: int, reward: float, next_state: int | None, alpha: float, gamma: float = 1.0
) -> float:
    """V(s) <- V(s) + alpha [r + gamma V(s') - V(s)] in place; returns the TD error.

    Sutton & Barto (2018), ch. 6. `next_state` None means the episode ended (V = 0).
    """
    ahead = 0.0 if next_state is None else gamma * v[next_state]
    delta = reward + ahead - v[state]
    v[state] += alpha * delta
    return float(delta)


def td0_episode(v: np.ndarray, states: list[int], rewards: list[float], alpha: float, gamma: float = 1.0) -> np.ndarray:
    """Apply TD(0) along one episode: states[i] -> states[i+1] with rewards[i]; last exits."""
    for i, s in enumerate(states):
        nxt = states[i + 1] if i + 1 < len(states) else None
        td0_update(v, s, rewards[i], nxt, alpha, gamma)
    return v


def random_walk_td0(
    episodes: int, alpha: float, rng: np.random.Generator, n_states: int = 5, v0: float = 0.5
) -> np.ndarray:
    """TD(0) on the bounded random walk: start in the middle, +1 only on exiting right."""
    v = np.full(n_states, v0)
    for _ in range(episodes):
        s = n_states // 2
        while True:
            step = 1 if rng.random() < 0.5 else -1
            nxt = s + step
            if nxt < 0:
                td0_update(v, s, 0.0, None, alpha)
                break
            if nxt >= n_states:
                td0_update(v, s, 1.0, None, alpha)
                break
            td0_update(v, s, 0.0, nxt, alpha)
            s = nxt
    return v


def sarsa_target(reward: float, gamma: float, q_next_action: float) -> float:
    """R + gamma Q(S', A') (SARSA; Sutton & Barto 2018, ch. 6)."""
    return reward + gamma * q_next_action


def q_learning_target(reward: float, gamma: float, q_next: np.ndarray) -> float:
    """R + gamma max_a Q(S', a) (Q-learning; Sutton & Barto 2018, ch. 6)."""
    return reward + gamma * float(np.max(q_next))


def td_step(q: float, target: float, alpha: float) -> float:
    """Move an estimate a fraction alpha towards its target."""
    return q + alpha * (target - q)
