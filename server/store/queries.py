"""Read-only views of a Vigil database for the status page, the CLI and exports.

Readers open the file read-only, so a web page or a report can never disturb the writer;
in WAL mode they see every committed transaction without blocking it. A PostgreSQL URL
opens a read-only session on the server instead; the queries are the same.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path
from typing import Any
from urllib.request import pathname2url

from server.engine.records import TrialRecord
from server.store import dialect, rows
from server.store.dialect import Connection, is_server_url
from server.store.errors import StoreError, sqlite_reason
from server.store.schema import latest_version, schema_version


def open_readonly(path: str | Path, *, check_same_thread: bool = True) -> Connection:
    """Open an existing database (a file or a PostgreSQL URL) for reading; rows read by
    position and by column name (`sqlite3.Row`, or `postgres.PgRow`)."""
    if is_server_url(path):
        return _open_server_readonly(str(path))
    path = Path(path).absolute()
    if not path.is_file():
        raise StoreError(f"cannot read database {path}: no such file")
    try:
        conn = sqlite3.connect(
            f"file:{pathname2url(str(path))}?mode=ro",
            uri=True,
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
            f"cannot read database {path}: schema version {version} is newer than this vigil knows ({latest_version()})"
        )
    conn.row_factory = sqlite3.Row
    return conn


def _open_server_readonly(url: str) -> Connection:
    from server.store.postgres import connect

    conn = connect(url, readonly=True, application="vigil-reader")
    try:
        version = dialect.schema_version(conn)
    except dialect.database_errors(conn) as err:
        conn.close()
        raise StoreError(f"cannot read database {conn.location}: {dialect.reason(err)}") from None
    if version == 0 or version > latest_version():
        conn.close()
        what = "not a vigil database" if version == 0 else f"schema version {version} is newer than this vigil knows"
        raise StoreError(f"cannot read database {conn.location}: {what}")
    return conn


def _dicts(conn: Connection, sql: str, params: tuple = ()) -> list[dict[str, Any]]:
    conn.row_factory = sqlite3.Row
    return [rows.row_dict(row) for row in conn.execute(sql, params)]


# ---------------------------------------------------------------- sessions


def list_sessions(
    conn: Connection,
    *,
    animal: str | None = None,
    box: str | None = None,
    running: bool = False,
    limit: int | None = None,
) -> list[dict[str, Any]]:
    """Sessions, newest first; `running` keeps those without an end reason."""
    where: list[str] = []
    params: list[str | int] = []
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


def get_session(conn: Connection, session_id: int) -> dict[str, Any] | None:
    found = _dicts(conn, "SELECT * FROM sessions WHERE id = ?", (session_id,))
    return found[0] if found else None


# sessions with their accuracy and omissions, from their trials (the casts keep both
# backends' answers plain numbers: PostgreSQL's avg and sum of integers are decimals)
_HISTORY = (
    "SELECT s.*,"
    " (SELECT avg(CAST(correct AS DOUBLE PRECISION)) FROM trials"
    "   WHERE session_id = s.id AND correct IS NOT NULL) AS accuracy,"
    " (SELECT CAST(coalesce(sum(omission), 0) AS INTEGER) FROM trials WHERE session_id = s.id) AS omissions"
    " FROM sessions s"
)


def animal_history(conn: Connection, animal: str) -> list[dict[str, Any]]:
    """Every session of one animal, oldest first, with accuracy and omissions from its trials.

    accuracy is the fraction correct over trials where correctness applies (None if none).
    """
    return _dicts(conn, _HISTORY + " WHERE s.animal = ? ORDER BY s.started_at, s.id", (animal,))


def list_animals(conn: Connection) -> list[dict[str, Any]]:
    """Every animal with a session: how many, the first and last start, the last box and
    protocol, and every protocol it ran (oldest first), ordered by animal."""
    found = _dicts(
        conn,
        (
            "SELECT s.animal, count(*) AS sessions, min(s.started_at) AS first_at, max(s.started_at) AS last_at,"
            " (SELECT box FROM sessions WHERE animal = s.animal ORDER BY started_at DESC, id DESC LIMIT 1) AS box,"
            " (SELECT protocol FROM sessions WHERE animal = s.animal ORDER BY started_at DESC, id DESC LIMIT 1)"
            "   AS protocol"
            " FROM sessions s GROUP BY s.animal ORDER BY s.animal"
        ),
    )
    ran: dict[str, list[str]] = {}
    for animal, protocol in conn.execute("SELECT animal, protocol FROM sessions ORDER BY started_at, id"):
        if protocol not in ran.setdefault(animal, []):
            ran[animal].append(protocol)
    for row in found:
        row["protocols"] = ran.get(row["animal"], [])
    return found


def protocol_history(conn: Connection, protocol: str) -> list[dict[str, Any]]:
    """Every session that ran protocol `protocol` (by name), each animal's oldest first, with
    accuracy and omissions as in `animal_history`."""
    return _dicts(conn, _HISTORY + " WHERE s.protocol = ? ORDER BY s.animal, s.started_at, s.id", (protocol,))


# ---------------------------------------------------------------- per session


def session_trials(conn: Connection, session_id: int, *, after_trial: int = 0) -> list[dict[str, Any]]:
    return _dicts(
        conn,
        "SELECT * FROM trials WHERE session_id = ? AND trial > ? ORDER BY trial",
        (session_id, after_trial),
    )


def trial_records(conn: Connection, session_id: int) -> list[TrialRecord]:
    """The session's trials as the engine emitted them, for replay through a model."""
    conn.row_factory = sqlite3.Row
    found = conn.execute("SELECT * FROM trials WHERE session_id = ? ORDER BY trial", (session_id,))
    return [rows.trial_from_row(row) for row in found]


