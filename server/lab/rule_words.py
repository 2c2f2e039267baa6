"""Rule firings in words: what a rule did and why, as a sentence ("reversed west/east
because p_prefers_correct 0.96 ≥ 0.95 for 5 trials (rule learned)"), never the stored
action data.

A firing is kept as its name, what it did and the values its condition read; the condition
as written and its hold live in the protocol's `Rule`, which the caller passes when it has
the protocol that ran (the lab always does; the page when the file is unchanged).
"""

from __future__ import annotations

import math
from typing import Any

from server.protocol.model import Rule

_VERBS = {
    "switch_block": "switched to block {}",
    "set_iti": "set the ITI to {} s",
    "end_session": "ended the session ({})",
    "note": "noted “{}”",
    "alarm": "raised the alarm “{}”",
}


def _number(value: Any) -> str:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return str(value)
    if math.isfinite(value) and float(value).is_integer():
        return str(int(value))
    return f"{value:.2f}"


def action_words(action: dict[str, Any]) -> list[str]:
    """One stored action (e.g. {"reverse": ["west", "east"]}) in past-tense words."""
    said = []
    for kind, value in action.items():
        if kind == "reverse" and isinstance(value, (list, tuple)):
            said.append("reversed " + "/".join(str(v) for v in value))
        elif kind == "probe" and isinstance(value, dict):
            after = value.get("then") or "end_session"
            said.append(f"started a {_number(value.get('minutes'))}-min probe, then {after}")
        elif kind == "scale_iti":
            said.append(f"scaled the ITI by {_number(value)}")
        elif kind == "scale_now":
            continue  # the running scale, said with scale_iti
        elif kind in _VERBS:
            said.append(_VERBS[kind].format(_number(value) if not isinstance(value, str) else value))
        else:
            said.append(f"{kind} {value}")
    return said


_COMPARISONS = (">=", "<=", "==", "!=", ">", "<")
_SIGNS = {">=": "≥", "<=": "≤", "!=": "≠", "==": "=", ">": ">", "<": "<"}


def condition_words(text: str, reads: dict[str, Any]) -> str:
    """The condition as written with each quantity's value put beside its name, comparison
    signs as printed ("p_prefers_correct 0.96 ≥ 0.95")."""
    out = text
    for sign in _COMPARISONS:  # longest first, so ">=" is not read as ">" then "="
        out = out.replace(f" {sign} ", f" \x00{_COMPARISONS.index(sign)}\x00 ")
    for i, sign in enumerate(_COMPARISONS):
        out = out.replace(f"\x00{i}\x00", _SIGNS[sign])
    for name, value in sorted(reads.items(), key=lambda kv: -len(kv[0])):
        out = out.replace(name, f"{name} {_number(value)}", 1)
    return out


def firing_words(rule: str, actions: Any, reads: dict[str, Any] | None, spec: Rule | None) -> str:
    """A rule firing as a sentence: what it did and why ("reversed west/east because
    p_prefers_correct 0.96 ≥ 0.95 for 5 trials"); the rule's name closes it."""
    done = [w for a in actions or () if isinstance(a, dict) for w in action_words(a)]
    what = "; ".join(done) or "fired"
    reads = reads or {}
    if spec is not None:
        why = condition_words(spec.text, reads)
        if spec.hold_for > 1:
            why += f" for {spec.hold_for} trials"
    else:  # the protocol that ran is not at hand: the values read, without the thresholds
        why = ", ".join(f"{k} {_number(v)}" for k, v in reads.items())
    return f"{what} because {why} (rule {rule})" if why else f"{what} (rule {rule})"
