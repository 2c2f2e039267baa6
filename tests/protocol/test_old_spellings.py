"""Renamed keys: the old spelling still loads, to the same protocol, with a warning naming
the new one; giving both is an error. (Read until the next format version.)"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import pytest

from server.protocol.load import parse_protocol
from server.protocol.problems import InvalidFile

PROTOCOLS = Path(__file__).resolve().parents[2] / "protocols"


def old_spelling(text: str) -> str:
    """The file as it was written before the renames: every `do:` and `on_met:` a `then:`."""
    return text.replace("    do: {", "    then: {").replace(", on_met: reward}", ", then: reward}")


@pytest.mark.parametrize("name", ["reversal", "lever_training_devaluation", "autoshaping"])
def test_old_spellings_compile_to_the_same_protocol_with_warnings(name):
    text = (PROTOCOLS / f"{name}.yaml").read_text()
    new = parse_protocol(text, f"{name}.yaml")
    old = parse_protocol(old_spelling(text), f"{name}.yaml")
    assert new.warnings == ()
    assert old.warnings
    assert replace(old, warnings=(), sha256="") == replace(new, sha256="")
    lines = old_spelling(text).splitlines()
    for warning in old.warnings:
        assert "now called" in warning.message
        assert lines[warning.mark.line - 1][warning.mark.col - 1 :].startswith("then:")
        new_name = warning.message.split("now called '")[1].split("'")[0]
        assert new_name in ("do", "on_met")


def test_probe_then_is_now_after():
    text = (PROTOCOLS / "lever_training_devaluation.yaml").read_text()
    text = text.replace("do: {probe: {minutes: 5}}", "do: {probe: {minutes: 5, then: end_session}}")
    protocol = parse_protocol(text, "p.yaml")
    (warning,) = protocol.warnings
    assert "'then' is now called 'after'" in warning.message
    assert [a.kind for r in protocol.rules for a in r.actions] == ["probe"]


def test_both_spellings_at_once_is_an_error():
    text = (PROTOCOLS / "reversal.yaml").read_text()
    rule = "    do: {reverse: [west, east]}\n"
    text = text.replace(rule, rule + "    then: {alarm: x}\n", 1)
    with pytest.raises(InvalidFile) as info:
        parse_protocol(text, "p.yaml")
    (problem,) = info.value.problems
    assert "'then' is the old name of 'do'; give only 'do'" in problem.message
