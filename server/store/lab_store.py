"""Opening a lab's store as its config names it: a SQLite file, or a PostgreSQL URL reached
through the rig's local spool and its forwarder.

Session ids in a lab-wide store: each rig has a number, given by the server the first time
the rig reaches it (the `rigs` table, by the lab config's `lab:` name) and kept in the
spool, so the rig starts offline from then on. Its sessions take ids rig number x 2**32 + 1,
+ 2, ... in its spool, and keep them on the server: two rigs never collide, a spooled session
keeps its identity, and every id stays below 2**53 (exact in the page's JavaScript).
"""

from __future__ import annotations

import re
from collections.abc import Callable
from datetime import datetime
from pathlib import Path

from server.store import dialect
from server.store.dialect import is_server_url
from server.store.errors import StoreError
from server.store.forwarder import Forwarder
from server.store.schema import migrate
from server.store.wall_clock import iso, local_now
from server.store.writer import ID_RANGE, Store

MAX_RIGS = 2**21 - 1  # rig number x ID_RANGE stays below 2**53
SPOOL_BATCH_S = 0.25


def default_spool(rig: str, folder: Path) -> Path:
    """Where a rig keeps its spool when the config does not say: beside the config."""
    slug = re.sub(r"[^A-Za-z0-9._-]+", "-", rig).strip("-") or "rig"
    return folder / f"vigil-spool-{slug}.sqlite"


def open_lab_store(
    database: str | Path,
    *,
    rig: str,
    spool: Path | None = None,
    wall_clock: Callable[[], datetime] = local_now,
    say: Callable[[str], None] = print,
) -> tuple[Store, Forwarder | None]:
    """The store a lab writes: (the store, None) for a SQLite file; for a PostgreSQL URL,
    (the rig's spool, its forwarder, not yet started). One-line `StoreError` when unusable."""
    if not is_server_url(database):
        return Store.open(database, rig=rig, wall_clock=wall_clock), None
    url = str(database)
    spool_path = spool if spool is not None else default_spool(rig, Path.cwd())
    # Events reach the spool within 2 x 0.25 s and the forwarder passes every 0.25 s, so while
    # the server is reachable an event is there within a second, as on a local store.
    store = Store.open(spool_path, rig=rig, journal=True, wall_clock=wall_clock, batch_s=SPOOL_BATCH_S)
    try:
        number, floor = _rig_number(store, url, rig, iso(wall_clock()))
    except BaseException:
        store.close()
        raise
    store.id_base = number * ID_RANGE
    store.id_floor = floor
    return store, Forwarder(spool_path, url, rig, say=say)


def _rig_number(spool: Store, url: str, rig: str, now: str) -> tuple[int, int]:
    """The rig's number (from the spool, or registered on the server the first time) and the
    highest session id the server already holds in its range."""
    conn = spool.conn
    kept = conn.execute("SELECT id, name FROM rigs").fetchall()
    others = [name for _, name in kept if name != rig]
    if others:
        raise StoreError(f"spool {spool.path} belongs to rig '{others[0]}', not '{rig}'; give this rig its own spool")
    if kept:
        return int(kept[0][0]), 0
    from server.store.postgres import connect

    try:
        server = connect(url, application=f"vigil-rig {rig}")
    except StoreError as exc:
        raise StoreError(f"rig '{rig}' must reach the lab-wide store once to get its number: {exc}") from None
    try:
        migrate(server)
        server.execute("INSERT INTO rigs (name, registered_at) VALUES (?, ?) ON CONFLICT (name) DO NOTHING", (rig, now))
        number = int(dialect.first(server, "SELECT id FROM rigs WHERE name = ?", (rig,)))
        if number > MAX_RIGS:
            raise StoreError(f"the lab-wide store has given out all {MAX_RIGS} rig numbers")
        base = number * ID_RANGE
        floor = dialect.first(server, "SELECT max(id) FROM sessions WHERE id > ? AND id <= ?", (base, base + ID_RANGE))
    except dialect.database_errors(server) as exc:
        raise StoreError(f"cannot register rig '{rig}' at {server.location}: {dialect.reason(exc)}") from None
    finally:
        server.close()
    conn.execute("INSERT INTO rigs (id, name, registered_at) VALUES (?, ?, ?)", (number, rig, now))
    return number, int(floor or 0)
