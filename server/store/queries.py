"""Read-only views of a Vigil database for the status page, the CLI and exports.

Readers open the file read-only, so a web page or a report can never disturb the writer;
in WAL mode they see every committed transaction without blocking it.
"""

from __future__ import annotations

import csv
import sqlite3
from pathlib import Path
from typing import Any, TextIO
from urllib.request import pathname2url

from server.engine.records import TrialRecord
from server.store import rows
from server.store.errors import StoreError, sqlite_reason
from server.store.schema import latest_version, schema_version

CHOICE_COLUMNS = ("animal", "session", "trial", "choice", "reward")


def open_readonly(path: str | Path, *, check_same_thread: bool = True) -> sqlite3.Connection:
    """Open an existing database for reading; rows come back as `sqlite3.Row`."""
    path = Path(path).absolute()
    if not path.is_file():
        raise StoreError(f"cannot read database {path}: no such file")
    try:
        conn = sqlite3.connect(
            f"file:{pathname2url(str(path))}?mode=ro", uri=True,
            check_same_thread=check_same_thread,
        )
        version = schema_version(conn)
    except sqlite3.Error as err:
        raise StoreError(f"cannot read database {path}: {sqlite_reason(err)}") from None
    if version == 0:
        conn.close()
        raise StoreError(f"cannot read database {path}: not a vigil database")
    if version > latest_version():
        conn.close()
        raise StoreError(
            f"cannot read database {path}: schema version {version} is newer than this vigil "
            f"knows ({latest_version()})"
        )
    conn.row_factory = sqlite3.Row
    return conn


def _dicts(conn: sqlite3.Connection, sql: str, params: tuple = ()) -> list[dict[str, Any]]:
    conn.row_factory = sqlite3.Row
    return [rows.row_dict(row) for row in conn.execute(sql, params)]


# ---------------------------------------------------------------- sessions


def list_sessions(
    conn: sqlite3.Connection,
    *,
    animal: str | None = None,
    box: str | None = None,
    running: bool = False,
    limit: int | None = None,
) -> list[dict[str, Any]]:
    """Sessions, newest first; `running` keeps those without an end reason."""
    where, params = [], []
    if animal is not None:
        where.append("animal = ?")
        params.append(animal)
    if box is not None:
        where.append("box = ?")
        params.append(box)
    if running:
        where.append("end_reason IS NULL")
    sql = "SELECT * FROM sessions"
    if where:
        sql += " WHERE " + " AND ".join(where)
    sql += " ORDER BY started_at DESC, id DESC"
    if limit is not None:
        sql += " LIMIT ?"
        params.append(int(limit))
    return _dicts(conn, sql, tuple(params))


def get_session(conn: sqlite3.Connection, session_id: int) -> dict[str, Any] | None:
    found = _dicts(conn, "SELECT * FROM sessions WHERE id = ?", (session_id,))
    return found[0] if found else None


def animal_history(conn: sqlite3.Connection, animal: str) -> list[dict[str, Any]]:
    """Every session of one animal, oldest first, with accuracy and omissions from its trials.

    accuracy is the fraction correct over trials where correctness applies (None if none).
    """
    return _dicts(conn, (
        "SELECT s.*,"
        " (SELECT avg(correct) FROM trials WHERE session_id = s.id AND correct IS NOT NULL)"
        "   AS accuracy,"
        " (SELECT coalesce(sum(omission), 0) FROM trials WHERE session_id = s.id) AS omissions"
        " FROM sessions s WHERE s.animal = ? ORDER BY s.started_at, s.id"
    ), (animal,))


# ---------------------------------------------------------------- per session


def session_trials(
    conn: sqlite3.Connection, session_id: int, *, after_trial: int = 0
) -> list[dict[str, Any]]:
    return _dicts(
        conn, "SELECT * FROM trials WHERE session_id = ? AND trial > ? ORDER BY trial",
        (session_id, after_trial),
    )


