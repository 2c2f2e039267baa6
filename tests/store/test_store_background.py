"""The lab's writer thread: records reach the disk without the caller waiting on it, a full
disk is reported and retried rather than raised into the event loop."""

from __future__ import annotations

import sqlite3

from server.engine.records import EventLogged, SessionEnded, TrialRecord
from server.store.background import BackgroundWriter
from server.store.writer import Store


def trial(i: int) -> TrialRecord:
    return TrialRecord(trial=i, block="b", block_index=1, trial_type="t", t_start=i * 10.0, t_end=i * 10.0 + 5,
                       choice="a", response="press_a", latency_s=1.0, rewarded=True, reward=1.0, correct=True,
                       omission=False, interrupted=False, iti_s=5.0)  # fmt: skip


def test_records_are_committed_by_the_writer_thread(tmp_path):
    store = Store.open(tmp_path / "bg.sqlite")
    sid = store.begin_session("box-9", "A-9", "p", None, None, 1, "2026-01-05T10:00:00+00:00")
    said: list[str] = []
    writer = BackgroundWriter(store, said.append)
    writer.start()
    for i in range(1, 21):
        writer.write(sid, EventLogged(i * 10.0, "input", "press_a", 1.0))
        writer.write(sid, trial(i))
    writer.write(sid, SessionEnded(300.0, "done", 20, 20))
    writer.drain()
    check = sqlite3.connect(tmp_path / "bg.sqlite")
    assert check.execute("SELECT COUNT(*) FROM trials").fetchone()[0] == 20
    assert check.execute("SELECT end_reason FROM sessions").fetchone()[0] == "done"
    writer.close()
    assert check.execute("SELECT COUNT(*) FROM events WHERE kind = 'input'").fetchone()[0] == 20
    assert said == []


def test_a_full_disk_is_reported_and_nothing_is_lost(tmp_path):
    store = Store.open(tmp_path / "full.sqlite")
    sid = store.begin_session("box-9", "A-9", "p", None, None, 1, "2026-01-05T10:00:00+00:00")
    said: list[str] = []
    writer = BackgroundWriter(store, said.append)
    writer.start()
    with writer.direct() as s:  # cap the file at its current size: SQLite reports it full
        pages = s.conn.execute("PRAGMA page_count").fetchone()[0]
        s.conn.execute(f"PRAGMA max_page_count = {pages}")
    for i in range(1, 40):
        writer.write(sid, EventLogged(float(i), "note", "x" * 500, None, detail={"pad": "y" * 2000}))
    writer.write(sid, trial(1))
    writer.drain()
    assert any("full" in message for message in said), said
    with writer.direct() as s:
        s.conn.execute("PRAGMA max_page_count = 1073741823")
    writer.close()  # the retry commits what was kept
    check = sqlite3.connect(tmp_path / "full.sqlite")
    assert check.execute("SELECT COUNT(*) FROM trials").fetchone()[0] == 1
    assert check.execute("SELECT COUNT(*) FROM events WHERE kind = 'note' AND name LIKE 'x%'").fetchone()[0] == 39
