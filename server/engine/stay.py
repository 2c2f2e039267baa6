"""The stay analysis of two-stage trials: how the previous trial's outcome and transition
move the next first choice (Daw, Gershman, Seymour, Dayan & Dolan 2011, Neuron 69:1204).

A model-free learner repeats a rewarded first choice whatever the transition (a main effect
of reward); a model-based learner repeats it after a common transition and switches after a
rare one (a reward x transition interaction). Pure and in the lowest layer that knows trial
records, so the rules, the page and the fit all count it the same way.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol

from server.engine.records import SecondStage

CONDITIONS = ((True, True), (True, False), (False, True), (False, False))  # (rewarded, common)
CONDITION_NAMES = {
    (True, True): "rewarded, common",
    (True, False): "rewarded, rare",
    (False, True): "unrewarded, common",
    (False, False): "unrewarded, rare",
}


class TwoStageTrial(Protocol):
    """What the analysis reads of a trial (a TrialOutcome or a stored TrialRecord)."""

    @property
    def choice(self) -> str | None: ...
    @property
    def rewarded(self) -> bool: ...
    @property
    def second(self) -> SecondStage | None: ...


@dataclass(frozen=True, slots=True)
class StayCount:
    stays: int
    pairs: int

    @property
    def p(self) -> float | None:
        return self.stays / self.pairs if self.pairs else None


def stay_counts(trials: Sequence[TwoStageTrial]) -> dict[tuple[bool, bool], StayCount]:
    """Per (rewarded, common) condition of a trial, how often the next trial repeated its
    first choice; over successive pairs of trials that both have a first choice, the earlier
    one's second stage played out (omissions and missed second stages are left out)."""
    counts = {key: [0, 0] for key in CONDITIONS}
    for prev, cur in zip(trials, trials[1:]):
        second = prev.second
        if prev.choice is None or cur.choice is None or second is None or second.omitted:
            continue
        cell = counts[(prev.rewarded, second.common)]
        cell[0] += cur.choice == prev.choice
        cell[1] += 1
    return {key: StayCount(stays, pairs) for key, (stays, pairs) in counts.items()}


def stay_contrasts(trials: Sequence[TwoStageTrial]) -> tuple[float | None, float | None]:
    """(reward effect, reward x transition interaction) on P(stay):
      reward effect = P(stay | rewarded) - P(stay | unrewarded)
      interaction   = [P(stay | rewarded, common) - P(stay | rewarded, rare)]
                      - [P(stay | unrewarded, common) - P(stay | unrewarded, rare)]
    None while a condition they need has no pair yet."""
    c = stay_counts(trials)
    won = [c[(True, k)] for k in (True, False)]
    lost = [c[(False, k)] for k in (True, False)]
    n_won, n_lost = sum(x.pairs for x in won), sum(x.pairs for x in lost)
    effect = None
    if n_won and n_lost:
        effect = sum(x.stays for x in won) / n_won - sum(x.stays for x in lost) / n_lost
    p = {key: count.p for key, count in c.items()}
    interaction = None
    if all(v is not None for v in p.values()):
        rc, rr, uc, ur = (p[key] for key in CONDITIONS)
        assert rc is not None and rr is not None and uc is not None and ur is not None
        interaction = (rc - rr) - (uc - ur)
    return effect, interaction
