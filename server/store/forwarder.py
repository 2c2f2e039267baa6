"""A rig's link to the lab-wide store: the spool's outbox carried to PostgreSQL, in order,
each entry exactly once, and the rig's controls polled on the same connection.

Every write the rig commits lands first in its local SQLite spool (the same durability as a
SQLite lab: events within a second, each trial when it ends, `synchronous=FULL`) together
with an outbox entry. This thread sends the entries after the server's mark for this rig
(`forwarded.seq`) and moves that mark in the same PostgreSQL transaction, so a commit lost
on the way (server killed, cable pulled) is sent again and applied once: idempotent by rig
and outbox sequence, and each session's rows come in the rig's own order. While the server
is unreachable the spool just grows; the forwarder retries with a capped backoff and
`status()` says so, which the page shows as its store line (and a later alarm can read).
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from server.store import controls, dialect
from server.store.errors import StoreError
from server.store.schema import migrate
from server.store.wall_clock import wall_now

BATCH = 500  # outbox entries per server transaction
EVERY_S = 0.25  # a pass: forward what is new, poll controls
RETRY_MAX_S = 2.0  # longest wait between reconnect attempts
HEARTBEAT_S = 2.0
PRUNE_EVERY_S = 30.0


@dataclass(frozen=True, slots=True)
class StoreLink:
    """What the rig knows of its link to the lab-wide store, for the page and alarms."""

    reachable: bool
    waiting: int  # outbox entries not yet on the server
    since: str | None  # ISO 8601: unreachable since (None while reachable)
    problem: str | None  # the last reason it could not forward

    def text(self) -> str:
        if not self.reachable:
            since = f" since {self.since[11:19]}" if self.since else ""
            return f"store: unreachable{since}, {self.waiting} waiting"
        if self.waiting:
            return f"store: forwarding {self.waiting}"
        return "store: up to date"


ControlHandler = Callable[[dict[str, Any]], None]


class Forwarder:
    def __init__(
        self,
        spool_path: str | Path,
        url: str,
        rig: str,
        *,
        say: Callable[[str], None] = print,
        every_s: float = EVERY_S,
    ):
        self.spool_path = Path(spool_path)
        self.url = url
        self.rig = rig
        self.say = say
        self.every_s = every_s
        self.on_control: ControlHandler | None = None  # called on this thread, once per control
        self._spool: Any = None
        self._server: Any = None
        self._mark = 0
        self._last_seq = 0
        self._since: str | None = None
        self._problem: str | None = None
        self._answers: list[tuple[int, dict[str, Any]]] = []
        self._handed: set[int] = set()
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._thread = threading.Thread(target=self._run, name="vigil-forward", daemon=True)
        self._retry_s = 0.1
        self._next_try = 0.0
        self._drain_until = 0.0
        self._last_beat = 0.0
        self._last_prune = time.monotonic()

    # ------------------------------------------------------------ the rig's side

    def start(self) -> None:
        if self._spool is None:
            self._open_spool()
        self._thread.start()

    def status(self) -> StoreLink:
        with self._lock:
            waiting = max(0, self._last_seq - self._mark)
            return StoreLink(self._since is None, waiting, self._since, self._problem)

    def answered(self, control_id: int, reply: dict[str, Any]) -> None:
        """The lab's answer to a control (any thread); written at the next pass."""
        with self._lock:
            self._answers.append((control_id, reply))
        self._wake.set()

    def stop(self, drain_s: float = 5.0) -> StoreLink:
        """Forward what is left for up to `drain_s` seconds, then stop; the rest stays spooled
        and goes at the next start. Call it once the store has committed its last records:
        the drain reads the outbox afresh, so those go too."""
        self._drain_until = time.monotonic() + drain_s
        self._stop.set()
        self._wake.set()
        if self._thread.is_alive():
            self._thread.join()
        if self._server is not None:
            try:
                self._say_state("stopped")
            except Exception:  # the server is going or gone; the rig stops all the same
                pass
            self._server.close()
        if self._spool is not None:
            self._spool.close()
        return self.status()

    # ------------------------------------------------------------ one pass

    def pass_once(self) -> int:
        """Connect if need be, forward everything new, handle controls; entries sent."""
        if self._spool is None:
            self._open_spool()
        self._last_seq = int(dialect.first(self._spool, "SELECT coalesce(max(seq), 0) FROM outbox") or 0)
        if self._server is None:
            if time.monotonic() < self._next_try:
                return 0
            self._connect()
        sent = 0
        while True:
            batch = self._forward_batch()
            sent += batch
            if batch < BATCH:
                break
        self._controls()
        now = time.monotonic()
        if now - self._last_beat >= HEARTBEAT_S:
            self._last_beat = now
            self._say_state(self.status().text())
        if now - self._last_prune >= PRUNE_EVERY_S:
            self._last_prune = now
            self._prune()
        return sent

    def _run(self) -> None:
        while not self._stop.is_set():
            self._pass_guarded()
            self._wake.wait(self.every_s)
            self._wake.clear()
        # Stopping: the lab's last records (session ends among them) are in the spool now.
        while time.monotonic() < self._drain_until:
            self._pass_guarded()
            state = self.status()
            if state.reachable and state.waiting == 0 and not self._answers:
                return
            time.sleep(0.05)

    def _pass_guarded(self) -> None:
        try:
            self.pass_once()
        except Exception as exc:  # the server went away mid-pass, or refused; retry later
            self._lost(exc)

    def _open_spool(self) -> None:
        import sqlite3

        self._spool = sqlite3.connect(self.spool_path, isolation_level=None, timeout=5.0, check_same_thread=False)
        self._mark = int(dialect.first(self._spool, "SELECT seq FROM forwarded WHERE rig = ?", (self.rig,)) or 0)

    def _connect(self) -> None:
        from server.store.postgres import connect

        conn = connect(self.url, application=f"vigil-rig {self.rig}")
        try:
            migrate(conn)
            server_mark = dialect.first(conn, "SELECT seq FROM forwarded WHERE rig = ?", (self.rig,))
        except BaseException:
            conn.close()
            raise
        self._server = conn
        with self._lock:
            self._mark = int(server_mark or 0)
            if self._since is not None:
                self.say(f"store: {conn.location} reachable again; forwarding {max(0, self._last_seq - self._mark)}")
            self._since = None
            self._problem = None
        self._retry_s = 0.1
        self._handed.clear()

    def _lost(self, exc: Exception) -> None:
        reason = dialect.reason(exc) if not isinstance(exc, StoreError) else str(exc)
        if self._server is not None:
            try:
                self._server.close()
            except Exception:
                pass
            self._server = None
        with self._lock:
            first_time = self._since is None
            if first_time:
                self._since = wall_now()
            self._problem = reason
        if first_time:
            self.say(f"warning: store unreachable ({reason}); the rig keeps everything in its spool {self.spool_path}")
        self._next_try = time.monotonic() + self._retry_s
        self._retry_s = min(RETRY_MAX_S, self._retry_s * 2)

    def _forward_batch(self) -> int:
        found = self._spool.execute(
            "SELECT seq, statement, params FROM outbox WHERE seq > ? ORDER BY seq LIMIT ?", (self._mark, BATCH)
        ).fetchall()
        if not found:
            return 0
        server = self._server
        refusals = dialect.refusals(server)
        dialect.begin_write(server)
        try:
            # The server's mark, locked: another pass (or a commit whose answer was lost)
            # may have moved it since it was read.
            mark = dialect.first(server, "SELECT seq FROM forwarded WHERE rig = ? FOR UPDATE", (self.rig,)) or 0
            if mark != self._mark:
                server.execute("ROLLBACK")
                self._mark = int(mark)
                return BATCH  # read again from the right place
            try:
                server.execute("SAVEPOINT batch")
                self._apply_runs(found)
                server.execute("RELEASE SAVEPOINT batch")
            except refusals:
                server.execute("ROLLBACK TO SAVEPOINT batch")
                self._apply_one_by_one(found)
            last = int(found[-1][0])
            server.execute(
                "INSERT INTO forwarded (rig, seq) VALUES (?, ?) ON CONFLICT (rig) DO UPDATE SET seq = excluded.seq",
                (self.rig, last),
            )
            server.execute("COMMIT")
        except BaseException:
            if not server.broken and server.in_transaction:
                server.execute("ROLLBACK")
            raise
        with self._lock:
            self._mark = last
        self._spool.execute(
            "INSERT INTO forwarded (rig, seq) VALUES (?, ?) ON CONFLICT (rig) DO UPDATE SET seq = excluded.seq",
            (self.rig, last),
        )
        return len(found)

    def _apply_runs(self, found: list[tuple[int, str, str]]) -> None:
        """The usual path: each run of entries with the same statement (a stretch of events)
        goes as one pipelined executemany, in order."""
        start = 0
        while start < len(found):
            statement = found[start][1]
            end = start
            while end < len(found) and found[end][1] == statement:
                end += 1
            params = [json.loads(entry[2]) for entry in found[start:end]]
            if len(params) == 1:
                self._server.execute(statement, tuple(params[0]))
            else:
                self._server.executemany(statement, params)
            start = end

    def _apply_one_by_one(self, found: list[tuple[int, str, str]]) -> None:
        """After a refusal: entry by entry, each in a savepoint, so only the refused one drops.
        The spool accepted it under the same schema, so say so, rather than hold every later
        entry back."""
        server = self._server
        refusals = dialect.refusals(server)
        for seq, statement, params in found:
            server.execute("SAVEPOINT entry")
            try:
                server.execute(statement, tuple(json.loads(params)))
            except refusals as exc:
                server.execute("ROLLBACK TO SAVEPOINT entry")
                self.say(f"warning: store refused spooled entry {seq}: {dialect.reason(exc)}")
            server.execute("RELEASE SAVEPOINT entry")

    def _say_state(self, state: str) -> None:
        """Tell the lab-wide store how this rig is (the page of `vigil serve` shows it)."""
        self._server.execute(
            "UPDATE rigs SET seen_at = ?, store_state = ? WHERE name = ?", (wall_now(), state, self.rig)
        )

    def _prune(self) -> None:
        # The newest entry stays, so the outbox's next seq never falls back below the mark.
        self._spool.execute("DELETE FROM outbox WHERE seq < ?", (self._mark,))

    # ------------------------------------------------------------ controls

    def _controls(self) -> None:
        server = self._server
        with self._lock:
            answers = list(self._answers)
        for control_id, reply in answers:
            controls.answer(server, control_id, reply, wall_now())
            with self._lock:
                self._answers.remove((control_id, reply))  # only once it is on the server
            self._handed.discard(control_id)
        if self.on_control is None:
            return
        for control in controls.waiting(server, self.rig):
            if control["id"] in self._handed or not controls.claim(server, control["id"]):
                continue
            self._handed.add(control["id"])
            self.on_control(control)
