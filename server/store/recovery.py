"""Closing sessions that a crash or a kill left without an end reason."""

from __future__ import annotations

from collections.abc import Collection
from datetime import timedelta
from typing import Any

from server.store import rows
from server.store.export_reads import last_stored_t
from server.store.wall_clock import iso


def close_unended(conn: Any, closed_at: str, running: Collection[int] = (), *, rig: str | None = None) -> list[int]:
    """End every session without an end reason, except `running` (and, with `rig`, except
    other rigs' sessions); return the ids closed.

    Runs inside the caller's transaction. ended_at is started_at plus the last stored time
    (the best evidence of when the session stopped); trials and rewards are counted from the
    stored trials; a note event records `closed_at`, when the closing happened.
    """
    closed = []
    sql = "SELECT id, started_at FROM sessions WHERE end_reason IS NULL"
    params: tuple[Any, ...] = ()
    if rig is not None:
        sql += " AND rig = ?"
        params = (rig,)
    found = conn.execute(sql + " ORDER BY id", params).fetchall()
    for session_id, started_at in found:
        if session_id in running:
            continue
        last_t = last_stored_t(conn, session_id)
        trials, rewards = conn.execute(
            "SELECT count(*), CAST(coalesce(sum(rewarded), 0) AS INTEGER) FROM trials WHERE session_id = ?",
            (session_id,),
        ).fetchone()
        started = rows.parse_wall_time(started_at, f"started_at of session {session_id}")
        ended_at = iso(started + timedelta(seconds=last_t))
        conn.execute(rows.END_SESSION, (ended_at, "interrupted", trials, rewards, session_id))
        conn.execute(
            rows.INSERT_EVENT,
            (
                session_id,
                "note",
                "closed_interrupted",
                None,
                last_t,
                None,
                None,
                rows.to_json({"closed_at": closed_at}, "note"),
            ),
        )
        closed.append(session_id)
    return closed
