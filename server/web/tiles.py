"""One status tile per box, from the live lab or from the store, and the alarms it raises.

Pure functions: the caller passes the current time in, so the alarm rules are tested
without clocks. A tile is plain JSON-ready data; `shown` turns it into the short texts the
page prints, the same texts for the first render and for every live update.
"""

from __future__ import annotations

import math
from dataclasses import asdict
from datetime import datetime
from typing import Any

from server.lab.status import CAP_REASON, Alarm, BoxFacts, alarm_message, alarms_for, ended_early, rule_text
from server.protocol.model import Rule

__all__ = ["CAP_REASON", "Alarm", "alarms_for", "ended_early", "tile_from_facts", "tile_from_store"]


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
        max_rewards=facts.get("max_rewards"),
        reversals=facts.get("reversals"),
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


def session_limits(settings: dict[str, Any] | None) -> dict[str, Any]:
    """What bound a stored session: its limits within the lab's caps (older stores kept
    only the caps)."""
    settings = settings or {}
    return {**(settings.get("caps") or {}), **(settings.get("limits") or {})}


def tile_from_store(
    session: dict[str, Any],
    status: dict[str, Any],
    last_rule: dict[str, Any] | None,
    now: datetime,
    quiet_after_s: float,
    reversals: int | None = None,
    rule_spec: Rule | None = None,
) -> dict[str, Any]:
    """A tile from a stored session row and `queries.session_status`, at wall time `now`;
    `reversals` counts the session's rule firings that reversed the options; `rule_spec` is
    the last firing's rule as the protocol wrote it, when the protocol is at hand.

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
    settings = session.get("settings") or {}
    # what binds the session: its limits within the lab's caps (older stores: the caps)
    limits = session_limits(settings)
    # the session ends at its limit or at the run's --minutes, whichever comes first
    bounds = [m for m in (limits.get("max_minutes"), settings.get("run_minutes")) if isinstance(m, (int, float))]
    max_rewards = limits.get("max_rewards")
    remaining = None
    if running and bounds:
        remaining = max(0.0, min(bounds) * 60.0 - elapsed)
    last_input = status["last_input_t"]
    since_input = max(0.0, elapsed - last_input) if (running and last_input is not None) else None
    paused = bool(status.get("paused")) and running
    rule = None
    if last_rule is not None:
        said = rule_text(last_rule["rule"], last_rule["actions"], last_rule.get("reads"), rule_spec)
        rule = {"t": last_rule["t"], "text": said}
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
        max_rewards=max_rewards if isinstance(max_rewards, int) else None,
        reversals=reversals,
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


def rewards_text(rewards: int, cap: int | None) -> str:
    """Rewards delivered against the session's cap, "16/200" (the count alone without one)."""
    return f"{rewards}/{cap}" if cap is not None else str(rewards)


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
        "rewards": rewards_text(tile["rewards"], tile.get("max_rewards")),
        "reversals": "–" if tile.get("reversals") is None else str(tile["reversals"]),
        "accuracy": "–" if accuracy is None else f"{100 * accuracy:.0f}\u202f%",
        "elapsed": clock_text(tile["elapsed_s"]),
        "remaining": "–" if tile["remaining_s"] is None else clock_text(tile["remaining_s"]),
        "since_input": "–" if tile["state"] == "ended" else ago_text(tile["since_input_s"]),
        "step": tile["step"] or "–",
        "link": {"up": "connected", "lost": "LOST", "unknown": "not live"}[tile["link"]],
        "last_rule": "none" if rule is None else f"{clock_text(rule['t'])} {rule['text']}",
    }
