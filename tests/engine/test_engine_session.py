"""The session core in virtual time: timing, contingencies, blocks, caps, safe state."""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from scripted_box import ScriptedBox

from server.engine.caps import HardCaps
from server.engine.records import BlockStarted, EventLogged, InputEvent, SessionEnded, SetOutput, TrialRecord
from server.engine.session import Session
from server.engine.virtual import run_virtual
from server.protocol.load import load_protocol, parse_protocol

ROOT = Path(__file__).resolve().parents[2]

WIRING = """\
vigil_protocol: 1
name: {name}
wiring:
  outputs:
    lever_a: {{kind: lever, channel: 0}}
    lever_b: {{kind: lever, channel: 1}}
    house: {{kind: house_light, channel: 2}}
    feeder: {{kind: feeder, channel: 3, pulse_ms: 20}}
  inputs:
    press_a: {{kind: lever_press, channel: 0, presented_by: lever_a}}
    press_b: {{kind: lever_press, channel: 1, presented_by: lever_b}}
    mag: {{kind: head_entry, channel: 2}}
options:
  a: {{input: press_a, reward_probability: {pa}}}
  b: {{input: press_b, reward_probability: {pb}}}
"""

CHOICE = """\
trial_types:
  pick:
    steps:
      - step: offer
        activate: [lever_a, lever_b]
        wait_s: 10
        choose: [a, b]
        if_rewarded: pellet
        if_unrewarded: end
        on_leave: {deactivate: [lever_a, lever_b]}
      - step: pellet
        pulse: feeder
        wait_s: 1
iti: 5
"""


def choice_protocol(blocks: str, pa=1.0, pb=0.0, limits="", name="choice"):
    text = WIRING.format(name=name, pa=pa, pb=pb) + CHOICE + textwrap.dedent(blocks) + limits
    return parse_protocol(text, "test.yaml")


def records_of(session, kind):
    return [r for r in session.records if isinstance(r, kind)]


def drive(session, policy, latency=1.0):
    """Answer each response window `latency` s after it opens with policy(trial index)."""
    session.start(0.0)
    answered = set()
    records = []
    while not session.finished:
        index = session.trial_index
        if session.step_name == "offer" and index not in answered:
            answered.add(index)
            press = policy(index)
            if press is not None:
                t_open = session._trial.step_t0
                session.feed(InputEvent(press), t_open + latency)
                continue
        session.advance(session.next_deadline)
        records.extend(session.take_records())
    records.extend(session.take_records())
    return [r for r in records if isinstance(r, TrialRecord)]


def run(protocol, events, seed=1, caps=HardCaps()):
    session = Session(protocol, seed, caps)
    session.records = []
    box = ScriptedBox(events)
    run_virtual(session, box, on_records=session.records.extend)
    return session, box


def test_autoshaping_trial_timing():
    # Lever CS inserted for 8 s, then retracted with one pellet; 25 trials; variable ITI
    # (common practice for autoshaping / sign- vs goal-tracking).
    protocol = load_protocol(ROOT / "protocols" / "autoshaping.yaml")
    session, box = run(protocol, [])
    trials = records_of(session, TrialRecord)
    assert len(trials) == 25 and session.end_reason.startswith("protocol complete")
    extended = box.switched("cs_lever", True)
    retracted = box.switched("cs_lever", False)
    pellets = box.pulses("pellet")
    assert len(extended) == 25 and len(pellets) == 25
    for on, off, pellet in zip(extended, retracted, pellets):
        assert off - on == pytest.approx(8.0) and pellet == pytest.approx(off)
    itis = [t.iti_s for t in trials[:-1]]
    assert set(itis) <= {30, 40, 50, 60, 70, 80, 90} and len(set(itis)) > 3


