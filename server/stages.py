"""Training stages across days: which protocol each animal runs next, and when it moves on.

The store is the memory: `stage_log` says where each animal is, sessions carry the stage
they ran at, and advancement is decided from the stored trials of the last sessions, with
the figures kept as evidence.
"""

from __future__ import annotations

import json
import sqlite3
from dataclasses import asdict
from typing import Any

from server.lab_config import Advance, BoxConfig


def session_figures(conn: sqlite3.Connection, session_id: int) -> dict[str, Any]:
    """Per-session figures the advancement criteria use (interrupted trials left out)."""
    row = conn.execute(
        "SELECT COUNT(*), COALESCE(SUM(rewarded), 0), SUM(correct IS NOT NULL),"
        " COALESCE(SUM(correct), 0), COALESCE(SUM(omission), 0)"
        " FROM trials WHERE session_id = ? AND interrupted = 0",
        (session_id,),
    ).fetchone()
    trials, rewarded, scored, correct, omitted = row
    rewards = conn.execute("SELECT rewards FROM sessions WHERE id = ?", (session_id,)).fetchone()[0]
    return {
        "session": session_id,
        "trials": trials,
        "rewards": rewards,
        "accuracy": (correct / scored) if scored else None,
        "omission_rate": (omitted / trials) if trials else None,
    }


def current_stage(conn: sqlite3.Connection, animal: str) -> int | None:
    """1-based stage the animal is at, or None before its first session."""
    row = conn.execute("SELECT stage FROM stage_log WHERE animal = ? ORDER BY id DESC LIMIT 1", (animal,)).fetchone()
    return None if row is None else int(row[0])


def sessions_at_stage(conn: sqlite3.Connection, animal: str, stage: int, since_log_id: int) -> list[int]:
    """Finished sessions of the animal at this stage since it entered the stage, newest first."""
    rows = conn.execute(
        "SELECT id, settings FROM sessions WHERE animal = ? AND end_reason IS NOT NULL"
        " AND id > COALESCE((SELECT session_id FROM stage_log WHERE id = ?), 0)"
        " ORDER BY started_at DESC, id DESC",
        (animal, since_log_id),
    ).fetchall()
    return [sid for sid, settings in rows if json.loads(settings or "{}").get("stage") == stage]


def meets(figures: dict[str, Any], advance: Advance) -> bool:
    if advance.min_accuracy is not None and (figures["accuracy"] is None or figures["accuracy"] < advance.min_accuracy):
        return False
    if advance.min_trials is not None and figures["trials"] < advance.min_trials:
        return False
    if advance.min_rewards is not None and figures["rewards"] < advance.min_rewards:
        return False
    if advance.max_omission_rate is not None and (
        figures["omission_rate"] is None or figures["omission_rate"] > advance.max_omission_rate
    ):
        return False
    return True


def advancement(conn: sqlite3.Connection, animal: str, stage: int, advance: Advance) -> dict[str, Any] | None:
    """Evidence for moving on from `stage`, or None when the criterion is not met yet."""
    entered = conn.execute(
        "SELECT id FROM stage_log WHERE animal = ? AND stage = ? ORDER BY id DESC LIMIT 1", (animal, stage)
    ).fetchone()
    sessions = sessions_at_stage(conn, animal, stage, entered[0] if entered else 0)[: advance.sessions]
    if len(sessions) < advance.sessions:
        return None
    figures = [session_figures(conn, sid) for sid in sessions]
    if not all(meets(f, advance) for f in figures):
        return None
    criterion = {k: v for k, v in asdict(advance).items() if v is not None}
    return {"criterion": criterion, "sessions": figures}


def stage_history(conn: sqlite3.Connection) -> list[dict[str, Any]]:
    rows = conn.execute(
        "SELECT animal, stage, protocol, at, session_id, reason, evidence FROM stage_log ORDER BY animal, id"
    ).fetchall()
    return [
        {"animal": a, "stage": s, "protocol": p, "at": at, "session": sid, "reason": r, "evidence": json.loads(e)}
        for a, s, p, at, sid, r, e in rows
    ]


def stage_for_box(conn: sqlite3.Connection, box: BoxConfig) -> int:
    """The 1-based stage the box's animal should run now (1 before its first session)."""
    stage = current_stage(conn, box.animal) or 1
    return min(stage, len(box.stages))
