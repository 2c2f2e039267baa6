"""The one writer of a Vigil database: sessions, their record streams, and crash recovery.

Durability contract (DESIGN.md "Nothing lost"): a trial, a block and a session end are
committed as soon as they are written; events are buffered and committed in batches by
`flush_due`, which the caller must call at least every `batch_s` seconds, so every event is on
disk within 2 x `batch_s` (1 s by default). Commits run with `synchronous=FULL`, which survives
power loss as well as a killed process. When the disk is full or failing, nothing buffered is
dropped: the records stay in memory, a `StoreError` says so, and the next flush retries.

One process writes a SQLite database at a time; on PostgreSQL (`Store.open` with a
`postgresql://` URL) several rigs write one database at once, each closing only its own
sessions. A rig's spool is a SQLite store with `journal=True`: every write it commits is also
kept, in the same transaction, in its outbox, which `server.store.forwarder` carries to the
lab-wide store (session ids then come from the rig's number, `id_base`).

Readers use `server.store.queries`.
"""

from __future__ import annotations

import json
import sqlite3
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any, TypeVar, overload

from server.engine.records import (
    BlockStarted,
    EstimateUpdated,
    EventLogged,
    Record,
    RuleFired,
    SessionEnded,
    SessionStarted,
    TrialRecord,
)
from server.store import dialect, rows, statements
from server.store.dialect import Connection, is_server_url
from server.store.errors import StoreError, diagnose_path
from server.store.recovery import close_unended
from server.store.schema import migrate
from server.store.wall_clock import iso, local_now

T = TypeVar("T")

ID_RANGE = 2**32  # session ids of one rig in a lab-wide store: rig number x ID_RANGE + 1 ...


def _row_id(cursor: Any) -> int:
    """The id an `INSERT ... RETURNING id` just added."""
    return int(cursor.fetchone()[0])


class _Fetched:
    """The rows of a statement already read (its cursor is spent)."""

    def __init__(self, found: list[Any]):
        self._rows = found
        self.rowcount = len(found)

    def fetchone(self) -> Any:
        return self._rows[0] if self._rows else None

    def fetchall(self) -> list[Any]:
        return self._rows


class _Journalled:
    """The connection as a spool's transaction sees it: every write that changed something
    is also appended to the outbox, in the same transaction, for forwarding."""

    def __init__(self, conn: Connection):
        self.conn = conn

    def execute(self, sql: str, params: tuple = ()) -> Any:
        if sql.lstrip()[:6].upper() not in ("INSERT", "UPDATE", "DELETE"):
            return self.conn.execute(sql, params)
        cursor: Any = self.conn.execute(sql, params)
        if "RETURNING" in sql:
            cursor = _Fetched(cursor.fetchall())
        if cursor.rowcount != 0:
            self.conn.execute(statements.INSERT_OUTBOX, (sql, json.dumps(list(params))))
        return cursor


@dataclass(slots=True)
class _Running:
    started: datetime
    last_trial: int = 0
    ended: bool = False


