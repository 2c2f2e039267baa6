"""Protocol validation: every error class gets a file:line:col message, all at once."""

from __future__ import annotations

import re
import textwrap
import time
from pathlib import Path

import pytest

from server.protocol.load import load_protocol, parse_protocol
from server.protocol.problems import InvalidFile

PROTOCOLS = sorted((Path(__file__).resolve().parents[2] / "protocols").glob("*.yaml"))

GOOD = textwrap.dedent(
    """\
    vigil_protocol: 1
    name: tiny
    wiring:
      outputs:
        lever_a: {kind: lever, channel: 0}
        feeder: {kind: feeder, channel: 1, pulse_ms: 20}
      inputs:
        press_a: {kind: lever_press, channel: 0, presented_by: lever_a}
    options:
      a: {input: press_a, reward_probability: 0.5}
    trial_types:
      t:
        steps:
          - step: s1
            activate: lever_a
            wait_s: 5
            choose: [a]
            if_rewarded: s2
            on_leave: {deactivate: lever_a}
          - step: s2
            pulse: feeder
            wait_s: 1
    blocks:
      - block: b
        trial_types: [t]
        until: {trials: 5}
    """
)


def problems(text: str) -> list[str]:
    with pytest.raises(InvalidFile) as info:
        parse_protocol(text, "p.yaml")
    return [str(p) for p in info.value.problems]


def one(text: str) -> str:
    found = problems(text)
    assert len(found) == 1, found
    return found[0]


def test_good_protocol_compiles():
    protocol = parse_protocol(GOOD, "p.yaml")
    step = protocol.trial_types["t"].steps[0]
    assert step.choose == ("a",) and step.if_rewarded == "s2" and step.if_unrewarded == "s2"
    assert protocol.options["a"].reward_probability == 0.5


@pytest.mark.parametrize("path", PROTOCOLS, ids=lambda p: p.name)
def test_example_protocols_are_valid(path):
    protocol = load_protocol(path)
    assert protocol.blocks and protocol.trial_types
    assert path.read_text().startswith("#"), "each example starts with a comment saying what it tests"


def test_unknown_key_suggests_the_close_one():
    message = one(GOOD.replace("wait_s: 5", "wiat_s: 5"))
    assert re.fullmatch(
        r"p\.yaml:16:9: trial_types\.t\.steps\[1\]: unknown key 'wiat_s'; did you mean 'wait_s'\?", message
    )


def test_duplicate_key_names_first_line():
    text = GOOD.replace("  inputs:\n", "  inputs:\n    press_a: {kind: nose_poke, channel: 3}\n")
    message = one(text)
    assert "duplicate key 'press_a' (first at line 8)" in message
    assert message.startswith("p.yaml:9:5:")


def test_wrong_type_says_expected_and_found():
    message = one(GOOD.replace("wait_s: 5", "wait_s: soon"))
    assert "wait_s (seconds): expected a number, found 'soon'" in message


def test_negative_duration_and_bad_probability_are_out_of_range():
    found = problems(
        GOOD.replace("wait_s: 5", "wait_s: -2").replace("reward_probability: 0.5", "reward_probability: 1.5")
    )
    assert any("expected a value from 0 to 86400, found -2" in p for p in found)
    assert any("reward_probability: expected a value from 0 to 1, found 1.5" in p for p in found)


def test_dangling_references_are_errors():
    found = problems(
        GOOD.replace("if_rewarded: s2", "if_rewarded: s3").replace("trial_types: [t]", "trial_types: [tt]")
    )
    assert any("if_rewarded: no step named 's3'" in p for p in found)
    assert any("no trial type named 'tt'; did you mean 't'?" in p for p in found)


def test_pulse_on_a_held_output_is_refused():
    message = one(GOOD.replace("pulse: feeder", "pulse: lever_a"))
    assert "'lever_a' is a held output; use activate/deactivate" in message


def test_yaml_booleans_as_keys_are_explained():
    message = one(GOOD.replace("on_leave: {deactivate: lever_a}", "on_leave: {on: lever_a}"))
    assert "key 'on' must be a name; quote it" in message


def test_every_problem_is_reported_in_one_run():
    broken = (
        GOOD.replace("wait_s: 5", "wait_s: -1")
        .replace("kind: lever,", "kind: levr,")
        .replace("until: {trials: 5}", "until: {trails: 5}")
        .replace("reward_probability: 0.5", "reward_probability: yes")
    )
    found = problems(broken)
    assert len(found) == 4, found
    lines = [int(p.split(":")[1]) for p in found]
    assert lines == sorted(lines)


def test_invalid_yaml_points_at_the_spot():
    message = one("vigil_protocol: 1\nname: [unclosed\n")
    assert re.match(r"p\.yaml:\d+:\d+: invalid YAML: ", message)


def test_alias_bomb_is_refused_quickly():
    rows = ["a: &a [1, 1, 1, 1, 1, 1, 1, 1, 1]"]
    for prev, name in zip("abcdefg", "bcdefgh"):
        rows.append(f"{name}: &{name} [" + ", ".join([f"*{prev}"] * 9) + "]")
    start = time.perf_counter()
    message = one("\n".join(rows) + "\n")
    assert "too many values" in message
    assert time.perf_counter() - start < 30  # generous: the point is that it ends at all


def test_empty_and_binary_files(tmp_path):
    empty = tmp_path / "empty.yaml"
    empty.write_text("")
    with pytest.raises(InvalidFile, match="the file is empty"):
        load_protocol(empty)
    binary = tmp_path / "bin.yaml"
    binary.write_bytes(b"\xff\xfe\x00garbage")
    with pytest.raises(InvalidFile, match="not UTF-8"):
        load_protocol(binary)
    with pytest.raises(InvalidFile, match="cannot read file"):
        load_protocol(tmp_path / "missing.yaml")


def test_draw_probabilities_must_sum_to_one():
    text = GOOD.replace(
        "      - step: s2\n", "      - step: pick\n        draw: {s2: 0.5, end: 0.4}\n      - step: s2\n"
    )
    assert "draw: probabilities must add up to 1, found 0.9" in one(text)


def test_schedule_values_are_checked_per_kind():
    text = GOOD.replace(
        "        choose: [a]\n        if_rewarded: s2\n", "        schedule: {input: press_a, kind: RR, value: 3}\n"
    )
    assert "value (probability per response): expected a value above 0 up to 1, found 3" in one(text)
    text = GOOD.replace(
        "        choose: [a]\n        if_rewarded: s2\n", "        schedule: {input: press_a, kind: XR, value: 3}\n"
    )
    assert "expected one of FR, VR, RR, FI, VI, found 'XR'" in one(text)


def test_format_version_is_checked():
    assert "this Vigil reads format 1, found 2" in one(GOOD.replace("vigil_protocol: 1", "vigil_protocol: 2"))
