"""Two-stage trials as data, encoded for the hybrid model, and their batch likelihood.

`TwoStageRow` is what a source gives for each trial, the same whether it comes from a trials
CSV (server/cli/fit_sources.py) or from the store (a `TrialRecord` and its `SecondStage`,
server/engine/records.py: `choice`, `second.state`, `second.common`, `second.choice`,
`second.omitted`, `reward`). `encode_two_stage` checks rows against the task and encodes
them once; `stack_two_stage` puts animals side by side for the batch fit, padded with
omissions (which neither count nor learn, see server/models/two_stage.py).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from server.engine.records import TrialOutcome, TrialRecord
from server.engine.stay import StayAnalysis, stay_analysis

from .batch import ValueSettings
from .two_stage import HybridValues, Step, TrialArrays, TwoStageTask, hybrid_step, initial_values


@dataclass(frozen=True, slots=True)
class TwoStageRow:
    """One trial: first-stage choice (None = omission), the state it led to and whether by the
    common transition, the second-stage choice (None in a single-response state or when
    `omitted2`), and the reward delivered."""

    session: str
    trial: int
    choice: str | None
    state: str | None = None
    common: bool | None = None
    choice2: str | None = None
    omitted2: bool = False
    reward: float = 0.0

    @classmethod
    def from_record(cls, session: str, record: TrialRecord | TrialOutcome) -> TwoStageRow:
        """The row of a stored or just-finished trial (a trial with no second stage, or an
        omission, is a first-stage omission)."""
        second = record.second
        if record.omission or record.choice is None or second is None:
            return cls(session, record.trial, None, reward=float(record.reward))
        return cls(
            session, record.trial, record.choice, second.state, second.common,
            None if second.omitted else second.choice, second.omitted, float(record.reward),
        )  # fmt: skip


@dataclass(frozen=True, slots=True, eq=False)
class TwoStageTrials:
    """One animal's two-stage trials in order, encoded against its task."""

    animal: str
    task: TwoStageTask
    rows: tuple[TwoStageRow, ...]
    first: np.ndarray  # (T, K1) one-hot, zeros on omissions
    reached: np.ndarray  # (T, S)
    offered: np.ndarray  # (T, B)
    second: np.ndarray  # (T, B)
    reward: np.ndarray  # (T,)
    session_start: np.ndarray  # (T,) bool

    @property
    def n_choices(self) -> int:
        """First-stage choice trials (the n of BIC)."""
        return int(self.first.sum())

    @property
    def session(self) -> tuple[str, ...]:
        return tuple(r.session for r in self.rows)

    def stay(self, lags: int = 1) -> StayAnalysis:
        """The stay analysis of these trials (server/engine/stay.py); reward > 0 is rewarded."""
        return stay_analysis(
            [r.choice for r in self.rows],
            [r.common for r in self.rows],
            [None if r.omitted2 else r.reward > 0 for r in self.rows],
            self.session,
            lags,
        )


def encode_two_stage(animal: str, rows: Iterable[TwoStageRow], task: TwoStageTask) -> TwoStageTrials:
    """Encode rows in order; a label the task does not know is a ValueError naming the trial."""
    rows = tuple(rows)
    k1, s_n, b = len(task.first), len(task.states), task.slots
    n = len(rows)
    first, reached = np.zeros((n, k1)), np.zeros((n, s_n))
    offered, second = np.zeros((n, b)), np.zeros((n, b))
    reward = np.zeros(n)
    start = np.ones(n, dtype=bool)
    for t, r in enumerate(rows):
        where = f"animal {animal}, session {r.session}, trial {r.trial}"
        if not math.isfinite(r.reward):
            raise ValueError(f"{where}: reward must be a finite number, got {r.reward!r}")
        if r.choice is not None and r.choice not in task.first:
            raise ValueError(f"{where}: {r.choice!r} is not a first-stage option ({', '.join(task.first)})")
        if r.choice is not None and r.state not in task.states:
            raise ValueError(f"{where}: {r.state!r} is not a second-stage state ({', '.join(task.states)})")
        if r.choice is not None and r.choice2 is not None:
            opts = task.options[task.states.index(r.state)]
            if r.choice2 not in opts:
                raise ValueError(f"{where}: state {r.state} has no option {r.choice2!r}")
        try:
            enc = task.encode(r.choice, r.state, r.choice2, r.reward, omitted2=r.omitted2)
        except ValueError as exc:
            raise ValueError(f"{where}: {exc}") from None
        first[t], reached[t], offered[t], second[t], reward[t] = (
            enc.first, enc.reached, enc.offered, enc.second, enc.reward,
        )  # fmt: skip
        if t:
            start[t] = r.session != rows[t - 1].session
    return TwoStageTrials(animal, task, rows, first, reached, offered, second, reward, start)


