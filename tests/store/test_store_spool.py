"""A rig's spool and its forwarder against a real PostgreSQL server (tests/pg_server.py):
exactly once by rig and outbox sequence, session ids that never collide, offline starts."""

from __future__ import annotations

import time

import psycopg
import pytest
from store_samples import STARTED_AT, make_trial

from server.engine.records import EventLogged, SessionEnded
from server.store import StoreError
from server.store.forwarder import StoreLink
from server.store.lab_store import open_lab_store
from server.store.writer import ID_RANGE


def count(url: str, sql: str) -> int:
    with psycopg.connect(url, autocommit=True) as conn:
        return conn.execute(sql).fetchone()[0]


def begin(store) -> int:
    return store.begin_session("rack-3", "MS-1120", "flip-flop", None, None, 7, STARTED_AT)


def test_each_entry_reaches_the_server_once_even_after_a_lost_acknowledgement(pg_cluster, tmp_path):
    url = pg_cluster.fresh_schema("once")
    store, forwarder = open_lab_store(url, rig="bench-a", spool=tmp_path / "spool.sqlite")
    try:
        sid = begin(store)
        for k in range(5):
            store.write(sid, EventLogged(t=0.5 * k, kind="input", name="lever_left", value=1.0, device_seq=k + 1))
        store.write(sid, make_trial(1))
        assert forwarder.pass_once() > 0
        assert forwarder.status().text() == "store: up to date"
        assert count(url, "SELECT count(*) FROM events") == 5
        assert count(url, "SELECT count(*) FROM trials") == 1
        # The commit reached the server but its answer did not: the rig sends again from
        # its old mark, and the server's own mark turns the repeat away.
        forwarder._mark = 0
        forwarder.pass_once()
        assert count(url, "SELECT count(*) FROM events") == 5
        assert count(url, "SELECT count(*) FROM trials") == 1
        store.write(sid, make_trial(2))
        store.write(sid, SessionEnded(t=45.0, reason="protocol complete", trials=2, rewards=1))
        forwarder.pass_once()
        assert count(url, "SELECT count(*) FROM trials") == 2
        assert count(url, f"SELECT trials FROM sessions WHERE id = {sid}") == 2
        assert count(url, "SELECT seq FROM forwarded WHERE rig = 'bench-a'") == forwarder._last_seq
    finally:
        forwarder.stop(drain_s=0)
        store.close()


def test_the_store_line_says_what_the_rig_holds_back():
    assert StoreLink(True, 12, None, None).text() == "store: forwarding 12"
    assert StoreLink(True, 0, None, None).text() == "store: up to date"
    down = StoreLink(False, 3, "2031-04-07T21:30:05.250+02:00", "connection refused")
    assert down.text() == "store: unreachable since 21:30:05, 3 waiting"


def test_two_rigs_take_ids_from_their_own_ranges_and_a_lost_spool_does_not_reuse_one(pg_cluster, tmp_path):
    url = pg_cluster.fresh_schema("ids")
    a, forward_a = open_lab_store(url, rig="rig-a", spool=tmp_path / "a.sqlite")
    b, forward_b = open_lab_store(url, rig="rig-b", spool=tmp_path / "b.sqlite")
    first_a, first_b = begin(a), begin(b)
    assert first_a // ID_RANGE != first_b // ID_RANGE
    assert first_a % ID_RANGE == first_b % ID_RANGE == 1
    assert begin(a) == first_a + 1
    assert first_a < 2**53 and first_b < 2**53  # exact in the page's JavaScript
    for store, forwarder in ((a, forward_a), (b, forward_b)):
        forwarder.pass_once()
        forwarder.stop(drain_s=0)
        store.close()
    assert count(url, "SELECT count(*) FROM sessions") == 3
    (tmp_path / "a.sqlite").unlink()  # the rig's disk was replaced
    again, forward_again = open_lab_store(url, rig="rig-a", spool=tmp_path / "a.sqlite")
    try:
        assert begin(again) == first_a + 2  # above what the server already holds
    finally:
        forward_again.stop(drain_s=0)
        again.close()


