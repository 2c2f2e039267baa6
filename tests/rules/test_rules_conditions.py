"""Closed-loop rules on constructed trial sequences: exact firing trials, cooldown, hysteresis,
metrics against worked numbers, actions and their limits."""

from __future__ import annotations

import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from server.engine.caps import HardCaps
from server.engine.records import EventLogged, InputEvent, RuleFired, TrialRecord
from server.lab.assembly import build_session
from server.protocol.load import parse_protocol
from server.protocol.problems import InvalidFile
from server.rules.metrics import pca_index, win_stay_lose_shift

ROOT = Path(__file__).resolve().parents[2]

BASE = """\
vigil_protocol: 1
name: rules under test
wiring:
  outputs:
    lever_a: {kind: lever, channel: 0}
    lever_b: {kind: lever, channel: 1}
    feeder: {kind: feeder, channel: 3, pulse_ms: 20}
  inputs:
    press_a: {kind: lever_press, channel: 0, presented_by: lever_a}
    press_b: {kind: lever_press, channel: 1, presented_by: lever_b}
options:
  a: {input: press_a, reward_probability: 1.0}
  b: {input: press_b, reward_probability: 0.0}
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
iti: {uniform: [2, 6]}
blocks:
  - block: main
    trial_types: [pick]
    until: {trials: 200}
"""


def protocol_with(rules: str, extra: str = ""):
    return parse_protocol(BASE + extra + textwrap.dedent(rules), "rules.yaml")


def drive(protocol, pattern, seed=3, caps=HardCaps(max_rewards=1000)):
    """Answer trial i (1-based) with pattern[i-1] ('a', 'b' or None), 1 s after the window opens."""
    session = build_session(protocol, seed, caps, estimate=False)
    session.start(0.0)
    records, answered = [], set()
    while not session.finished:
        i = session.trial_index
        if session.step_name == "offer" and i not in answered:
            answered.add(i)
            if i > len(pattern):
                session.stop(session._trial.step_t0, "script done")
                break
            if pattern[i - 1] is not None:
                session.feed(InputEvent(f"press_{pattern[i - 1]}"), session._trial.step_t0 + 1.0)
                continue
        session.advance(session.next_deadline)
        records.extend(session.take_records())
    records.extend(session.take_records())
    return session, records


def firings(records, rule=None):
    return [r for r in records if isinstance(r, RuleFired) and (rule is None or r.rule == rule)]


# ------------------------------------------------------------------ worked numbers


def test_win_stay_lose_shift_worked_example():
    # common practice; worked numbers from the project's CHECKS table:
    # choices 0,0,1,1,0,0,1,0; rewards 1,0,1,1,0,1,0,1 -> WS 0.5, LS 0.667
    ws, ls = win_stay_lose_shift(list("00110010"), [bool(r) for r in (1, 0, 1, 1, 0, 1, 0, 1)])
    assert ws == pytest.approx(0.5) and ls == pytest.approx(2 / 3)


def test_pca_index_worked_examples():
    # Meyer et al. (2012), PLoS ONE 7:e38987 (components as restated in PLoS Biol 2018);
    # worked numbers from the project's CHECKS table.
    assert pca_index(90, 10, 0.96, 0.24, 1.5, 7.0, 8.0) == pytest.approx(0.7358, abs=1e-4)
    assert pca_index(5, 45, 0.2, 0.9, 7.0, 2.5, 8.0) == pytest.approx(-0.6875, abs=1e-4)


# ------------------------------------------------------------------ firing, cooldown, hysteresis


def test_streak_rule_fires_exactly_at_the_hand_computed_trial():
    # 8 consecutive correct (common practice reversal criterion). Hand-computed: correct x5,
    # error, correct x3, omission (skipped), correct x5 -> the 8th consecutive is trial 15.
    protocol = protocol_with('rules:\n  - rule: eight\n    when: "streak >= 8"\n    do: {alarm: "eight in a row"}\n')
    pattern = list("aaaaab") + list("aaa") + [None] + list("aaaaa") + list("aa")
    session, records = drive(protocol, pattern)
    fired = firings(records, "eight")
    assert [f.trial for f in fired] == [15, 16, 17]
    assert fired[0].values == {"streak": 8.0}
    assert any(isinstance(r, EventLogged) and r.kind == "alarm" for r in records)


def test_cooldown_blocks_refiring_for_n_trials():
    protocol = protocol_with('rules:\n  - rule: r\n    when: "trials >= 3"\n    cooldown: 4\n    do: {alarm: x}\n')
    _, records = drive(protocol, list("a" * 14))
    assert [f.trial for f in firings(records)] == [3, 8, 13]


def test_hysteresis_needs_k_consecutive_holds():
    # accuracy(2) >= 1 holds after trials 2,3 (aa), breaks at 4 (b), holds again 6,7,8...
    protocol = protocol_with('rules:\n  - rule: r\n    when: "accuracy(2) >= 1"\n    hold_for: 3\n    do: {alarm: x}\n')
    pattern = list("aaab") + list("aaaaaa")
    _, records = drive(protocol, pattern)
    # holds at trials 2,3 (run 2), breaks at 4 and 5 (window has the error), holds 6,7,8 -> fires at 8;
    # run resets after a firing -> 9,10 hold (run 2) and the script ends.
    assert [f.trial for f in firings(records)] == [8]


