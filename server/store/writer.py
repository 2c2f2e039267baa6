"""The one writer of a Vigil database: sessions, their record streams, and crash recovery.

Durability contract (DESIGN.md "Nothing lost"): a trial, a block and a session end are
committed as soon as they are written; events are buffered and committed in batches by
`flush_due`, which the caller must call at least every `batch_s` seconds, so every event is on
disk within 2 x `batch_s` (1 s by default). Commits run with `synchronous=FULL`, which survives
power loss as well as a killed process. When the disk is full or failing, nothing buffered is
dropped: the records stay in memory, a `StoreError` says so, and the next flush retries.

One process writes a database at a time; readers use `server.store.queries`.
"""

from __future__ import annotations

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
from server.store import rows, statements
from server.store.errors import StoreError, diagnose_path, sqlite_reason
from server.store.recovery import close_unended
from server.store.schema import migrate
from server.store.wall_clock import iso, local_now

T = TypeVar("T")


def _row_id(cursor: sqlite3.Cursor) -> int:
    """The id of the row a plain INSERT just added (sqlite3 sets it for every one that succeeds)."""
    row_id = cursor.lastrowid
    assert row_id is not None
    return row_id


@dataclass(slots=True)
class _Running:
    started: datetime
    last_trial: int = 0
    ended: bool = False


class Store:
    """Writes sessions and their records; open with `Store.open(path)`."""

    def __init__(
        self,
        conn: sqlite3.Connection,
        path: Path,
        *,
        wall_clock: Callable[[], datetime] = local_now,
        batch_s: float = 0.5,
        max_buffered: int = 10_000,
    ):
        self._conn = conn
        self.path = path
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
    ) -> Store:
        """Open or create the database, migrate it, and prove it is writable.

        Every reason it cannot be used (missing folder, read-only, not a database, newer
        schema, full disk) is a one-line `StoreError` here, before any session starts.
        """
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
        return cls(conn, path, wall_clock=wall_clock, batch_s=batch_s, max_buffered=max_buffered)

    @property
    def conn(self) -> sqlite3.Connection:
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
        )
        session_id = self._commit(lambda conn: _row_id(conn.execute(statements.INSERT_SESSION, params)))
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

        def insert(conn: sqlite3.Connection) -> int:
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
        return self._commit(lambda conn: close_unended(conn, closed_at, running_here))

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
    def _commit(self, then: Callable[[sqlite3.Connection], T]) -> T: ...

    def _commit(self, then: Callable[[sqlite3.Connection], T] | None = None) -> T | None:
        """One transaction: every pending record in order, then `then` (if given).

        A record the database refuses (a constraint) is dropped and reported; a failure of
        the database itself (full disk, i/o error) rolls back and keeps everything pending.
        """
        batch = list(self._pending)
        if not batch and then is None:
            return None
        conn = self._conn
        duplicates: Counter[int] = Counter()
        refused: list[str] = []
        try:
            conn.execute("BEGIN IMMEDIATE")
            for item in batch:
                try:
                    first, *rest = item.statements
                    cursor = conn.execute(*first)
                    for statement in rest:
                        conn.execute(*statement)
                except sqlite3.IntegrityError as err:
                    refused.append(f"{item.what} ({str(err).lower()})")
                    continue
                if item.device_event and cursor.rowcount == 0:
                    duplicates[item.session_id] += 1
            result = then(conn) if then is not None else None
            conn.execute("COMMIT")
        except sqlite3.Error as err:
            self._rollback()
            kept = f"; {len(batch)} record(s) kept in memory, retried at the next flush" if batch else ""
            self.failure = StoreError(f"could not write to {self.path}: {sqlite_reason(err)}{kept}")
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
        if self._conn.in_transaction:
            try:
                self._conn.execute("ROLLBACK")
            except sqlite3.Error:
                pass
