"""Two-stage trials in the session core: transitions, the second stage, the reward walk.

The animal here is a few lines of policy in this file (poke the centre, choose a side by a
rule the test sets, poke whichever second-stage port is lit), fed to the session directly in
virtual time, so every figure the test checks is one it can count itself.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from server.engine.caps import HardCaps
from server.engine.records import InputEvent, TrialRecord
from server.engine.session import Session
from server.protocol.load import parse_protocol
from server.rules.book import RuleBook

ROOT = Path(__file__).resolve().parents[2]
TEXT = (ROOT / "protocols" / "two_stage.yaml").read_text()
PORT_OF_STATE = {"north": "poke_north", "south": "poke_south"}


def protocol_text(*, walk: bool = True, rules: bool = False, trials: int = 400) -> str:
    """protocols/two_stage.yaml, without its rules (which would exchange the ports) unless asked."""
    text = TEXT.replace("until: {trials: 400}", f"until: {{trials: {trials}}}")
    if not walk:
        text = text.replace("  reward_walk: {sd: 0.025, within: [0.25, 0.75]}\n", "")
    if not rules:
        head, _, tail = text.partition("\nrules:\n")
        text = head + tail[tail.index("\nlimits:") :]
    return text.replace("limits: {max_minutes: 60, max_rewards: 150}", "limits: {max_minutes: 10000}")


def play(text: str, seed: int, choose_first, *, skip_second=lambda trial: False) -> list[TrialRecord]:
    """Run one session to its end; `choose_first(trial)` names the first-stage poke."""
    protocol = parse_protocol(text, "two_stage.yaml")
    caps = HardCaps(max_rewards=100_000, max_minutes=24 * 60)
    session = Session(protocol, seed, caps, rules=RuleBook(protocol) if protocol.rules else None)
    t = 0.0
    session.start(t)
    records: list[TrialRecord] = []
    acted: tuple[int, str | None] | None = None
    while not session.finished:
        trial, step = session.trial_index, session.step_name
        poke = None
        if (trial, step) != acted:
            if step == "ready":
                poke = "poke_centre"
            elif step == "first":
                poke = choose_first(trial)
            elif step in ("at_north", "at_south") and not skip_second(trial):
                poke = PORT_OF_STATE[step.removeprefix("at_")]
        if poke is not None:
            acted = (trial, step)
            t += 0.25
            session.advance(t)
            session.feed(InputEvent(poke), t)
        else:
            t = session.next_deadline
            session.advance(t)
        records.extend(r for r in session.take_records() if isinstance(r, TrialRecord))
    records.extend(r for r in session.take_records() if isinstance(r, TrialRecord))
    return [r for r in records if not r.interrupted]


def test_transitions_follow_the_declared_probabilities():
    records = play(protocol_text(trials=2000), 11, lambda trial: "poke_west")
    assert len(records) == 2000
    north = sum(r.second.state == "north" for r in records)
    # P(north | west) = 0.8 as declared; a two-sided exact binomial test (scipy).
    assert stats.binomtest(north, len(records), 0.8).pvalue > 0.001
    # west's common state is north: the transition label says so on every trial.
    assert all(r.second.common == (r.second.state == "north") for r in records)
    assert all(r.choice == "west" and r.response == "poke_west" for r in records)


def test_the_second_stage_is_a_single_response_with_its_latency():
    (first, *_) = play(protocol_text(trials=1), 3, lambda trial: "poke_east")
    second = first.second
    assert second.choice is None  # one option per state: no second choice
    assert second.response == PORT_OF_STATE[second.state]
    assert second.latency_s == pytest.approx(0.25)  # poked 0.25 s after the port lit
    assert not second.omitted
    assert [name for name, _ in first.steps][:3] == ["ready", "first", f"at_{second.state}"]


def test_a_missed_second_stage_is_not_an_omission_and_pays_nothing():
    records = play(protocol_text(trials=20), 5, lambda trial: "poke_west", skip_second=lambda trial: True)
    assert len(records) == 20
    assert all(r.second.omitted and r.second.response is None for r in records)
    assert all(r.choice == "west" and not r.omission and not r.rewarded for r in records)


def test_rewards_follow_the_state_reached():
    records = play(protocol_text(walk=False, trials=3000), 21, lambda trial: "poke_west" if trial % 2 else "poke_east")
    for state, p in (("north", 0.7), ("south", 0.3)):
        there = [r for r in records if r.second.state == state]
        won = sum(r.rewarded for r in there)
        assert stats.binomtest(won, len(there), p).pvalue > 0.001, (state, won, len(there))
    # Expected reward of a first choice: 0.8 * 0.7 + 0.2 * 0.3 = 0.62 for west, 0.38 for east.
    assert all(r.correct == (r.choice == "west") for r in records)


def test_the_reward_walk_stays_within_bounds_with_the_declared_step():
    free = []
    for seed in (8, 9, 10):
        records = play(protocol_text(trials=2000), seed, lambda trial: "poke_west")
        p = np.array([[r.extra["reward_probability"][o] for o in ("north_port", "south_port")] for r in records])
        assert p.min() >= 0.25 and p.max() <= 0.75
        assert p[0].tolist() == [0.7, 0.3]  # the declared start
        # Away from the bounds (4 sd or more) a step is a plain N(0, 0.025^2) draw.
        inner = (p[:-1] > 0.35) & (p[:-1] < 0.65)
        free.append(np.diff(p, axis=0)[inner])
    steps = np.concatenate(free)
    n = steps.size
    # Its variance within the chi-square interval (common practice), its mean by a t-test (scipy).
    low, high = stats.chi2.ppf([0.0005, 0.9995], n - 1)
    assert (n - 1) * steps.var(ddof=1) / high <= 0.025**2 <= (n - 1) * steps.var(ddof=1) / low
    assert stats.ttest_1samp(steps, 0.0).pvalue > 0.001


def test_same_seed_same_trials():
    def first(trial: int) -> str:
        return "poke_west" if trial % 3 else "poke_east"

    assert play(protocol_text(trials=200), 4, first) == play(protocol_text(trials=200), 4, first)
    assert play(protocol_text(trials=200), 4, first) != play(protocol_text(trials=200), 5, first)


def test_the_exchange_rule_swaps_the_ports_reward_probabilities():
    records = play(protocol_text(walk=False, rules=True, trials=60), 2, lambda trial: "poke_west")
    probs = [r.extra["reward_probability"]["north_port"] for r in records]
    # Ten correct first choices in a row (always west, the better side at first) exchange
    # the ports: north's 0.7 becomes 0.3, and west becomes the worse side.
    assert probs[:10] == [0.7] * 10
    assert 0.3 in probs
    swapped = probs.index(0.3)
    assert all(r.correct is False for r in records[swapped : swapped + 5])
