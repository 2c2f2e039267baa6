"""The overview's data, computed at most a few times a second and shared by every client.

Twenty browsers polling must not mean twenty renderings: a snapshot is rebuilt only when
the last one is older than `ttl_s`, and its JSON (and any page rendered from it) is reused
until then. Live tiles come from the lab's latest feed (`page_end.LatestFeed`), read-only
tiles from the store.
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

from server.lab.status import reverses
from server.store import queries
from server.store.dialect import Connection, is_server_url
from server.store.wall_clock import local_now
from server.web.session_protocol import protocol_of, rules_of
from server.web.tiles import shown, tile_from_store


class ReadOnlyStore:
    """Read-only connections to the database, one per thread (sqlite3 objects stay in the
    thread that made them; requests run on a pool of threads). A PostgreSQL connection that
    the server dropped (a restart) is opened again at the next request."""

    def __init__(self, path: str | Path):
        self.path: str | Path = path if is_server_url(path) else Path(path)
        self._local = threading.local()
        self._all: list[Connection] = []
        self._lock = threading.Lock()
        self.conn()  # fail now, with the store's one-line message, if it cannot be read

    def conn(self) -> Connection:
        conn = getattr(self._local, "conn", None)
        if conn is not None and getattr(conn, "broken", False):
            with self._lock:
                self._all.remove(conn)
            conn.close()
            conn = None
        if conn is None:
            conn = queries.open_readonly(self.path, check_same_thread=False)
            self._local.conn = conn
            with self._lock:
                self._all.append(conn)
        return conn

    def close(self) -> None:
        with self._lock:
            for conn in self._all:
                conn.close()
            self._all.clear()
        self._local = threading.local()


@dataclass(frozen=True)
class Snapshot:
    version: int
    made_at: float  # monotonic seconds
    wall_time: str  # ISO 8601, for the page's "as of"
    tiles: list[dict[str, Any]]
    boxes_json: bytes  # body of GET /api/boxes
    board_json: str  # what live updates carry: texts per tile and the alarm strip
    store: str | None = None  # the store line: a rig's link to the lab-wide store, or each rig's last word
    cache: dict[str, Any] = field(default_factory=dict)  # renderings made from this snapshot


def strip_of(tiles: list[dict[str, Any]]) -> list[dict[str, str]]:
    """The lab-wide alarm strip: every alarm of every box, box named."""
    return [{"box": t["box"], "kind": a["kind"], "text": a["text"]} for t in tiles for a in t["alarms"]]


class Board:
    def __init__(
        self,
        *,
        live: Any = None,
        store: ReadOnlyStore | None = None,
        quiet_after_s: float = 300.0,
        ttl_s: float = 0.25,
        clock: Callable[[], float] = time.monotonic,
        wall_clock: Callable[[], datetime] = local_now,
    ):
        if live is None and store is None:
            raise ValueError("a board needs a live feed or a store")
        self.live = live
        self.store = store
        self.quiet_after_s = quiet_after_s
        self.ttl_s = ttl_s
        self.clock = clock
        self.wall_clock = wall_clock
        self._snapshot: Snapshot | None = None
        self._lock = threading.Lock()
        self._version = 0

    def snapshot(self) -> Snapshot:
        now = self.clock()
        snap = self._snapshot
        if snap is not None and now - snap.made_at < self.ttl_s:
            return snap
        with self._lock:
            snap = self._snapshot
            if snap is not None and now - snap.made_at < self.ttl_s:
                return snap
            self._snapshot = snap = self._make(now)
            return snap

    def _tiles(self, wall: datetime) -> list[dict[str, Any]]:
        if self.live is not None:
            return self.live.tiles(self.quiet_after_s)
        assert self.store is not None
        conn = self.store.conn()
        lab_wide = bool(queries.rig_states(conn))  # several rigs: each tile names its rig
        tiles = []
        for session in queries.latest_sessions_per_box(conn):
            status = queries.session_status(conn, session["id"])
            firings = queries.session_rule_firings(conn, session["id"])
            reversals = sum(reverses(f["actions"]) for f in firings)
            last = firings[-1] if firings else None
            spec = None if last is None else rules_of(protocol_of(session)).get(last["rule"])
            tile = tile_from_store(session, status, last, wall, self.quiet_after_s, reversals=reversals, rule_spec=spec)
            if lab_wide and session.get("rig"):
                tile["rig"] = session["rig"]
                tile["box"] = f"{session['rig']}: {tile['box']}"
            tiles.append(tile)
        return tiles

    def _store_line(self, wall: datetime) -> str | None:
        if self.live is not None:
            return getattr(self.live, "store", None)
        assert self.store is not None
        rigs = queries.rig_states(self.store.conn())
        if not rigs:
            return None
        parts = []
        for rig in rigs:
            seen = rig["seen_at"]
            ago = None if seen is None else max(0.0, (wall - datetime.fromisoformat(seen)).total_seconds())
            heard = "never heard" if ago is None else f"heard {ago:.0f} s ago"
            if rig["store_state"] == "stopped":
                heard = "stopped" if ago is None else f"stopped {ago:.0f} s ago"
            parts.append(f"{rig['name']} {heard}")
        return "rigs: " + ", ".join(parts)

    def _make(self, now: float) -> Snapshot:
        wall = self.wall_clock()
        tiles = self._tiles(wall)
        store = self._store_line(wall)
        self._version += 1
        wall_text = wall.isoformat(timespec="seconds")
        board = {
            "version": self._version,
            "at": wall_text,
            "boxes": [t["box"] for t in tiles],
            "tiles": [{"box": t["box"], "state": t["state"], "alarms": t["alarms"], "shown": shown(t)} for t in tiles],
            "strip": strip_of(tiles),
            "store": store,
        }
        return Snapshot(
            version=self._version,
            made_at=now,
            wall_time=wall_text,
            tiles=tiles,
            boxes_json=json.dumps(tiles, separators=(",", ":"), allow_nan=False).encode(),
            board_json=json.dumps(board, separators=(",", ":"), allow_nan=False),
            store=store,
        )