def test_condition_arithmetic_logic_and_unknown_values():
    # Hand-computed on a a b a a a b: accuracy(4) = 3/4 first at trial 4, so
    # 2 * accuracy(4) - 1 = 0.5 there; the streak reaches 3 at trial 6. A window longer than
    # the session, or a division by zero, is unknown: its comparison is false, never fires.
    rules = """\
    rules:
      - rule: arithmetic
        when: "accuracy(4) * 2 - 1 >= 0.5 and not omission_rate(4) > 0"
        max_firings: 1
        do: {alarm: x}
      - rule: either
        when: "streak >= 3 or -streak <= -100"
        max_firings: 1
        do: {alarm: y}
      - rule: unknown_window
        when: "accuracy(50) >= 0"
        do: {alarm: z}
      - rule: by_zero
        when: "streak / (trials - trials) >= 0"
        do: {alarm: w}
    """
    _, records = drive(protocol_with(rules), list("aabaaab"))
    fired = {(f.rule, f.trial) for f in firings(records)}
    assert fired == {("arithmetic", 4), ("either", 6)}
    values = {f.rule: f.values for f in firings(records)}
    assert values["arithmetic"] == {"accuracy(4)": 0.75, "omission_rate(4)": 0.0}
    assert values["either"] == {"streak": 3.0}


def test_max_firings_per_session():
    protocol = protocol_with('rules:\n  - rule: r\n    when: "trials >= 1"\n    max_firings: 2\n    do: {alarm: x}\n')
    _, records = drive(protocol, list("a" * 10))
    assert [f.trial for f in firings(records)] == [1, 2]


def test_two_reversal_rules_never_undo_each_other():
    protocol = protocol_with(
        "rules:\n"
        '  - rule: first\n    when: "streak >= 3"\n    do: {reverse: [a, b]}\n'
        '  - rule: second\n    when: "streak >= 3"\n    do: {reverse: [a, b]}\n'
    )
    session, records = drive(protocol, list("aaa") + list("bbb"))
    assert [(f.rule, f.trial) for f in firings(records)] == [("first", 3), ("first", 6)]
    assert session.reversals == 2


def test_reversal_action_swaps_contingencies_and_resets_the_streak():
    protocol = protocol_with('rules:\n  - rule: flip\n    when: "streak >= 4"\n    do: {reverse: [a, b]}\n')
    session, records = drive(protocol, list("aaaa") + list("bbbb") + list("aa"))
    trials = [r for r in records if isinstance(r, TrialRecord) and not r.interrupted]
    assert [t.rewarded for t in trials] == [True] * 10  # a, then b, then a again pays
    assert [f.trial for f in firings(records)] == [4, 8]
    assert session.reversals == 2


def test_windowed_metrics_need_a_full_window():
    protocol = protocol_with('rules:\n  - rule: r\n    when: "omission_rate(4) >= 0.5"\n    do: {alarm: x}\n')
    _, records = drive(protocol, [None, None, None, "a", "a", "a"])
    # the window is full at trial 4 (3 of 4 omitted) -> fires at 4 and again at 5 (2 of 4)
    assert [f.trial for f in firings(records)] == [4, 5]


def test_iti_never_leaves_its_bounds():
    protocol = protocol_with(
        'iti_bounds: [3, 4]\nrules:\n  - rule: longer\n    when: "trials >= 1"\n    do: {scale_iti: 3}\n',
    )
    _, records = drive(protocol, list("ab" * 20))
    itis = [t.iti_s for t in records if isinstance(t, TrialRecord)][:-1]
    assert itis and all(3 <= x <= 4 for x in itis)
    protocol = protocol_with(
        'iti_bounds: [1, 10]\nrules:\n  - rule: set\n    when: "trials >= 2"\n    do: {set_iti: 7.5}\n'
    )
    _, records = drive(protocol, list("a" * 6))
    itis = [t.iti_s for t in records if isinstance(t, TrialRecord)]
    assert itis[1:5] == [7.5] * 4 and 2 <= itis[0] <= 6  # fires after trial 2: its ITI on


def test_devaluation_probe_delivers_no_outcome_and_ends_on_time():
    protocol = protocol_with('rules:\n  - rule: probe\n    when: "rewards >= 3"\n    do: {probe: {minutes: 1}}\n')
    session, records = drive(protocol, list("a" * 40))
    trials = [r for r in records if isinstance(r, TrialRecord)]
    probe = [t for t in trials if t.block.endswith(":probe")]
    assert probe and not any(t.rewarded for t in probe)
    pulses_after = [r for r in records if isinstance(r, EventLogged) and r.kind == "pulse" and r.t > probe[0].t_start]
    assert all((r.detail or {}).get("withheld") for r in pulses_after)
    assert session.rewards == 3
    assert session.end_reason.startswith("protocol complete (main:probe: 1 minutes)")
    assert session.ended_at - probe[0].t_start <= 60.0 + 1e-9


