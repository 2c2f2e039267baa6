"""What the pages say in words: rule firings as sentences, and each model quantity with a
plain-language subtitle.

A rule firing is stored as its name, what it did and the values its condition read; the
condition as written and its hold ("for 5 trials") live in the protocol, which the page
reads when the session's protocol file is still the one that ran (`session_protocol`).
"""

from __future__ import annotations

import math
from typing import Any

from server.protocol.model import Rule

# name -> (title, what it means for the animal); a model's own description is the fallback
QUANTITIES: dict[str, tuple[str, str]] = {
    "alpha": ("learning rate α", "how far one outcome moves the learned value; higher = forgets older outcomes faster"),
    "alpha_pos": ("learning rate α+", "update after a better-than-expected outcome; higher = learns faster from wins"),
    "alpha_neg": ("learning rate α−", "update after a worse-than-expected outcome; higher = learns faster from losses"),
    "beta": ("inverse temperature β", "choice consistency; higher = exploits more, lower = explores more"),
    "kappa": ("perseveration κ", "bonus for repeating the previous choice; negative = tends to alternate"),
    "decay": ("forgetting rate", "how fast unchosen values drift back; higher = forgets faster"),
    "exploration": (
        "exploration",
        "predicted probability of not choosing the best option next; higher = explores more",
    ),
}

_VERBS = {
    "switch_block": "switched to block {}",
    "set_iti": "set the ITI to {} s",
    "end_session": "ended the session ({})",
    "note": "noted “{}”",
    "alarm": "raised the alarm “{}”",
}


def quantity(name: str) -> tuple[str, str]:
    """The title and plain-language subtitle of a model quantity."""
    return QUANTITIES.get(name, (name, "model quantity"))


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