def test_a_rig_needs_the_server_once_then_starts_and_spools_without_it(pg_cluster, tmp_path):
    url = pg_cluster.fresh_schema("offline")
    nowhere = f"postgresql://vigil@/postgres?host={tmp_path / 'no-server'}"
    with pytest.raises(StoreError, match=r"^rig 'rig-c' must reach the lab-wide store once to get its number: "):
        open_lab_store(nowhere, rig="rig-c", spool=tmp_path / "c.sqlite")
    store, forwarder = open_lab_store(url, rig="rig-c", spool=tmp_path / "c.sqlite")
    forwarder.stop(drain_s=0)
    store.close()
    # From now on the spool knows the rig's number: the server may be away.
    store, forwarder = open_lab_store(nowhere, rig="rig-c", spool=tmp_path / "c.sqlite")
    try:
        sid = begin(store)
        store.write(sid, make_trial(1))
        try:
            forwarder.pass_once()
        except StoreError as exc:
            forwarder._lost(exc)
        state = forwarder.status()
        assert not state.reachable and state.waiting >= 2
        assert state.text().startswith("store: unreachable since ") and state.text().endswith(" waiting")
    finally:
        forwarder.stop(drain_s=0)
        store.close()
    with pytest.raises(StoreError, match=r"belongs to rig 'rig-c', not 'rig-d'"):
        open_lab_store(url, rig="rig-d", spool=tmp_path / "c.sqlite")


def test_an_entry_the_server_refuses_drops_alone_and_the_rest_goes_on(pg_cluster, tmp_path):
    url = pg_cluster.fresh_schema("refused")
    said: list[str] = []
    store, forwarder = open_lab_store(url, rig="bench-b", spool=tmp_path / "spool.sqlite", say=said.append)
    try:
        sid = begin(store)
        store.write(sid, EventLogged(t=1.0, kind="input", name="nose_poke", value=1.0, device_seq=1))
        store.flush()
        # An entry the server must refuse (no session 999 there), between two good ones.
        store.conn.execute(
            "INSERT INTO outbox (statement, params) VALUES (?, ?)",
            ("INSERT INTO annotations (session_id, t, wall_time, origin, text) VALUES (?, ?, ?, ?, ?)",
             f'[999, 1.0, "{STARTED_AT}", "test", "orphan"]'),
        )  # fmt: skip
        store.write(sid, EventLogged(t=2.0, kind="input", name="nose_poke", value=1.0, device_seq=2))
        store.write(sid, EventLogged(t=3.0, kind="input", name="nose_poke", value=1.0, device_seq=3))
        store.flush()
        forwarder.pass_once()
        assert count(url, "SELECT count(*) FROM events") == 3
        assert count(url, "SELECT count(*) FROM annotations") == 0
        assert any("store refused spooled entry" in line and "foreign key" in line for line in said), said
        assert forwarder.status().waiting == 0
    finally:
        forwarder.stop(drain_s=0)
        store.close()


def test_stopping_forwards_what_the_lab_committed_last(pg_cluster, tmp_path):
    url = pg_cluster.fresh_schema("drain")
    store, forwarder = open_lab_store(url, rig="bench-c", spool=tmp_path / "spool.sqlite")
    try:
        sid = begin(store)
        forwarder.start()
        time.sleep(0.6)  # a few passes: the forwarder is up to date and idle
        store.write(sid, make_trial(1))
        store.write(sid, SessionEnded(t=20.0, reason="protocol complete", trials=1, rewards=1))
        left = forwarder.stop()  # at once, as the lab does right after its last commit
    finally:
        store.close()
    assert left.waiting == 0
    assert count(url, f"SELECT count(*) FROM sessions WHERE id = {sid} AND end_reason = 'protocol complete'") == 1