class Store:
    """Writes sessions and their records; open with `Store.open(path)`."""

    def __init__(
        self,
        conn: Connection,
        path: Path | str,
        *,
        wall_clock: Callable[[], datetime] = local_now,
        batch_s: float = 0.5,
        max_buffered: int = 10_000,
        rig: str | None = None,
        journal: bool = False,
        id_base: int | None = None,
    ):
        self._conn = conn
        self.path = path  # the file, or the server's URL without its password
        self.rig = rig  # the lab config's `lab:` name, stored with each session
        self.journal = journal  # a rig's spool: keep every write in the outbox
        self.id_base = id_base  # session ids from id_base + 1 on (a rig's range in a lab-wide store)
        self.id_floor = 0  # ... and above any id of that range the server already holds
        self._postgres = dialect.is_postgres(conn)
        self.batch_s = batch_s
        self.max_buffered = max_buffered
        self._wall_clock = wall_clock
        self._pending: list[statements.Pending] = []
        self._sessions: dict[int, _Running] = {}
        self._duplicates: Counter[int] = Counter()
        self._last_flush: float | None = None
        self.failure: StoreError | None = None  # the last failed commit, None once one succeeds

    # ------------------------------------------------------------------ opening

    @classmethod
    def open(
        cls,
        path: str | Path,
        *,
        wall_clock: Callable[[], datetime] = local_now,
        batch_s: float = 0.5,
        max_buffered: int = 10_000,
        rig: str | None = None,
        journal: bool = False,
        id_base: int | None = None,
    ) -> Store:
        """Open or create the database (a SQLite path or a PostgreSQL URL), migrate it, and
        prove it is writable.

        Every reason it cannot be used (missing folder, read-only, not a database, newer
        schema, full disk, server unreachable) is a one-line `StoreError` here, before any
        session starts.
        """
        options: dict[str, Any] = dict(
            wall_clock=wall_clock, batch_s=batch_s, max_buffered=max_buffered, rig=rig, journal=journal, id_base=id_base
        )
        if is_server_url(path):
            return cls._open_server(str(path), options)
        path = Path(path)
        conn: sqlite3.Connection | None = None
        try:
            # Any one thread at a time may write (the lab's writer thread, under its lock).
            conn = sqlite3.connect(path, isolation_level=None, timeout=5.0, check_same_thread=False)
            mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if mode.lower() != "wal":
                raise StoreError(f"write-ahead logging is not available (journal mode {mode})")
            conn.execute("PRAGMA synchronous = FULL")
            conn.execute("PRAGMA foreign_keys = ON")
            version = migrate(conn)
            # Writing proves what reading cannot: the file, its folder and the disk accept data.
            conn.execute("BEGIN IMMEDIATE")
            conn.execute(f"PRAGMA user_version = {version:d}")
            conn.execute("COMMIT")
        except sqlite3.Error as err:
            if conn is not None:
                conn.close()
            raise StoreError(f"cannot use database {path}: {diagnose_path(path, err)}") from None
        except StoreError as err:
            if conn is not None:
                conn.close()
            raise StoreError(f"cannot use database {path}: {err}") from None
        return cls(conn, path, **options)

    @classmethod
    def _open_server(cls, url: str, options: dict[str, Any]) -> Store:
        from server.store.postgres import connect

        conn = connect(url)
        try:
            version = migrate(conn)
            dialect.begin_write(conn)
            dialect.set_schema_version(conn, version)
            conn.execute("COMMIT")
        except StoreError as err:
            conn.close()
            raise StoreError(f"cannot use database {conn.location}: {err}") from None
        except dialect.database_errors(conn) as err:
            conn.close()
            raise StoreError(f"cannot use database {conn.location}: {dialect.reason(err)}") from None
        return cls(conn, conn.location, **options)

    @property
    def conn(self) -> Connection:
        """The writing connection, for tests and maintenance; do not write through it."""
        return self._conn

    # ------------------------------------------------------------------ sessions

    def begin_session(
        self,
        box: str,
        animal: str,
        protocol: str,
        protocol_path: str | None,
        protocol_sha256: str | None,
        seed: int,
        started_at: str | None = None,
        settings: Mapping[str, Any] | None = None,
    ) -> int:
        """Store a new session and return its id; `started_at` defaults to the wall clock now."""
        if started_at is None:
            started_at = iso(self._wall_clock())
        started = rows.parse_wall_time(started_at, "started_at")
        params = (
            str(box),
            str(animal),
            str(protocol),
            None if protocol_path is None else str(protocol_path),
            None if protocol_sha256 is None else str(protocol_sha256),
            started_at,
            rows.integer(seed, "seed"),
            rows.to_json(dict(settings or {}), "session settings"),
            self.rig,
        )

        def insert(conn: Any) -> int:
            if self.id_base is None:
                return _row_id(conn.execute(statements.INSERT_SESSION, params))
            # A rig's own range: the id it gets here is the id it keeps in the lab-wide store.
            base = self.id_base
            last = dialect.first(conn, "SELECT max(id) FROM sessions WHERE id > ? AND id <= ?", (base, base + ID_RANGE))
            session_id = max(last or base, self.id_floor) + 1
            if session_id > base + ID_RANGE:
                raise StoreError(f"rig {self.rig} has used all {ID_RANGE} session ids of its range")
            conn.execute(statements.INSERT_SESSION_WITH_ID, (session_id, *params))
            return session_id

        session_id = self._commit(insert)
        self._sessions[session_id] = _Running(started)
        return session_id

    def write(self, session_id: int, record: Record, *, ended_at: str | None = None) -> None:
        """Store one record of a session's stream.

        Events (and the session-start note) wait for the next flush; trials, blocks and the
        session end commit now, together with every event buffered before them. `ended_at`
        (ISO 8601) applies to `SessionEnded`; by default it is started_at + record.t.
        Raises `StoreError` for a record that cannot be stored, or when the commit fails
        (the record is kept and retried).
        """
        if isinstance(record, EventLogged):
            # Events may still come after the session's end: the box confirming the safe
            # state it was put in, or a device event whose line was replayed late. They are
            # what happened, so they are kept; only the session's own records stop.
            self._begun(session_id)
            self._pending.append(statements.event(session_id, record))
            if len(self._pending) >= self.max_buffered and self.failure is None:
                self._commit()
            return
        running = self._running(session_id)
        if isinstance(record, TrialRecord):
            if record.trial <= running.last_trial:
                raise StoreError(
                    f"trial {record.trial} of session {session_id} is not after trial {running.last_trial}"
                )
            self._pending.append(statements.trial(session_id, record))
            running.last_trial = record.trial
            self._commit()
        elif isinstance(record, BlockStarted):
            self._pending.append(statements.block(session_id, record))
            self._commit()
        elif isinstance(record, SessionStarted):
            note = EventLogged(
                t=record.t,
                kind="note",
                name="session_started",
                detail={"protocol": record.protocol, "seed": record.seed, "first_block": record.first_block},
            )
            self.write(session_id, note)
        elif isinstance(record, SessionEnded):
            self._end(session_id, running, record, ended_at)
        elif isinstance(record, EstimateUpdated):
            self.write_estimate(session_id, record.trial, record.model, record.estimate.to_dict())
        elif isinstance(record, RuleFired):
            self._pending.append(statements.rule_firing(session_id, record))
            self._commit()
        else:
            raise StoreError(f"cannot store a {type(record).__name__} record")

    def _end(self, session_id: int, running: _Running, record: SessionEnded, ended_at: str | None) -> None:
        t = rows.real(record.t, "session end t")
        if ended_at is None:
            ended_at = iso(running.started + timedelta(seconds=t))
        else:
            rows.parse_wall_time(ended_at, "ended_at")
        self._pending.append(statements.session_end(session_id, ended_at, record.reason, record.trials, record.rewards))
        running.ended = True
        self._commit()

    def write_estimate(self, session_id: int, trial: int, model: str, data: Mapping[str, Any]) -> None:
        """Store (or replace) the learning-model estimate after `trial`; commits now."""
        self._pending.append(statements.estimate(session_id, trial, model, data))
        self._commit()

    def write_stage(
        self,
        animal: str,
        stage: int,
        protocol: str,
        at: str,
        reason: str,
        session_id: int | None = None,
        evidence: Mapping[str, Any] | None = None,
    ) -> None:
        """Record that `animal` is now at `stage` (1-based); commits now."""
        rows.parse_wall_time(at, "stage time")
        self._pending.append(statements.stage(animal, stage, protocol, at, reason, session_id, evidence))
        self._commit()

    def write_annotation(
        self,
        session_id: int,
        text: str,
        origin: str,
        *,
        t: float | None = None,
        wall_time: str | None = None,
    ) -> int:
        """Store an operator's note on a session (running or ended); commits now, returns its id.

        `t` is seconds from session start when known; `wall_time` (ISO 8601 with offset)
        defaults to the wall clock now; `origin` says who wrote it (e.g. a client address).
        """
        session_id = rows.integer(session_id, "session id")
        text = str(text)
        if not text.strip():
            raise StoreError("an annotation needs some text")
        wall = iso(self._wall_clock()) if wall_time is None else wall_time
        rows.parse_wall_time(wall, "wall_time")
        params = (session_id, rows.opt_real(t, "annotation t"), wall, str(origin), text)

        def insert(conn: Any) -> int:
            if conn.execute("SELECT 1 FROM sessions WHERE id = ?", (session_id,)).fetchone() is None:
                raise StoreError(f"no session {session_id} to annotate")
            return _row_id(conn.execute(statements.INSERT_ANNOTATION, params))

        return self._commit(insert)

    def close_interrupted(self, now_iso: str | None = None) -> list[int]:
        """End every session left without an end reason (a crash, a kill); return their ids.

        ended_at is started_at plus the last stored time of the session; `now_iso` (default:
        the wall clock) is kept in a note event saying when the session was closed.
        Sessions begun by this store and still running are left alone.
        """
        closed_at = iso(self._wall_clock()) if now_iso is None else now_iso
        rows.parse_wall_time(closed_at, "now_iso")
        running_here = {sid for sid, s in self._sessions.items() if not s.ended}
        # Several rigs share a lab-wide store: each closes only what it left open itself.
        rig = self.rig if self._postgres else None
        return self._commit(lambda conn: close_unended(conn, closed_at, running_here, rig=rig))

    # ------------------------------------------------------------------ flushing

    @property
    def pending(self) -> int:
        """Records written but not yet on disk."""
        return len(self._pending)

    def duplicate_events(self, session_id: int) -> int:
        """Device events of the session ignored because their device_seq was already stored."""
        return self._duplicates[session_id]

    def flush_due(self, now_monotonic: float) -> bool:
        """Commit buffered events if `batch_s` has passed since the last batch; True if it did.

        Call at least every `batch_s` seconds with a monotonic clock reading.
        """
        if not self._pending:
            return False
        if self._last_flush is not None and now_monotonic - self._last_flush < self.batch_s:
            return False
        self._last_flush = now_monotonic
        self._commit()
        return True

    def flush(self) -> None:
        """Commit everything buffered now."""
        self._commit()

    def close(self) -> None:
        """Commit what is buffered and close; if that fails the store stays open to retry."""
        if self._pending:
            self._commit()
        self._conn.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    # ------------------------------------------------------------------ internals

    def _begun(self, session_id: int) -> _Running:
        running = self._sessions.get(session_id)
        if running is None:
            raise StoreError(f"session {session_id} was not begun by this store")
        return running

    def _running(self, session_id: int) -> _Running:
        running = self._begun(session_id)
        if running.ended:
            raise StoreError(f"session {session_id} has already ended")
        return running

    @overload
    def _commit(self) -> None: ...

    @overload
    def _commit(self, then: Callable[[Any], T]) -> T: ...

    def _commit(self, then: Callable[[Any], T] | None = None) -> T | None:
        """One transaction: every pending record in order, then `then` (if given).

        A record the database refuses (a constraint) is dropped and reported; a failure of
        the database itself (full disk, i/o error) rolls back and keeps everything pending.
        """
        batch = list(self._pending)
        if not batch and then is None:
            return None
        conn: Any = _Journalled(self._conn) if self.journal else self._conn
        duplicates: Counter[int] = Counter()
        refused: list[str] = []
        refusals = dialect.refusals(self._conn)
        # PostgreSQL aborts the whole transaction on a refused statement: each record gets a
        # savepoint there, so one refusal drops that record only, as on SQLite.
        savepoints = self._postgres
        try:
            dialect.begin_write(self._conn)
            for item in batch:
                try:
                    if savepoints:
                        conn.execute("SAVEPOINT one_record")
                    first, *rest = item.statements
                    cursor = conn.execute(*first)
                    for statement in rest:
                        conn.execute(*statement)
                    if savepoints:
                        conn.execute("RELEASE SAVEPOINT one_record")
                except refusals as err:
                    if savepoints:
                        conn.execute("ROLLBACK TO SAVEPOINT one_record")
                    refused.append(f"{item.what} ({dialect.reason(err)})")
                    continue
                if item.device_event and cursor.rowcount == 0:
                    duplicates[item.session_id] += 1
            result = then(conn) if then is not None else None
            self._conn.execute("COMMIT")
        except dialect.database_errors(self._conn) as err:
            self._rollback()
            kept = f"; {len(batch)} record(s) kept in memory, retried at the next flush" if batch else ""
            self.failure = StoreError(f"could not write to {self.path}: {dialect.reason(err)}{kept}")
            raise self.failure from None
        except BaseException:
            self._rollback()
            raise
        del self._pending[: len(batch)]
        self.failure = None
        self._duplicates.update(duplicates)
        if refused:
            more = f" and {len(refused) - 1} more" if len(refused) > 1 else ""
            raise StoreError(f"database refused {refused[0]}{more}")
        return result

    def _rollback(self) -> None:
        # SQLite rolls back by itself after some errors (a full disk among them).
        try:
            if self._conn.in_transaction:
                self._conn.execute("ROLLBACK")
        except dialect.database_errors(self._conn):
            pass
