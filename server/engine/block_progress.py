"""Per-block state: contingencies in force, the trial-type sequence, and the end criterion."""

from __future__ import annotations

from collections import deque

import numpy as np

from server.protocol.model import Block, Protocol

PERFORMANCE_CRITERIA = ("streak", "accuracy")


class BlockProgress:
    """One run of a block within a session; a fresh object each time a block is entered."""

    def __init__(
        self,
        protocol: Protocol,
        block: Block,
        index: int,
        t0: float,
        rng: np.random.Generator,
        extra_swaps: list[tuple[str, str]],
    ):
        self.block = block
        self.index = index
        self.t0 = t0
        self.rng = rng
        self.trials = 0
        self.rewards = 0
        self.streak = 0
        self.recent: deque[bool] = deque(maxlen=block.until.window or 1)
        self._names = [name for name, _ in block.mix]
        weights = np.array([w for _, w in block.mix], dtype=float)
        self._cum = np.cumsum(weights / weights.sum()).tolist()
        self._turns = [name for name, w in block.mix for _ in range(max(1, round(w)))]
        self._history: deque[str] = deque(maxlen=block.max_run or 1)  # the run limit looks this far back
        self.contingencies = self._contingencies(protocol, extra_swaps)

    # ------------------------------------------------------------ contingencies

    def _contingencies(self, protocol: Protocol, extra_swaps: list[tuple[str, str]]) -> dict[str, float]:
        # First-stage options of a two-stage task pay off through the state they lead to.
        p = {label: o.reward_probability for label, o in protocol.options.items() if o.reward_probability is not None}
        p.update(self.block.reward_probability)
        for a, b in list(self.block.swap) + extra_swaps:
            p[a], p[b] = p[b], p[a]
        return p

    def swap(self, a: str, b: str) -> None:
        """A reversal within the block (closed-loop rules call this)."""
        c = self.contingencies
        c[a], c[b] = c[b], c[a]

    def correct(self, choice: str, offered: tuple[str, ...]) -> bool | None:
        """Whether `choice` is a best option among those offered; None when all are equal."""
        probs = [self.contingencies[o] for o in offered]
        best, worst = max(probs), min(probs)
        if best == worst:
            return None
        return self.contingencies[choice] == best

    # ------------------------------------------------------------ sequence

    def next_trial_type(self) -> str:
        block = self.block
        if block.order == "in_turn":
            name = self._turns[self.trials % len(self._turns)]
        elif len(self._names) == 1:
            name = self._names[0]
        else:
            name = self._draw_with_run_limit()
        self._history.append(name)
        return name

    def _draw_with_run_limit(self) -> str:
        limit = self.block.max_run
        banned = None
        if limit and len(self._history) >= limit:
            tail = self._history
            if all(n == tail[0] for n in tail):
                banned = tail[0]
        while True:  # at most a few draws: the banned type never has all the weight
            u = self.rng.random()
            name = self._names[-1]
            for candidate, edge in zip(self._names, self._cum):
                if u < edge:
                    name = candidate
                    break
            if name != banned:
                return name

    # ------------------------------------------------------------ end criterion

    def record(self, correct: bool | None, rewards: int) -> None:
        """Count one finished trial. Omissions (correct None) leave streak and window alone."""
        self.trials += 1
        self.rewards += rewards
        if correct is None:
            return
        self.streak = self.streak + 1 if correct else 0
        self.recent.append(correct)

    def finished(self, t: float) -> tuple[str, str] | None:
        """(which condition, description) met after the latest trial; performance
        criteria are checked first, so a criterion reached on the last allowed trial counts."""
        u = self.block.until
        if u.streak is not None and self.streak >= u.streak:
            return "streak", f"{u.streak} consecutive correct"
        if u.accuracy is not None and len(self.recent) == self.recent.maxlen:
            accuracy = sum(self.recent) / len(self.recent)
            if accuracy >= u.accuracy:
                return "accuracy", f"{accuracy:.0%} correct over {len(self.recent)} trials"
        if u.trials is not None and self.trials >= u.trials:
            return "trials", f"{u.trials} trials"
        if u.minutes is not None and t - self.t0 >= u.minutes * 60.0:
            return "minutes", f"{u.minutes:g} minutes"
        if u.rewards is not None and self.rewards >= u.rewards:
            return "rewards", f"{u.rewards} rewards"
        return None
