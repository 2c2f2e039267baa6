"""One status tile per box, from the live lab or from the store, and the alarms it raises.

Pure functions: the caller passes the current time in, so the alarm rules are tested
without clocks. A tile is plain JSON-ready data; `shown` turns it into the short texts the
page prints, the same texts for the first render and for every live update.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from datetime import datetime
from typing import Any

from server.lab.status import BoxFacts, alarm_message, rule_text

# End reasons of a session that ran its course; anything else ended it early.
# "time limit" is how databases before the run time limit had its own words spelled it.
_NORMAL_ENDS = ("session time limit", "protocol complete", "trial limit reached", "run time limit", "time limit")
CAP_REASON = "reward cap reached"


@dataclass(frozen=True, slots=True)
class Alarm:
    kind: str  # link_lost, no_response, cap_reached, ended_early, rule_alarm
    text: str


def ended_early(reason: str | None) -> bool:
    if reason is None or reason == CAP_REASON:
        return False
    return not any(reason == normal or reason.startswith(normal + " ") for normal in _NORMAL_ENDS)


def alarms_for(
    *,
    running: bool,
    paused: bool,
    link_lost: bool,
    silent_s: float | None,
    cap_reached: bool,
    end_reason: str | None,
    quiet_after_s: float,
    rule_alarm: str | None = None,
) -> list[Alarm]:
    """The alarms of one box. `silent_s` is the time since the last input onset (or since
    the start when there was none); a paused or ended session raises no silence alarm.
    `rule_alarm` is the message of the last alarm a protocol rule raised (while running)."""
    found = []
    if link_lost and running:
        found.append(Alarm("link_lost", "link lost"))
    if running and not paused and silent_s is not None and silent_s >= quiet_after_s:
        found.append(Alarm("no_response", f"no response for {silent_s / 60:.0f} min"))
    if cap_reached or end_reason == CAP_REASON:
        found.append(Alarm("cap_reached", "reward cap reached"))
    if ended_early(end_reason):
        found.append(Alarm("ended_early", f"ended early: {end_reason}"))
    if rule_alarm and running:
        found.append(Alarm("rule_alarm", f"rule alarm: {rule_alarm}"))
    return found


def _tile(**fields: Any) -> dict[str, Any]:
    fields["alarms"] = [asdict(a) for a in fields["alarms"]]
    return fields


# ---------------------------------------------------------------- from the live lab


def tile_from_facts(facts: BoxFacts, now: float, quiet_after_s: float) -> dict[str, Any]:
    """A live tile from a box's facts (server/lab/status.py) at session time `now` (ignored once the session has
    ended: its tile stops at the end)."""
    finished = facts["finished"]
    if finished and facts["ended_at"] is not None:
        now = facts["ended_at"]
    paused = facts["paused"]
    last_input = facts["last_input_t"]
    since_input = None if last_input is None else max(0.0, now - last_input)
    scored = facts["scored"]
    return _tile(
        box=facts["box"],
        animal=facts["animal"],
        protocol=facts["protocol"],
        session_id=facts["session_id"],
        live=True,
        state="ended" if finished else ("paused" if paused else "running"),
        block=facts["block"],
        step=facts["step"],
        trial=facts["trial"],
        trials_done=facts["trials_done"],
        rewards=facts["rewards"],
        accuracy=(facts["correct"] / scored) if scored else None,
        elapsed_s=now,
        remaining_s=None if finished else max(0.0, facts["limit_s"] - now),
        since_input_s=since_input,
        link="lost" if facts["link_lost"] else "up",
        last_rule=facts["last_rule"],
        end_reason=facts["end_reason"],
        alarms=alarms_for(
            running=not finished,
            paused=paused,
            link_lost=facts["link_lost"],
            silent_s=since_input if since_input is not None else now,
            cap_reached=facts["cap_reached"],
            end_reason=facts["end_reason"],
            quiet_after_s=quiet_after_s,
            rule_alarm=facts["rule_alarm"],
        ),
    )


# ---------------------------------------------------------------- from the store


def tile_from_store(
    session: dict[str, Any],
    status: dict[str, Any],
    last_rule: dict[str, Any] | None,
    now: datetime,
    quiet_after_s: float,
) -> dict[str, Any]:
    """A tile from a stored session row and `queries.session_status`, at wall time `now`.

    The store cannot tell a session still running in another process from one whose
    process died; both show as running until the next run closes it as interrupted.
    """
    started = datetime.fromisoformat(session["started_at"])
    end_reason = session["end_reason"]
    running = end_reason is None
    if running:
        elapsed = max(0.0, (now - started).total_seconds())
    elif session["ended_at"]:
        elapsed = max(0.0, (datetime.fromisoformat(session["ended_at"]) - started).total_seconds())
    else:
        elapsed = status["last_t"] or 0.0
    caps = (session.get("settings") or {}).get("caps") or {}
    max_minutes = caps.get("max_minutes")
    remaining = None
    if running and isinstance(max_minutes, (int, float)):
        remaining = max(0.0, max_minutes * 60.0 - elapsed)
    last_input = status["last_input_t"]
    since_input = max(0.0, elapsed - last_input) if (running and last_input is not None) else None
    paused = bool(status.get("paused")) and running
    rule = None
    if last_rule is not None:
        rule = {"t": last_rule["t"], "text": rule_text(last_rule["rule"], last_rule["actions"])}
    alarm = status.get("alarm")
    return _tile(
        box=session["box"],
        animal=session["animal"],
        protocol=session["protocol"],
        session_id=session["id"],
        live=False,
        state="paused" if paused else ("running" if running else "ended"),
        block=status["block"],
        step=None,
        trial=session["trials"],
        trials_done=session["trials"],
        rewards=session["rewards"],
        accuracy=status["accuracy"],
        elapsed_s=elapsed,
        remaining_s=remaining,
        since_input_s=since_input,
        link="lost" if status["link_lost"] else "unknown",
        last_rule=rule,
        end_reason=end_reason,
        alarms=alarms_for(
            running=running,
            paused=paused,
            link_lost=status["link_lost"],
            silent_s=since_input if since_input is not None else (elapsed if running else None),
            cap_reached=status["cap_events"] > 0,
            end_reason=end_reason,
            quiet_after_s=quiet_after_s,
            rule_alarm=None if alarm is None else alarm_message(alarm["detail"]),
        ),
    )


# ---------------------------------------------------------------- texts


def clock_text(seconds: float | None) -> str:
    """h:mm:ss or m:ss."""
    if seconds is None or not math.isfinite(seconds):
        return "–"
    whole = int(seconds)
    h, rest = divmod(whole, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def ago_text(seconds: float | None) -> str:
    if seconds is None:
        return "none yet"
    if seconds < 90:
        return f"{seconds:.0f} s ago"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min ago"
    return f"{seconds / 3600:.1f} h ago"


def shown(tile: dict[str, Any]) -> dict[str, str]:
    """The tile's fields as the page prints them (keys match `data-f` in the markup)."""
    accuracy = tile["accuracy"]
    state = tile["state"]
    rule = tile["last_rule"]
    if state == "ended":
        state_text = f"ended – {tile['end_reason']}"
    else:
        state_text = state
    return {
        "state": state_text,
        "protocol": tile["protocol"],
        "block": tile["block"] or "–",
        "trial": str(tile["trial"]),
        "rewards": str(tile["rewards"]),
        "accuracy": "–" if accuracy is None else f"{100 * accuracy:.0f}\u202f%",
        "elapsed": clock_text(tile["elapsed_s"]),
        "remaining": "–" if tile["remaining_s"] is None else clock_text(tile["remaining_s"]),
        "since_input": "–" if tile["state"] == "ended" else ago_text(tile["since_input_s"]),
        "step": tile["step"] or "–",
        "link": {"up": "connected", "lost": "LOST", "unknown": "not live"}[tile["link"]],
        "last_rule": "none" if rule is None else f"{clock_text(rule['t'])} {rule['text']}",
    }
