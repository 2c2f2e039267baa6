"""The two-stage stay contrasts that rules read, on a sequence worked out by hand."""

from __future__ import annotations

from pathlib import Path

from server.engine.records import SecondStage, TrialOutcome
from server.engine.stay import stay_contrasts
from server.protocol.load import parse_protocol
from server.rules.metrics import SessionMetrics

ROOT = Path(__file__).resolve().parents[2]


def trial(n: int, choice: str | None, rewarded: bool, common: bool, omitted: bool = False) -> TrialOutcome:
    state = ("north" if choice == "west" else "south") if common else ("south" if choice == "west" else "north")
    second = None if choice is None else SecondStage(state, common, None, None, None, omitted)
    return TrialOutcome(
        n, "drifting", 1, "two_stage_trial", n * 5.0, n * 5.0 + 4, choice, None, None, rewarded,
        float(rewarded), None, choice is None, False, second=second,
    )  # fmt: skip


# (first choice, rewarded, common transition) per trial
SEQUENCE = [
    ("west", True, True),  # 1 -> 2 stays:   rewarded, common
    ("west", True, False),  # 2 -> 3 switches: rewarded, rare
    ("east", False, True),  # 3 -> 4 switches: unrewarded, common
    ("west", False, False),  # 4 -> 5 stays:  unrewarded, rare
    ("west", True, True),  # 5 -> 6 stays:   rewarded, common
    ("west", False, True),  # 6 -> 7 switches: unrewarded, common
    ("east", True, False),  # 7 -> 8 stays:   rewarded, rare
    ("east", False, False),  # 8 -> 9 stays:  unrewarded, rare
    ("east", True, True),  # 9: last, no successor
]


def test_worked_example():
    trials = [trial(i + 1, c, r, k) for i, (c, r, k) in enumerate(SEQUENCE)]
    effect, interaction = stay_contrasts(trials)
    # By hand: rewarded -> 3 stays of 4 pairs (1, 2x, 5, 7); unrewarded -> 2 of 4 (3x, 4, 6x, 8).
    assert effect == 3 / 4 - 2 / 4
    # rewarded common 2/2, rewarded rare 1/2, unrewarded common 0/2, unrewarded rare 2/2:
    # (1 - 0.5) - (0 - 1) = 1.5
    assert interaction == 1.5


def test_omissions_and_missed_second_stages_are_left_out():
    trials = [trial(1, "west", True, True), trial(2, None, False, True), trial(3, "west", True, True)]
    trials += [trial(4, "west", False, True, omitted=True), trial(5, "east", False, True)]
    # Pairs: (1, 2) has no second choice, (2, 3) no first, (3, 4) counts (rewarded common, stay),
    # (4, 5) follows a missed second stage. So only the rewarded side has a pair.
    assert stay_contrasts(trials) == (None, None)


def test_rules_read_them_over_a_window():
    protocol = parse_protocol((ROOT / "protocols" / "two_stage.yaml").read_text(), "two_stage.yaml")
    metrics = SessionMetrics(protocol)
    for i, (c, r, k) in enumerate(SEQUENCE):
        metrics.add(trial(i + 1, c, r, k))
    assert metrics.stay_reward_effect(9) == 0.25
    assert metrics.stay_interaction(9) == 1.5
    assert metrics.stay_interaction(10) is None  # not 10 trials yet
    # Over the last 5 trials (5..9): rewarded 5 stays, 7 stays; unrewarded 6 switches, 8 stays.
    assert metrics.stay_reward_effect(5) == 1.0 - 0.5