@dataclass(frozen=True, slots=True, eq=False)
class TwoStageStack:
    """Animals of one task side by side (trials on axis 1, animals on axis 2)."""

    task: TwoStageTask
    first: np.ndarray  # (K1, T, N)
    reached: np.ndarray  # (S, T, N)
    offered: np.ndarray  # (B, T, N)
    second: np.ndarray  # (B, T, N)
    reward: np.ndarray  # (T, N)
    start: np.ndarray  # (T, N)

    @property
    def shape(self) -> tuple[int, int]:
        """(trials, animals)"""
        return self.reward.shape

    def take(self, rows: np.ndarray) -> TwoStageStack:
        return TwoStageStack(
            self.task,
            self.first[:, :, rows],
            self.reached[:, :, rows],
            self.offered[:, :, rows],
            self.second[:, :, rows],
            self.reward[:, rows],
            self.start[:, rows],
        )

    def trial(self, t: int, ndim: int) -> TrialArrays:
        """Trial t of every animal, with `ndim` singleton axes after the animal axis."""
        ones = (1,) * ndim
        first, reached, offered, second = (
            a[:, t].reshape(a.shape[0], -1, *ones) for a in (self.first, self.reached, self.offered, self.second)
        )
        return TrialArrays(first, reached, offered, second, self.reward[t].reshape(-1, *ones))


def stack_two_stage(animals: Sequence[TwoStageTrials]) -> TwoStageStack:
    """Stack animals that share one task; shorter ones are padded with omissions."""
    task = animals[0].task
    if any(not a.task.same_as(task) for a in animals[1:]):
        raise ValueError("animals stacked together must share one two-stage task")
    n, t_max = len(animals), max(len(a.rows) for a in animals)
    k1, s_n, b = len(task.first), len(task.states), task.slots
    first, reached = np.zeros((k1, t_max, n)), np.zeros((s_n, t_max, n))
    offered, second = np.zeros((b, t_max, n)), np.zeros((b, t_max, n))
    reward, start = np.zeros((t_max, n)), np.zeros((t_max, n), dtype=bool)
    for i, a in enumerate(animals):
        t = len(a.rows)
        first[:, :t, i], reached[:, :t, i] = a.first.T, a.reached.T
        offered[:, :t, i], second[:, :t, i] = a.offered.T, a.second.T
        reward[:t, i], start[:t, i] = a.reward, a.session_start
    return TwoStageStack(task, first, reached, offered, second, reward, start)


def run_hybrid(
    theta: Mapping[str, np.ndarray | float],
    stack: TwoStageStack,
    qshape: tuple[int, ...],
    values: ValueSettings = ValueSettings(),
    keep: bool = False,
) -> tuple[np.ndarray, list[tuple[HybridValues, Step]] | None]:
    """Summed log-likelihood over trials, shape (N, *qshape) broadcast with theta, and every
    trial's values before it and its `Step` when `keep` (for regressors). Values reset at each session start unless
    `values.carry_values`; the perseveration term always starts a session afresh."""
    t_len, n = stack.shape
    task = stack.task
    valid = task.valid
    full = np.broadcast_shapes((n, *qshape), *(np.shape(v) for v in theta.values()))
    vals = initial_values(task, full, values.q0)
    total = np.zeros(full)
    kept: list[tuple[HybridValues, Step]] | None = [] if keep else None
    ndim = len(full) - 1
    for t in range(t_len):
        if t and stack.start[t].any():
            s = stack.start[t].reshape(-1, *(1,) * ndim)
            q1, q2 = vals.q1, vals.q2
            if not values.carry_values:
                q1, q2 = np.where(s, values.q0, q1), np.where(s, values.q0, q2)
            vals = HybridValues(q1, q2, np.where(s, 0.0, vals.prev))
        step = hybrid_step(theta, vals, task, stack.trial(t, ndim), valid)
        total = total + step.logp
        vals_before, vals = vals, step.values
        if kept is not None:
            kept.append((vals_before, step))
    return total, kept
