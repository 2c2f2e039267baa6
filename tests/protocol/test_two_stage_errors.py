"""`vigil check` on the two-stage keys: each mistake is one file:line:col message."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from server.protocol.load import parse_protocol
from server.protocol.problems import InvalidFile

TEXT = (Path(__file__).resolve().parents[2] / "protocols" / "two_stage.yaml").read_text()


def problems(text: str) -> list[str]:
    with pytest.raises(InvalidFile) as info:
        parse_protocol(text, "p.yaml")
    return [str(p) for p in info.value.problems]


def edited(old: str, new: str) -> str:
    assert TEXT.count(old) == 1, old
    return TEXT.replace(old, new)


def line_of(text: str, fragment: str) -> int:
    return text[: text.index(fragment)].count("\n") + 1


def test_the_example_compiles_with_its_structure():
    protocol = parse_protocol(TEXT, "p.yaml")
    ts = protocol.two_stage
    assert ts is not None and ts.first == ("west", "east")
    assert {name: s.options for name, s in ts.states.items()} == {"north": ("north_port",), "south": ("south_port",)}
    assert ts.common_state("west") == "north" and ts.common_state("east") == "south"
    assert ts.walk is not None and (ts.walk.sd, ts.walk.low, ts.walk.high) == (0.025, 0.25, 0.75)
    assert protocol.options["west"].reward_probability is None
    assert protocol.estimator is None  # no single-stage default for a two-stage task


CASES = [
    # (old, new, where the message points, message)
    (
        "    west: {north: 0.8, south: 0.2}",
        "    west: {north: 0.8, south: 0.3}",
        "    west: {north",
        r"two_stage\.transitions\.west: probabilities must add up to 1, found 1\.1",
    ),
    (
        "    west: {north: 0.8, south: 0.2}\n",
        "",
        "    east: {north",
        r"two_stage\.transitions: no transition row for 'west'",
    ),
    (
        "    east: {north: 0.2, south: 0.8}",
        "    east: {north: 0.2, soutj: 0.8}",
        "    east: {north",
        r"two_stage\.transitions\.east: no state named 'soutj'; did you mean 'south'\?",
    ),
    (
        "  west: {input: poke_west}",
        "  west: {input: poke_west, reward_probability: 0.5}",
        "  west: {input",
        r"options\.west\.reward_probability: 'west' is a first-stage option; its outcome is decided in the state",
    ),
    (
        "  north_port: {input: poke_north, reward_probability: 0.7}",
        "  north_port: {input: poke_north}",
        "  north_port: {input",
        r"options\.north_port: missing required key 'reward_probability'",
    ),
    (
        "    south: [south_port]",
        "    south: [north_port]",
        "    south: [north_port]",
        r"two_stage\.states\.south: option 'north_port' is already offered in state 'north'",
    ),
    (
        "    south: [south_port]",
        "    south: [west]",
        "    south: [west]",
        r"two_stage\.states\.south: 'west' is a first-stage option; a state offers its own options",
    ),
    (
        "  reward_walk: {sd: 0.025, within: [0.25, 0.75]}",
        "  reward_walk: {sd: 0.025, within: [0.75, 0.25]}",
        "  reward_walk:",
        r"two_stage\.reward_walk\.within: expected lowest < highest, found \[0\.75, 0\.25\]",
    ),
    (
        "  reward_walk: {sd: 0.025, within: [0.25, 0.75]}",
        "  reward_walk: {sd: 0.025, within: [0.4, 0.6]}",
        "  reward_walk:",
        r"within: option 'north_port' starts at 0\.7, 'south_port' starts at 0\.3, outside \[0\.4, 0\.6\]",
    ),
    (
        "  reward_walk: {sd: 0.025, within: [0.25, 0.75]}",
        "  reward_walk: {sd: 0, within: [0.25, 0.75]}",
        "  reward_walk:",
        r"two_stage\.reward_walk\.sd: expected a value above 0 up to 0\.5, found 0",
    ),
    (
        "  reward_walk: {sd: 0.025, within: [0.25, 0.75]}",
        "  reward_wlak: {sd: 0.025, within: [0.25, 0.75]}",
        "  reward_wlak:",
        r"unknown key 'reward_wlak'.*did you mean 'reward_walk'",
    ),
    (
        "        to_state: {north: at_north, south: at_south}",
        "        to_state: {north: at_north}",
        "        to_state:",
        r"trial_types\.two_stage_trial\.first\.to_state: no step for state 'south'",
    ),
    (
        "        to_state: {north: at_north, south: at_south}",
        "        to_state: {north: at_north, south: at_north}",
        "        to_state:",
        r"to_state\.south: step 'at_north' must choose exactly the options of state 'south' \(south_port\)",
    ),
    (
        "        to_state: {north: at_north, south: at_south}",
        "        to_state: {north: at_nort, south: at_south}",
        "        to_state: {north: at_nort",
        r"to_state\.north: no step named 'at_nort'; did you mean 'at_north'\?",
    ),
    (
        "        to_state: {north: at_north, south: at_south}\n",
        "        if_rewarded: deliver\n",
        "        choose: [west, east]",
        r"trial_types\.two_stage_trial\.first: a first choice needs 'to_state'",
    ),
    (
        "    do: {reverse: [north_port, south_port]}",
        "    do: {reverse: [west, east]}",
        "    do: {reverse: [west",
        r"'west' is a first-stage option; its outcome comes from the state it leads to, so reverse second-stage",
    ),
    (
        "limits: {max_minutes: 60, max_rewards: 150}",
        "estimator: {model: q_learning}\nlimits: {max_minutes: 60, max_rewards: 150}",
        "estimator:",
        r"estimator\.model: 'q_learning' learns single-stage choices; a two_stage task needs a two-stage model",
    ),
]


@pytest.mark.parametrize(("old", "new", "at", "message"), CASES, ids=[c[3][:40] for c in CASES])
def test_each_mistake_is_one_located_message(old, new, at, message):
    text = edited(old, new)
    found = problems(text)
    assert len(found) == 1, found
    assert re.search(message, found[0]), found[0]
    assert found[0].startswith(f"p.yaml:{line_of(text, at)}:"), (found[0], line_of(text, at))


def test_to_state_without_a_two_stage_section_is_refused():
    text = TEXT.replace(TEXT[TEXT.index("two_stage:\n") : TEXT.index("at_start:")], "")
    found = problems(text)
    assert any("to_state: only meaningful with a two_stage section" in p for p in found), found
