"""Training stages as the store keeps them: where each animal is, which sessions it ran at
each stage, and the per-session figures that advancement is judged on."""

from __future__ import annotations

import json
from typing import Any

from server.store.dialect import Connection


def session_figures(conn: Connection, session_id: int) -> dict[str, Any]:
    """Per-session figures the advancement criteria use (interrupted trials left out)."""
    row = conn.execute(
        "SELECT COUNT(*), CAST(COALESCE(SUM(rewarded), 0) AS INTEGER), COUNT(correct),"
        " CAST(COALESCE(SUM(correct), 0) AS INTEGER), CAST(COALESCE(SUM(omission), 0) AS INTEGER)"
        " FROM trials WHERE session_id = ? AND interrupted = 0",
        (session_id,),
    ).fetchone()
    trials, _rewarded, scored, correct, omitted = row
    rewards = conn.execute("SELECT rewards FROM sessions WHERE id = ?", (session_id,)).fetchone()[0]
    return {
        "session": session_id,
        "trials": trials,
        "rewards": rewards,
        "accuracy": (correct / scored) if scored else None,
        "omission_rate": (omitted / trials) if trials else None,
    }


def current_stage(conn: Connection, animal: str) -> int | None:
    """1-based stage the animal is at, or None before its first session."""
    row = conn.execute("SELECT stage FROM stage_log WHERE animal = ? ORDER BY id DESC LIMIT 1", (animal,)).fetchone()
    return None if row is None else int(row[0])


def stage_entered(conn: Connection, animal: str, stage: int) -> int:
    """The stage-log id of the animal's latest entry into `stage` (0 when never logged)."""
    row = conn.execute(
        "SELECT id FROM stage_log WHERE animal = ? AND stage = ? ORDER BY id DESC LIMIT 1", (animal, stage)
    ).fetchone()
    return int(row[0]) if row else 0


def sessions_at_stage(conn: Connection, animal: str, stage: int, since_log_id: int) -> list[int]:
    """Finished sessions of the animal at this stage since it entered the stage, newest first."""
    rows = conn.execute(
        "SELECT id, settings FROM sessions WHERE animal = ? AND end_reason IS NOT NULL"
        " AND id > COALESCE((SELECT session_id FROM stage_log WHERE id = ?), 0)"
        " ORDER BY started_at DESC, id DESC",
        (animal, since_log_id),
    ).fetchall()
    return [sid for sid, settings in rows if json.loads(settings or "{}").get("stage") == stage]


def stage_history(conn: Connection) -> list[dict[str, Any]]:
    rows = conn.execute(
        "SELECT animal, stage, protocol, at, session_id, reason, evidence FROM stage_log ORDER BY animal, id"
    ).fetchall()
    return [
        {"animal": a, "stage": s, "protocol": p, "at": at, "session": sid, "reason": r, "evidence": json.loads(e)}
        for a, s, p, at, sid, r, e in rows
    ]