def test_choice_contingency_and_latency():
    protocol = choice_protocol("blocks:\n  - block: one\n    trial_types: [pick]\n    until: {trials: 2}\n")
    # trial 1 starts at 0: press a at 1.5 s; trial 2 starts after pellet step (1 s) + ITI 5 s.
    session, box = run(protocol, [(1.5, "press_a"), (9.0, "press_b")])
    t1, t2 = records_of(session, TrialRecord)
    assert (t1.choice, t1.latency_s, t1.rewarded, t1.correct) == ("a", 1.5, True, True)
    assert t2.t_start == pytest.approx(7.5) and t2.choice == "b" and t2.latency_s == pytest.approx(1.5)
    assert (t2.rewarded, t2.correct) == (False, False)
    assert box.pulses("feeder") == [1.5]


def test_omission_when_the_window_runs_out():
    protocol = choice_protocol("blocks:\n  - block: one\n    trial_types: [pick]\n    until: {trials: 1}\n")
    session, box = run(protocol, [(12.0, "press_a")])
    (trial,) = records_of(session, TrialRecord)
    assert trial.omission and trial.choice is None and trial.t_end == pytest.approx(10.0)
    assert box.switched("lever_a", False)[0] == pytest.approx(10.0)


def test_reward_probability_matches_binomial():
    protocol = choice_protocol(
        "blocks:\n  - block: one\n    trial_types: [pick]\n    until: {trials: 400}\n", pa=0.8, pb=0.2
    )
    session = Session(protocol, 11, HardCaps(max_rewards=1000))  # the default cap is 300
    trials = drive(session, lambda trial_index: "press_a")
    rewarded = sum(tr.rewarded for tr in trials)
    assert len(trials) == 400
    assert stats.binomtest(rewarded, 400, 0.8).pvalue > 0.001


def test_streak_criterion_and_reversal_block_swap():
    # Reversal criterion: 8 consecutive correct (common practice).
    protocol = choice_protocol(
        """\
        blocks:
          - block: first
            trial_types: [pick]
            until: {streak: 8}
          - block: second
            trial_types: [pick]
            swap: [a, b]
            until: {trials: 2}
            next: end_session
        """
    )
    # Each rewarded trial lasts 1 s (press) + 1 s pellet + 5 s ITI = 7 s.
    presses = [(7.0 * i + 1.0, "press_a") for i in range(8)]
    # After the reversal, b is the good option.
    presses += [(56.0 + 1.0, "press_b"), (56.0 + 8.0, "press_a")]
    session, box = run(protocol, presses)
    trials = records_of(session, TrialRecord)
    assert [t.block for t in trials] == ["first"] * 8 + ["second"] * 2
    assert [t.correct for t in trials[8:]] == [True, False]
    assert [t.rewarded for t in trials[8:]] == [True, False]
    blocks = records_of(session, BlockStarted)
    assert blocks[1].contingencies == {"a": 0.0, "b": 1.0}
    assert session.first_criterion_trial == 8
    assert session.end_reason == "protocol complete (second: 2 trials)"


def test_streak_is_broken_by_an_error_but_not_by_an_omission():
    # hand-computed: correct x3, omission, correct x4, error, correct x8 -> criterion at trial 17
    protocol = choice_protocol(
        "blocks:\n  - block: first\n    trial_types: [pick]\n    until: {streak: 8}\n    next: end_session\n"
    )
    pattern = ["a"] * 3 + [None] + ["a"] * 4 + ["b"] + ["a"] * 8
    session = Session(protocol, 2)
    trials = drive(session, lambda i: None if pattern[i - 1] is None else f"press_{pattern[i - 1]}")
    assert len(trials) == 17
    assert session.first_criterion_trial == 17 and session.finished


def test_withheld_outcomes_deliver_no_pellet():
    protocol = choice_protocol(
        "blocks:\n  - block: probe\n    trial_types: [pick]\n    withhold_outcomes: true\n    until: {trials: 3}\n"
    )
    session, box = run(protocol, [(1.0, "press_a"), (7.0, "press_a"), (13.0, "press_a")])
    trials = records_of(session, TrialRecord)
    assert len(trials) == 3 and not any(t.rewarded for t in trials)
    assert box.pulses("feeder") == []


