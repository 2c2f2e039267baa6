"""What the session core keeps for the operator's pause, and what a carried-out rule action
reports in its firing record."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from server.protocol.model import RuleAction


@dataclass(frozen=True, slots=True)
class PauseState:
    """A pause in progress: when it began and which held outputs to switch back on."""

    since: float
    outputs: frozenset[str]


def action_done(action: RuleAction, iti_scale: float) -> dict[str, Any]:
    """What one carried-out rule action did, as its firing record keeps it."""
    kind = action.kind
    if kind == "switch_block":
        return {"switch_block": action.block}
    if kind == "reverse":
        assert action.options is not None
        return {"reverse": list(action.options)}
    if kind == "probe":
        return {"probe": {"minutes": action.minutes, "after": action.block or "end_session"}}
    if kind == "set_iti":
        return {"set_iti": action.seconds}
    if kind == "scale_iti":
        return {"scale_iti": action.factor, "scale_now": iti_scale}
    return {kind: action.message}  # end_session, note, alarm
