"""Operator controls through the lab-wide store: the page of `vigil serve` asks, the rig that
runs the session claims, applies and answers (the `controls` table, migration 4).

One row per control. Its `status` is NULL while nobody has it, `CLAIMED` once the rig took it
(it is being applied), then the HTTP status the rig answered; the page gives up on a row
still NULL after its wait by writing `EXPIRED`, and the rig never applies a row it could not
claim, so a control asked while a rig was away is not carried out minutes later.
"""

from __future__ import annotations

import json
from typing import Any

from server.store.dialect import Connection, first

CLAIMED = 102
EXPIRED = 504


def session_rig(conn: Connection, session_id: int) -> str | None:
    """The rig that runs (or ran) the session, None when unknown."""
    return first(conn, "SELECT rig FROM sessions WHERE id = ?", (int(session_id),))


def ask(conn: Connection, rig: str, session_id: int, op: str, origin: str, text: str | None, at: str) -> int:
    return int(
        first(
            conn,
            "INSERT INTO controls (rig, session_id, op, text, origin, asked_at) VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
            (rig, int(session_id), op, text, origin, at),
        )
    )


def reply(conn: Connection, control_id: int) -> tuple[int | None, dict[str, Any]]:
    """(status, the rig's answer); status None while waiting, CLAIMED while being applied."""
    row = conn.execute("SELECT status, detail FROM controls WHERE id = ?", (control_id,)).fetchone()
    if row is None:
        return None, {}
    status, detail = row[0], row[1]
    return (None if status is None else int(status)), (json.loads(detail) if detail else {})


def expire(conn: Connection, control_id: int, at: str) -> bool:
    """Give up on a control nobody claimed; False when the rig has it already."""
    cursor = conn.execute(
        "UPDATE controls SET status = ?, answered_at = ? WHERE id = ? AND status IS NULL",
        (EXPIRED, at, control_id),
    )
    return cursor.rowcount == 1


def waiting(conn: Connection, rig: str) -> list[dict[str, Any]]:
    """Controls for this rig that nobody has claimed yet, oldest first."""
    found = conn.execute(
        "SELECT id, session_id, op, text, origin FROM controls WHERE rig = ? AND status IS NULL ORDER BY id",
        (rig,),
    ).fetchall()
    return [{"id": i, "session_id": s, "op": op, "text": text, "origin": origin} for i, s, op, text, origin in found]


def claim(conn: Connection, control_id: int) -> bool:
    cursor = conn.execute("UPDATE controls SET status = ? WHERE id = ? AND status IS NULL", (CLAIMED, control_id))
    return cursor.rowcount == 1


def answer(conn: Connection, control_id: int, answered: dict[str, Any], at: str) -> None:
    conn.execute(
        "UPDATE controls SET status = ?, detail = ?, answered_at = ? WHERE id = ?",
        (int(answered.get("status", 500)), json.dumps(answered), at, control_id),
    )
