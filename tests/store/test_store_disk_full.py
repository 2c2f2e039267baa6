"""A full disk loses nothing: records wait in memory and go in once there is room again.

SQLite reports a database that may not grow past `PRAGMA max_page_count` exactly as it
reports a full disk (SQLITE_FULL, "database or disk is full"), which lets a test fill the
"disk" and free it again.
"""

from __future__ import annotations

import pytest
from store_samples import make_trial

from server.engine.records import EventLogged
from server.store import StoreError, queries


def fill_disk(store) -> int:
    """Forbid the database to grow; return the old limit so the test can give room back."""
    conn = store.conn
    old_limit = conn.execute("PRAGMA max_page_count").fetchone()[0]
    pages = conn.execute("PRAGMA page_count").fetchone()[0]
    conn.execute(f"PRAGMA max_page_count = {pages}")
    return old_limit


def free_disk(store, limit: int) -> None:
    store.conn.execute(f"PRAGMA max_page_count = {limit}")


def many_events(n: int, start: int = 0):
    return [
        EventLogged(t=k * 0.05, kind="input", name="lick", value=float(k), device_seq=k + 1, detail={"pad": "x" * 120})
        for k in range(start, start + n)
    ]


def test_full_disk_keeps_trials_and_events_until_space_returns(db_path, store, begin):
    session_id = begin()
    store.write(session_id, make_trial(1))
    limit = fill_disk(store)

    for event in many_events(300):
        store.write(session_id, event)
    with pytest.raises(StoreError) as caught:
        store.write(session_id, make_trial(2))
    assert str(caught.value) == (
        f"could not write to {db_path}: disk is full; 301 record(s) kept in memory, retried at the next flush"
    )
    assert store.failure is caught.value
    assert store.pending == 301
    # The session goes on: more events and another trial are buffered behind the first ones.
    for event in many_events(100, start=300):
        store.write(session_id, event)
    with pytest.raises(StoreError, match="disk is full"):
        store.write(session_id, make_trial(3))
    with pytest.raises(StoreError, match="disk is full"):
        store.flush_due(10.0)
    assert store.pending == 402

    reader = queries.open_readonly(db_path)
    assert [t.trial for t in queries.trial_records(reader, session_id)] == [1]

    free_disk(store, limit)
    assert store.flush_due(11.0)
    assert store.pending == 0 and store.failure is None
    assert queries.trial_records(reader, session_id) == [make_trial(n) for n in (1, 2, 3)]
    values = [e["value"] for e in queries.session_events(reader, session_id)]
    assert values == [float(k) for k in range(400)]  # every event, once, in order
    assert queries.get_session(reader, session_id)["trials"] == 3
    reader.close()


def test_no_session_starts_on_a_full_disk(store, begin):
    begin()
    limit = fill_disk(store)
    with pytest.raises(StoreError, match="disk is full$"):
        for n in range(200):  # each session row takes room; the page fills soon
            begin(box=f"rack-{n}", settings={"pad": "y" * 500})
    free_disk(store, limit)
    assert isinstance(begin(box="rack-late"), int)


def test_close_on_a_full_disk_keeps_the_store_open_to_retry(db_path, store, begin):
    session_id = begin()
    limit = fill_disk(store)
    for event in many_events(300):
        store.write(session_id, event)
    with pytest.raises(StoreError, match="disk is full; 300 record"):
        store.close()
    free_disk(store, limit)
    store.close()
    reader = queries.open_readonly(db_path)
    assert len(queries.session_events(reader, session_id)) == 300
    reader.close()