def test_lab_cap_wins_over_protocol_limit():
    protocol = choice_protocol(
        "blocks:\n  - block: one\n    trial_types: [pick]\n    until: {trials: 50}\n",
        limits="limits: {max_rewards: 40}\n",
    )
    presses = [(7.0 * i + 1.0, "press_a") for i in range(50)]
    session, box = run(protocol, presses, caps=HardCaps(max_rewards=3, max_minutes=60))
    assert len(box.pulses("feeder")) == 3
    assert session.end_reason == "reward cap reached"
    assert box.active == set(), "every held output is inactive at the end"


def test_time_limit_interrupts_the_trial_and_goes_safe():
    protocol = choice_protocol(
        "blocks:\n  - block: one\n    trial_types: [pick]\n    until: {trials: 50}\n",
        limits="limits: {max_minutes: 0.1}\n",
    )
    session, box = run(protocol, [])
    trials = records_of(session, TrialRecord)
    assert session.end_reason == "session time limit" and session.ended_at == pytest.approx(6.0)
    assert trials[-1].interrupted
    end_commands = [c for t, c in box.commands if t == pytest.approx(6.0) and isinstance(c, SetOutput)]
    assert {c.name for c in end_commands} == {"lever_a", "lever_b", "house"}
    assert not any(c.active for c in end_commands)


def test_pause_freezes_the_trial_and_resume_restores_outputs():
    protocol = choice_protocol("blocks:\n  - block: one\n    trial_types: [pick]\n    until: {trials: 5}\n")
    session = Session(protocol, 3)
    session.start(0.0)
    commands = session.pause(4.0)
    assert {c.name for c in commands if not c.active} >= {"lever_a", "lever_b"}
    assert session.feed(InputEvent("press_a"), 5.0) == []  # ignored while paused
    resumed = session.resume(20.0)
    assert {c.name for c in resumed if c.active} == {"lever_a", "lever_b"}
    assert session.next_deadline == pytest.approx(26.0)  # 10 s window, 4 s used before the pause
    session.feed(InputEvent("press_a"), 21.0)
    session.advance(30.0)
    trial = [r for r in session.take_records() if isinstance(r, TrialRecord)][0]
    assert trial.latency_s == pytest.approx(5.0)


def test_a_timed_block_ends_later_by_the_length_of_a_pause():
    protocol = choice_protocol(
        "blocks:\n  - block: one\n    trial_types: [pick]\n    until: {minutes: 1}\n"
        "  - block: two\n    trial_types: [pick]\n"
    )
    session = Session(protocol, 3)
    session.start(0.0)
    session.advance(30.0)  # no presses: 10 s omissions and 5 s ITIs
    session.pause(32.0)
    session.resume(52.0)  # 20 s paused: the block now runs out at 80 s, not 60 s
    session.advance(79.0)
    assert session.block.block.name == "one"
    session.advance(80.0)
    assert session.block.block.name == "two"
    started = [r for r in session.take_records() if isinstance(r, BlockStarted)]
    assert [r.t for r in started] == [0.0, 80.0]


def test_every_field_of_a_trial_record():
    # The session builds the record positionally (for speed): each field checked by name.
    protocol = choice_protocol("blocks:\n  - block: one\n    trial_types: [pick]\n    until: {trials: 2}\n")
    session, _ = run(protocol, [(1.5, "press_a"), (8.0, "press_b"), (8.2, "press_b")])
    first, second = records_of(session, TrialRecord)
    assert first == TrialRecord(
        trial=1, block="one", block_index=1, trial_type="pick", t_start=0.0, t_end=2.5,
        choice="a", response="press_a", latency_s=1.5, rewarded=True, reward=1.0, correct=True,
        omission=False, interrupted=False, iti_s=5.0, steps=(("offer", 0.0), ("pellet", 1.5)),
        counts={"offer.press_a": 1}, first_s={"offer.press_a": 1.5}, extra={},
    )  # fmt: skip
    assert second == TrialRecord(
        trial=2, block="one", block_index=1, trial_type="pick", t_start=7.5, t_end=8.0,
        choice="b", response="press_b", latency_s=pytest.approx(0.5), rewarded=False, reward=0.0,
        correct=False, omission=False, interrupted=False, iti_s=0.0, steps=(("offer", 7.5),),
        counts={"offer.press_b": 1}, first_s={"offer.press_b": pytest.approx(0.5)}, extra={},
    )  # fmt: skip