def trial_records(conn: sqlite3.Connection, session_id: int) -> list[TrialRecord]:
    """The session's trials as the engine emitted them, for replay through a model."""
    conn.row_factory = sqlite3.Row
    found = conn.execute(
        "SELECT * FROM trials WHERE session_id = ? ORDER BY trial", (session_id,)
    )
    return [rows.trial_from_row(row) for row in found]


def session_events(
    conn: sqlite3.Connection,
    session_id: int,
    *,
    since_id: int = 0,
    tail: int | None = None,
    kind: str | None = None,
) -> list[dict[str, Any]]:
    """Events in stored order; `since_id` for live polling, `tail` for the last N only."""
    sql = "SELECT * FROM events WHERE session_id = ? AND id > ?"
    params: list[Any] = [session_id, since_id]
    if kind is not None:
        sql += " AND kind = ?"
        params.append(kind)
    if tail is None:
        return _dicts(conn, sql + " ORDER BY id", tuple(params))
    params.append(int(tail))
    return _dicts(conn, f"SELECT * FROM ({sql} ORDER BY id DESC LIMIT ?) ORDER BY id",
                  tuple(params))


def session_blocks(conn: sqlite3.Connection, session_id: int) -> list[dict[str, Any]]:
    return _dicts(conn, "SELECT * FROM blocks WHERE session_id = ? ORDER BY block_index",
                  (session_id,))


def session_estimates(
    conn: sqlite3.Connection, session_id: int, *, after_trial: int = 0
) -> list[dict[str, Any]]:
    return _dicts(
        conn, "SELECT * FROM estimates WHERE session_id = ? AND trial > ? ORDER BY trial",
        (session_id, after_trial),
    )


def session_annotations(conn: sqlite3.Connection, session_id: int) -> list[dict[str, Any]]:
    return _dicts(conn, "SELECT * FROM annotations WHERE session_id = ? ORDER BY id",
                  (session_id,))


# ---------------------------------------------------------------- exports


def _write_csv(cursor: sqlite3.Cursor, header: tuple[str, ...], fileobj: TextIO) -> int:
    # None becomes an empty field; JSON columns stay as their JSON text.
    writer = csv.writer(fileobj, lineterminator="\n")
    writer.writerow(header)
    count = 0
    for row in cursor:
        writer.writerow(["" if value is None else value for value in row])
        count += 1
    return count


def export_trials_csv(conn: sqlite3.Connection, session_id: int, fileobj: TextIO) -> int:
    """Write the session's trials as CSV (one column per trials column); return the row count."""
    cursor = conn.execute(
        f"SELECT {', '.join(rows.TRIAL_COLUMNS)} FROM trials WHERE session_id = ?"
        " ORDER BY trial", (session_id,),
    )
    return _write_csv(cursor, rows.TRIAL_COLUMNS, fileobj)


def export_events_csv(conn: sqlite3.Connection, session_id: int, fileobj: TextIO) -> int:
    """Write the session's events as CSV in stored order; return the row count."""
    cursor = conn.execute(
        f"SELECT {', '.join(rows.EVENT_COLUMNS)} FROM events WHERE session_id = ? ORDER BY id",
        (session_id,),
    )
    return _write_csv(cursor, rows.EVENT_COLUMNS, fileobj)


def export_choices_csv(
    conn: sqlite3.Connection, fileobj: TextIO, *, animal: str | None = None
) -> int:
    """Write trials in the fitting format `animal,session,trial,choice,reward` (DESIGN.md).

    An omission has an empty choice; reward is the pellets delivered in the trial.
    """
    sql = (
        "SELECT s.animal, t.session_id, t.trial, t.choice, t.reward FROM trials t"
        " JOIN sessions s ON s.id = t.session_id"
    )
    params: tuple = ()
    if animal is not None:
        sql += " WHERE s.animal = ?"
        params = (animal,)
    cursor = conn.execute(sql + " ORDER BY s.animal, s.started_at, t.session_id, t.trial", params)
    return _write_csv(cursor, CHOICE_COLUMNS, fileobj)