def session_events(
    conn: Connection,
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
    return _dicts(conn, f"SELECT * FROM ({sql} ORDER BY id DESC LIMIT ?) AS tail ORDER BY id", tuple(params))


def session_blocks(conn: Connection, session_id: int) -> list[dict[str, Any]]:
    return _dicts(conn, "SELECT * FROM blocks WHERE session_id = ? ORDER BY block_index", (session_id,))


def session_estimates(conn: Connection, session_id: int, *, after_trial: int = 0) -> list[dict[str, Any]]:
    return _dicts(
        conn,
        "SELECT * FROM estimates WHERE session_id = ? AND trial > ? ORDER BY trial",
        (session_id, after_trial),
    )


def session_annotations(conn: Connection, session_id: int) -> list[dict[str, Any]]:
    return _dicts(conn, "SELECT * FROM annotations WHERE session_id = ? ORDER BY id", (session_id,))


# ---------------------------------------------------------------- status page


def table_exists(conn: Connection, name: str) -> bool:
    """True when the database holds table `name` (tables added by later migrations)."""
    return dialect.table_exists(conn, name)


def latest_sessions_per_box(conn: Connection) -> list[dict[str, Any]]:
    """The newest session of every box, ordered by box name (by rig, then box, in a store
    that several rigs write: two rigs may each have a box of the same name)."""
    if dialect.schema_version(conn) >= 5:  # the rig column
        return _dicts(
            conn,
            (
                "SELECT s.* FROM sessions s WHERE s.id = (SELECT s2.id FROM sessions s2"
                " WHERE s2.box = s.box AND coalesce(s2.rig, '') = coalesce(s.rig, '')"
                " ORDER BY s2.started_at DESC, s2.id DESC LIMIT 1)"
                " ORDER BY coalesce(s.rig, ''), s.box"
            ),
        )
    return _dicts(
        conn,
        (
            "SELECT s.* FROM sessions s WHERE s.id = (SELECT s2.id FROM sessions s2"
            " WHERE s2.box = s.box ORDER BY s2.started_at DESC, s2.id DESC LIMIT 1)"
            " ORDER BY s.box"
        ),
    )


def rig_states(conn: Connection) -> list[dict[str, Any]]:
    """The rigs that write to a lab-wide store, by name, with when each was last heard from
    (empty for a one-computer store)."""
    if not table_exists(conn, "rigs"):
        return []
    return _dicts(conn, "SELECT name, registered_at, seen_at, store_state FROM rigs ORDER BY name")


def session_status(conn: Connection, session_id: int) -> dict[str, Any]:
    """What a status tile needs from the store about one session.

    accuracy (None without scored trials), last_input_t and last_t (session seconds of the
    last input onset and of the last stored event; None when there is none), block (the block
    entered last), link_lost (the last link event
    was a loss), cap_events (count of cap events), paused (the last pause/resume was a pause),
    alarm (the last alarm event raised by a rule, with its t and detail, or None).
    """
    one = conn.execute
    accuracy = one(
        "SELECT avg(CAST(correct AS DOUBLE PRECISION)) FROM trials WHERE session_id = ? AND correct IS NOT NULL",
        (session_id,),
    ).fetchone()[0]
    last_input = one(
        "SELECT max(t) FROM events WHERE session_id = ? AND kind = 'input' AND value > 0",
        (session_id,),
    ).fetchone()[0]
    last = one("SELECT t FROM events WHERE session_id = ? ORDER BY id DESC LIMIT 1", (session_id,)).fetchone()
    last_t = last[0] if last else None
    block = one(
        "SELECT block FROM blocks WHERE session_id = ? ORDER BY block_index DESC LIMIT 1",
        (session_id,),
    ).fetchone()
    link = one(
        "SELECT kind FROM events WHERE session_id = ? AND kind IN ('link_lost', 'link_restored')"
        " ORDER BY id DESC LIMIT 1",
        (session_id,),
    ).fetchone()
    caps = one("SELECT count(*) FROM events WHERE session_id = ? AND kind = 'cap'", (session_id,)).fetchone()[0]
    pause = one(
        "SELECT kind FROM events WHERE session_id = ? AND kind IN ('pause', 'resume') ORDER BY id DESC LIMIT 1",
        (session_id,),
    ).fetchone()
    alarm = one(
        "SELECT t, detail FROM events WHERE session_id = ? AND kind = 'alarm' ORDER BY id DESC LIMIT 1",
        (session_id,),
    ).fetchone()
    return {
        "alarm": None if alarm is None else {"t": alarm[0], "detail": rows.from_json(alarm[1])},
        "accuracy": accuracy,
        "last_input_t": last_input,
        "last_t": last_t,
        "block": block[0] if block else None,
        "link_lost": bool(link) and link[0] == "link_lost",
        "cap_events": caps,
        "paused": bool(pause) and pause[0] == "pause",
    }


def last_estimate(conn: Connection, session_id: int) -> dict[str, Any] | None:
    """The estimate after the session's last estimated trial, or None."""
    found = _dicts(
        conn,
        "SELECT * FROM estimates WHERE session_id = ? ORDER BY trial DESC LIMIT 1",
        (session_id,),
    )
    return found[0] if found else None


def session_rule_firings(conn: Connection, session_id: int) -> list[dict[str, Any]]:
    """Rule firings of a session in time order (t, trial, rule, actions, reads; JSON decoded);
    empty when the database predates the rule_firings table."""
    if not table_exists(conn, "rule_firings"):  # a database from before rules existed
        return []
    found = _dicts(conn, "SELECT * FROM rule_firings WHERE session_id = ? ORDER BY t, id", (session_id,))
    for row in found:
        for key in ("actions", "reads"):
            if isinstance(row.get(key), str):
                row[key] = rows.from_json(row[key])
    return found
