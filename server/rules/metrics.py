"""Windowed behavioural metrics of a session, updated trial by trial (pure, no I/O)."""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass
from itertools import islice
from statistics import median

from server.engine.records import SecondStage, TrialOutcome
from server.engine.stay import stay_contrasts
from server.protocol.model import Protocol
from server.protocol.wiring import OPERANT_INPUT_KINDS

HISTORY = 500  # trials kept for windowed metrics; rules cannot ask for a longer window


def pca_index(
    lever_presses: int,
    magazine_entries: int,
    p_lever: float,
    p_magazine: float,
    lever_latency_s: float,
    magazine_latency_s: float,
    cs_s: float,
) -> float:
    """Pavlovian conditioned approach index, Meyer et al. (2012), PLoS ONE 7:e38987.

    Mean of response bias (LP - CE)/(LP + CE), probability difference P(lever) - P(magazine),
    and latency score (magazine latency - lever latency) / CS duration. +1 sign-tracking,
    -1 goal-tracking. With no response of either kind the bias is taken as 0.
    """
    total = lever_presses + magazine_entries
    bias = (lever_presses - magazine_entries) / total if total else 0.0
    difference = p_lever - p_magazine
    latency = (magazine_latency_s - lever_latency_s) / cs_s
    return (bias + difference + latency) / 3.0


def win_stay_lose_shift(choices: list[str | None], rewarded: list[bool]) -> tuple[float | None, float | None]:
    """WS = P(same choice | previous rewarded), LS = P(switch | previous unrewarded), over
    successive choice trials with omissions skipped (common practice)."""
    pairs = [(c, r) for c, r in zip(choices, rewarded) if c is not None]
    wins = stays = losses = shifts = 0
    for (prev, prev_rewarded), (cur, _) in zip(pairs, pairs[1:]):
        if prev_rewarded:
            wins += 1
            stays += cur == prev
        else:
            losses += 1
            shifts += cur != prev
    return (stays / wins if wins else None, shifts / losses if losses else None)


@dataclass(frozen=True, slots=True)
class WindowTrial:
    """What the windowed metrics read of a trial. A whole TrialOutcome (its steps, counts and
    latencies by input) is about a kilobyte; 500 of them per box over a night was the lab's
    largest memory growth, so the window keeps only this."""

    choice: str | None
    rewarded: bool
    correct: bool | None
    omission: bool
    latency_s: float | None
    t_start: float
    t_end: float
    operant_responses: int
    second: SecondStage | None


def longest_windows(protocol: Protocol) -> tuple[int, int]:
    """How far back the protocol's rules look: (trials, scored trials for `accuracy`)."""
    trials = scored = 0
    for rule in protocol.rules:
        for q in rule.reads:
            if q.window:
                if q.name == "accuracy":
                    scored = max(scored, q.window)
                else:
                    trials = max(trials, q.window)
    return min(trials, HISTORY), min(scored, HISTORY)


class SessionMetrics:
    """Keeps only as many trials as the protocol's rules read (`longest_windows`): a box runs
    thousands of trials a night and 32 boxes share one process."""

    def __init__(self, protocol: Protocol):
        self.pavlovian = protocol.pavlovian
        self.operant = {n for n, line in protocol.wiring.inputs.items() if line.kind in OPERANT_INPUT_KINDS}
        trials, scored = longest_windows(protocol)
        self.recent: deque[WindowTrial] = deque(maxlen=max(trials, 1))
        self.scored: deque[bool] = deque(maxlen=max(scored, 1))  # `correct` of trials that had one
        self.streak = 0
        self.rewarded_trials = 0
        # running sums for the PCA index
        self._cs_trials = 0
        self._lever = self._magazine = 0
        self._lever_trials = self._magazine_trials = 0
        self._lever_latency = self._magazine_latency = 0.0

    def add(self, trial: TrialOutcome) -> None:
        if trial.interrupted:
            return
        operant = sum(n for key, n in trial.counts.items() if key.rpartition(".")[2] in self.operant)
        self.recent.append(
            WindowTrial(trial.choice, trial.rewarded, trial.correct, trial.omission, trial.latency_s,
                        trial.t_start, trial.t_end, operant, trial.second)
        )  # fmt: skip
        self.rewarded_trials += trial.rewarded
        if trial.correct is not None:
            self.scored.append(trial.correct)
            self.streak = self.streak + 1 if trial.correct else 0
        if self.pavlovian is not None:
            self._add_pavlovian(trial, self.pavlovian)

    def _add_pavlovian(self, trial: TrialOutcome, pav) -> None:
        if not any(name == pav.cs_step for name, _ in trial.steps):
            return
        lever_key, magazine_key = f"{pav.cs_step}.{pav.lever}", f"{pav.cs_step}.{pav.magazine}"
        self._cs_trials += 1
        self._lever += trial.counts.get(lever_key, 0)
        self._magazine += trial.counts.get(magazine_key, 0)
        self._lever_trials += lever_key in trial.counts
        self._magazine_trials += magazine_key in trial.counts
        # A trial without the response scores the whole CS as its latency (from memory).
        self._lever_latency += min(trial.first_s.get(lever_key, pav.cs_seconds), pav.cs_seconds)
        self._magazine_latency += min(trial.first_s.get(magazine_key, pav.cs_seconds), pav.cs_seconds)

    def pca(self) -> float | None:
        pav = self.pavlovian
        n = self._cs_trials
        if pav is None or n == 0:
            return None
        return pca_index(
            self._lever, self._magazine, self._lever_trials / n, self._magazine_trials / n,
            self._lever_latency / n, self._magazine_latency / n, pav.cs_seconds,
        )  # fmt: skip

    def window(self, n: int) -> list[WindowTrial] | None:
        """The last n trials, oldest first (None until there are n)."""
        if len(self.recent) < n:
            return None
        return list(islice(reversed(self.recent), n))[::-1]

    def accuracy(self, n: int) -> float | None:
        """Fraction correct over the last n scored trials (None until there are n)."""
        if len(self.scored) < n:
            return None
        return sum(islice(reversed(self.scored), n)) / n

    def omission_rate(self, n: int) -> float | None:
        trials = self.window(n)
        return None if trials is None else sum(t.omission for t in trials) / n

    def win_stay(self, n: int) -> float | None:
        trials = self.window(n)
        return (
            None if trials is None else win_stay_lose_shift([t.choice for t in trials], [t.rewarded for t in trials])[0]
        )

    def lose_shift(self, n: int) -> float | None:
        trials = self.window(n)
        return (
            None if trials is None else win_stay_lose_shift([t.choice for t in trials], [t.rewarded for t in trials])[1]
        )

    def stay_reward_effect(self, n: int) -> float | None:
        trials = self.window(n)
        return None if trials is None else stay_contrasts(trials)[0]

    def stay_interaction(self, n: int) -> float | None:
        trials = self.window(n)
        return None if trials is None else stay_contrasts(trials)[1]

    def median_latency(self, n: int) -> float | None:
        trials = self.window(n)
        if trials is None:
            return None
        latencies = [t.latency_s for t in trials if t.latency_s is not None]
        return median(latencies) if latencies else None

    def responses_per_minute(self, n: int) -> float | None:
        trials = self.window(n)
        if trials is None:
            return None
        span = trials[-1].t_end - trials[0].t_start
        responses = sum(t.operant_responses for t in trials)
        return responses / (span / 60.0) if span > 0 else None