def test_max_run_limits_repeats_of_one_trial_type():
    text = (
        WIRING.format(name="mix", pa=1.0, pb=0.0)
        + CHOICE.replace("iti: 5", "")
        + textwrap.dedent(
            """\
          solo:
            steps:
              - step: wait
                wait_s: 1
        iti: 1
        blocks:
          - block: mixed
            trial_types: {pick: 5, solo: 1}
            max_run: 2
            until: {trials: 300}
        """
        )
    )
    protocol = parse_protocol(text.replace("  pick:\n", "  pick:\n", 1), "mix.yaml")
    session, _ = run(protocol, [], seed=5)
    kinds = [t.trial_type for t in records_of(session, TrialRecord)]
    runs = [len(list(g)) for _, g in __import__("itertools").groupby(kinds)]
    assert max(runs) <= 2 and len(kinds) == 300
    assert 0.1 < kinds.count("solo") / len(kinds) < 0.6


def test_zero_wait_loop_ends_the_session_instead_of_hanging():
    text = WIRING.format(name="loop", pa=1.0, pb=0.0) + textwrap.dedent(
        """\
        trial_types:
          spin:
            steps:
              - step: x
                wait_s: 0
                next: y
              - step: y
                draw: {x: 1.0}
        blocks:
          - block: b
            trial_types: [spin]
        """
    )
    session, _ = run(parse_protocol(text, "loop.yaml"), [])
    assert session.end_reason.startswith("error: protocol loops")


def test_same_seed_same_records_different_seed_differs():
    protocol = load_protocol(ROOT / "protocols" / "bandit.yaml")
    from hardware_stubs.agents import make_agent
    from hardware_stubs.emulated_box import EmulatedBox

    def once(seed):
        session = Session(protocol, seed)
        out = []
        box = EmulatedBox(protocol.wiring, make_agent("q_learner"), np.random.default_rng(seed))
        run_virtual(session, box, on_records=out.extend)
        return out

    a, b, c = once(7), once(7), once(8)
    assert a == b and a != c
    assert isinstance(a[-1], SessionEnded)
    inputs = [r for r in a if isinstance(r, EventLogged) and r.kind == "input"]
    assert inputs and all(x.t <= y.t for x, y in zip(inputs, inputs[1:]))


def test_a_trial_cut_by_the_link_is_stored_interrupted_and_the_session_goes_on():
    protocol = choice_protocol("blocks:\n  - block: one\n    trial_types: [pick]\n    until: {trials: 3}\n")
    from server.lab.assembly import build_session

    session = build_session(protocol, 4)
    session.start(0.0)
    session.mark_interrupted("link lost")  # the box went quiet during trial 1
    session.feed(InputEvent("press_a"), 2.0)
    session.advance(3.0)
    session.advance(session.next_deadline)  # ITI over: trial 2
    session.feed(InputEvent("press_a"), session._trial.step_t0 + 1.0)
    session.advance(session._trial.step_t0 + 2.0)
    records = session.take_records()
    trials = [r for r in records if isinstance(r, TrialRecord)]
    assert [t.interrupted for t in trials] == [True, False]
    assert trials[0].extra == {"cut_by": "link lost"} and trials[0].iti_s > 0
    estimates = [r for r in records if type(r).__name__ == "EstimateUpdated"]
    assert [e.trial for e in estimates] == [2], "the cut trial does not teach the estimator"
    assert not session.finished