def test_end_session_action():
    protocol = protocol_with(
        'rules:\n  - rule: done\n    when: "rewarded_responses >= 2"\n    do: {end_session: "enough"}\n'
    )
    session, _ = drive(protocol, list("baab"))
    assert session.end_reason == "rule done: enough" and session.trials_done == 3


def test_settings_can_differ_per_animal():
    protocol = protocol_with(
        'settings: {target: 5}\nrules:\n  - rule: r\n    when: "rewards >= target"\n    do: {end_session: "target"}\n'
    )
    session, _ = drive(protocol, list("a" * 10))
    assert session.rewards == 5
    from dataclasses import replace

    session, _ = drive(replace(protocol, settings={"target": 2}), list("a" * 10))
    assert session.rewards == 2


# ------------------------------------------------------------------ check-time errors


def test_malformed_rule_is_a_clear_check_error(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text(
        BASE + 'rules:\n  - rule: r\n    when: "streek >= 8 and accuracy > 0.5"\n    do: {reverse: [a, c]}\n'
    )
    result = subprocess.run([sys.executable, "-m", "server.cli", "check", str(bad)],
                            capture_output=True, text=True, cwd=ROOT)  # fmt: skip
    assert result.returncode == 1
    lines = result.stderr.strip().splitlines()
    line_no = BASE.count("\n") + 3
    # the column points at the misspelt name inside the quoted condition
    assert re.fullmatch(
        rf".*bad\.yaml:{line_no}:12: rules\.r\.when: unknown quantity 'streek'; did you mean 'streak'\?", lines[0]
    )
    assert any("no option named 'c'" in line for line in lines)


@pytest.mark.parametrize(
    "when, message",
    [
        ("accuracy > 0.5", "'accuracy' needs a window in trials"),
        ("beta > 2", "parameter 'beta' needs .mean, .low or .high"),
        ("streak >= ", "expected a number or a name, found the end"),
        ("streak >= 8; import os", "unexpected character ';'"),
        ("__import__ > 1", "unknown quantity '__import__'"),
        ("open(1) > 1", "unknown quantity 'open'"),
    ],
)
def test_expression_errors(when, message):
    with pytest.raises(InvalidFile, match=re.escape(message)):
        protocol_with(f'rules:\n  - rule: r\n    when: "{when}"\n    do: {{alarm: x}}\n')


def test_iti_actions_need_declared_bounds():
    with pytest.raises(InvalidFile, match="declare iti_bounds"):
        protocol_with('rules:\n  - rule: r\n    when: "trials > 1"\n    do: {scale_iti: 2}\n')


# ------------------------------------------------------------------ rehearsal with rules on


def test_rehearsal_with_rules_is_deterministic_and_reports_firings(tmp_path):
    from server.cli.reports import criterion_figure_svg
    from server.lab.population import parse_vary
    from server.lab.rehearsal import rehearse
    from server.protocol.load import load_protocol

    protocol = load_protocol(ROOT / "protocols" / "reversal.yaml")
    population = parse_vary(["alpha=0.2:0.5", "beta=lognormal:5:0.3"], "q_learner")
    one = rehearse(protocol, 4, 21, sessions=2, population=population, workers=1)
    two = rehearse(protocol, 4, 21, sessions=2, population=population, workers=2)
    assert one == two
    for animal in one["animals"]:
        assert set(animal["rule_firings"]) == {"learned", "streak_backstop", "disengaged"}
        assert animal["reversals"] == sum(animal["rule_firings"][r] for r in ("learned", "streak_backstop"))
        assert animal["reversals"] > 0 and len(animal["sessions"]) == 2
        assert 0.2 <= animal["params"]["alpha"] <= 0.5
    assert one["summary"]["rule_firings"]["learned"] > 0
    svg = criterion_figure_svg(one)
    assert svg.startswith("<svg") and "trials to criterion" in svg


def test_reversal_rule_records_every_value_it_read(tmp_path):
    """A live-style session with the estimator on: each firing carries the quantities read."""
    import numpy as np

    from hardware_stubs.agents import make_agent
    from hardware_stubs.emulated_box import EmulatedBox
    from server.engine.virtual import run_virtual
    from server.protocol.load import load_protocol

    protocol = load_protocol(ROOT / "protocols" / "reversal.yaml")
    session = build_session(protocol, 5)
    records = []
    run_virtual(
        session, EmulatedBox(protocol.wiring, make_agent("q_learner"), np.random.default_rng(5)), records.extend
    )
    learned = firings(records, "learned")
    assert learned, "the estimator-driven reversal fired"
    assert all(set(f.values) == {"p_prefers_correct"} and f.values["p_prefers_correct"] >= 0.95 for f in learned)
    assert all(f.actions == ({"reverse": ["west", "east"]},) for f in learned)
