"""Choice trials encoded as arrays: per animal, and stacked across animals for batch fits.

Labels become option indices once, at the edge; the numerics then work on one-hot rows.
An omission is a row of zeros, which makes it skip both the likelihood and the value
update with no special case, and also lets animals of unequal length be stacked by
padding with omissions.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, slots=True, eq=False)
class AnimalTrials:
    """One animal's trials in order. `choice` is an option index, -1 for an omission."""

    animal: str
    options: tuple[str, ...]
    choice: np.ndarray
    reward: np.ndarray
    session: tuple[str, ...]
    trial: tuple[int, ...]

    @property
    def n_choices(self) -> int:
        return int((self.choice >= 0).sum())

    @property
    def session_start(self) -> np.ndarray:
        start = np.ones(len(self.session), dtype=bool)
        start[1:] = [a != b for a, b in zip(self.session[1:], self.session[:-1])]
        return start

    def chosen(self) -> np.ndarray:
        """One-hot rows (trials x options); zero rows for omissions."""
        out = np.zeros((len(self.choice), len(self.options)))
        made = self.choice >= 0
        out[np.flatnonzero(made), self.choice[made]] = 1.0
        return out

    def previous(self) -> np.ndarray:
        """One-hot of the last non-omitted choice earlier in the same session."""
        chosen = self.chosen()
        out = np.zeros_like(chosen)
        last = np.zeros(len(self.options))
        for t, start in enumerate(self.session_start):
            if start:
                last = np.zeros(len(self.options))
            out[t] = last
            if self.choice[t] >= 0:
                last = chosen[t]
        return out


def encode_animal(
    animal: str, rows: Iterable[tuple[str, int, str | None, float]], options: Sequence[str] = ()
) -> AnimalTrials:
    """Encode (session, trial, choice label or None, reward) rows, in order.

    The option set is the declared `options` followed by every other label seen, in order
    of first appearance.
    """
    labels = list(options)
    index = {lab: i for i, lab in enumerate(labels)}
    choice, reward, session, trial = [], [], [], []
    for sess, num, lab, rew in rows:
        rew = float(rew)
        if not math.isfinite(rew):
            raise ValueError(f"animal {animal}: reward must be a finite number, got {rew!r}")
        if lab is None or lab == "":
            choice.append(-1)
        else:
            if lab not in index:
                index[lab] = len(labels)
                labels.append(lab)
            choice.append(index[lab])
        reward.append(rew)
        session.append(str(sess))
        trial.append(int(num))
    return AnimalTrials(
        animal, tuple(labels), np.array(choice, dtype=int), np.array(reward, dtype=float), tuple(session), tuple(trial)
    )


@dataclass(frozen=True, slots=True, eq=False)
class TrialStack:
    """Animals side by side, padded by omissions; options on the first axis (see choice.py)."""

    chosen: np.ndarray  # (K, T, N) one-hot, zeros on omissions and padding
    reward: np.ndarray  # (T, N)
    start: np.ndarray  # (T, N) session starts here
    previous: np.ndarray  # (K, T, N) previous non-omitted choice in the session
    start_any: np.ndarray  # (T,) some animal starts a session at t > 0
    chose_any: np.ndarray  # (T,) some animal chose at t

    @property
    def shape(self) -> tuple[int, int, int]:
        """(options, trials, animals)"""
        return self.chosen.shape

    def take(self, rows: np.ndarray) -> TrialStack:
        """The stack of the given animals (repeats allowed), in that order."""
        return _stack(self.chosen[:, :, rows], self.reward[:, rows], self.start[:, rows], self.previous[:, :, rows])


def _stack(chosen: np.ndarray, reward: np.ndarray, start: np.ndarray, previous: np.ndarray) -> TrialStack:
    start_any = start.any(1)
    assert isinstance(start_any, np.ndarray)  # (T, N) reduces to (T,), never to a scalar
    start_any[0] = False
    chose_any = chosen.any((0, 2))
    assert isinstance(chose_any, np.ndarray)  # (K, T, N) reduces to (T,)
    return TrialStack(chosen, reward, start, previous, start_any, chose_any)


def stack_animals(animals: Sequence[AnimalTrials]) -> TrialStack:
    """Stack animals with the same number of options (pad shorter ones with omissions)."""
    ks = {len(a.options) for a in animals}
    if len(ks) != 1:
        raise ValueError("animals stacked together must have the same number of options")
    k = ks.pop()
    n = len(animals)
    t_max = max(len(a.choice) for a in animals)
    chosen = np.zeros((k, t_max, n))
    previous = np.zeros((k, t_max, n))
    reward = np.zeros((t_max, n))
    start = np.zeros((t_max, n), dtype=bool)
    for i, a in enumerate(animals):
        t = len(a.choice)
        chosen[:, :t, i] = a.chosen().T
        previous[:, :t, i] = a.previous().T
        reward[:t, i] = a.reward
        start[:t, i] = a.session_start
    return _stack(chosen, reward, start, previous)
