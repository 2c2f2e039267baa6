"""What an export reads of a session: whole tables as stored, with their column names and
declared types, so a column a later migration adds is exported without a change here."""

from __future__ import annotations

from typing import Any

from server.store import dialect
from server.store.dialect import Connection
from server.store.errors import StoreError

Columns = list[tuple[str, str]]  # (name, declared SQLite type, upper case; '' when none)

# Latest stored time of a session, whichever table holds it.
# (Both backends: plain placeholders, an aliased subquery; the interrupted-session recovery
# of a lab-wide store runs it too.)
_LAST_T = (
    "SELECT max(t) FROM (SELECT max(t) AS t FROM events WHERE session_id = ?"
    " UNION ALL SELECT max(t_end) FROM trials WHERE session_id = ?"
    " UNION ALL SELECT max(t_start) FROM blocks WHERE session_id = ?) AS latest"
)


def table_columns(conn: Connection, table: str) -> Columns:
    """The columns of `table` in their declared order."""
    return dialect.table_columns(conn, table)


def _table(conn: Connection, table: str, session_id: int, order: str, skip: tuple[str, ...]):
    columns = [c for c in table_columns(conn, table) if c[0] not in skip]
    names = ", ".join(f'"{name}"' for name, _ in columns)
    found = conn.execute(f"SELECT {names} FROM {table} WHERE session_id = ? ORDER BY {order}", (session_id,))
    return columns, [tuple(row) for row in found]


def trial_table(conn: Connection, session_id: int) -> tuple[Columns, list[tuple[Any, ...]]]:
    """Every column of the session's trials but `session_id`, trials in order."""
    return _table(conn, "trials", session_id, "trial", ("session_id",))


def event_table(conn: Connection, session_id: int) -> tuple[Columns, list[tuple[Any, ...]]]:
    """Every column of the session's events but `session_id`, in stored order."""
    return _table(conn, "events", session_id, "id", ("session_id",))


def export_session_ids(conn: Connection, *, session_id: int | None = None, animal: str | None = None) -> list[int]:
    """The sessions to export, oldest first: one, an animal's, or every session.

    Raises StoreError when the session or the animal is not in the database."""
    if session_id is not None:
        if conn.execute("SELECT 1 FROM sessions WHERE id = ?", (session_id,)).fetchone() is None:
            raise StoreError(f"no session {session_id} in the database")
        return [session_id]
    if animal is not None:
        found = conn.execute("SELECT id FROM sessions WHERE animal = ? ORDER BY started_at, id", (animal,)).fetchall()
        if not found:
            raise StoreError(f"no sessions of animal '{animal}' in the database")
        return [int(r[0]) for r in found]
    return [int(r[0]) for r in conn.execute("SELECT id FROM sessions ORDER BY started_at, id")]


def last_stored_t(conn: Connection, session_id: int) -> float:
    """Seconds from session start of the latest thing stored for it (0 when nothing is)."""
    value = conn.execute(_LAST_T, (session_id,) * 3).fetchone()[0]
    return float(value or 0.0)
