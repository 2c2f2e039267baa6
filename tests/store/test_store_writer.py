"""Every record type round-trips; events are batched yet durable within a second."""

from __future__ import annotations

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from store_samples import BOTH_BACKENDS, STARTED_AT, make_trial

from server.engine.records import (
    BlockStarted,
    EventLogged,
    SessionEnded,
    SessionStarted,
    TrialRecord,
)
from server.store import Store, StoreError, queries

pytestmark = BOTH_BACKENDS


@pytest.fixture
def reader(db_path, store):
    conn = queries.open_readonly(db_path)
    yield conn
    conn.close()


def stored_events(reader, session_id):
    return queries.session_events(reader, session_id)


# ---------------------------------------------------------------- round trips


def test_session_row_round_trip(store, begin, reader):
    session_id = begin()
    row = queries.get_session(reader, session_id)
    assert row == {
        "id": session_id,
        "box": "shelf-2/left",
        "animal": "R-117",
        "protocol": "flip-flop",
        "protocol_path": "protocols/flip-flop.yaml",
        "protocol_sha256": "ab" * 32,
        "started_at": STARTED_AT,
        "ended_at": None,
        "end_reason": None,
        "seed": 20310407,
        "trials": 0,
        "rewards": 0,
        "settings": {"caps": {"max_rewards": 120, "max_minutes": 60}, "agent": None},
        "rig": None,
    }


def test_every_record_type_round_trips(store, begin, reader):
    session_id = begin()
    store.write(session_id, SessionStarted(t=0.0, protocol="flip-flop", seed=20310407, first_block="acquire"))
    block = BlockStarted(
        t=0.0, block="acquire", block_index=1, contingencies={"left": 0.8, "right": 0.2}, outcomes_withheld=False
    )
    store.write(session_id, block)
    press = EventLogged(
        t=1.234567891,
        kind="input",
        name="press_left",
        value=1.0,
        device_t_us=4_294_967_295,
        device_seq=1,
        detail={"edge": "rising", "host_t": 1.2345},
    )
    store.write(session_id, press)
    trials = [
        make_trial(1),
        make_trial(
            2, choice=None, response=None, latency_s=None, correct=None, omission=True, rewarded=False, reward=0.0
        ),
    ]
    for t in trials:
        store.write(session_id, t)
    store.write(session_id, SessionEnded(t=3600.25, reason="time limit", trials=2, rewards=1))

    events = stored_events(reader, session_id)
    assert [(e["kind"], e["name"], e["detail"]) for e in events] == [
        ("note", "session_started", {"protocol": "flip-flop", "seed": 20310407, "first_block": "acquire"}),
        ("input", "press_left", {"edge": "rising", "host_t": 1.2345}),
    ]
    got = events[1]
    assert (got["t"], got["value"], got["device_t_us"], got["device_seq"]) == (1.234567891, 1.0, 4_294_967_295, 1)
    assert queries.session_blocks(reader, session_id) == [
        {
            "session_id": session_id,
            "block_index": 1,
            "block": "acquire",
            "t_start": 0.0,
            "contingencies": {"left": 0.8, "right": 0.2},
            "outcomes_withheld": False,
        }
    ]
    assert queries.trial_records(reader, session_id) == trials
    ended = queries.get_session(reader, session_id)
    # 21:30:00 + 3600.25 s, same UTC offset as started_at
    assert ended["ended_at"] == "2031-04-07T22:30:00.250+02:00"
    assert (ended["end_reason"], ended["trials"], ended["rewards"]) == ("time limit", 2, 1)


def test_caller_supplied_end_time_is_kept(store, begin, reader):
    session_id = begin()
    store.write(
        session_id,
        SessionEnded(t=5.0, reason="stopped by operator", trials=0, rewards=0),
        ended_at="2031-04-07T19:31:00+00:00",
    )
    assert queries.get_session(reader, session_id)["ended_at"] == "2031-04-07T19:31:00+00:00"


# Any text but NUL, which a name may not hold on either backend (refused at write, below).
labels = st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"), max_size=12)
finite = st.floats(allow_nan=False, allow_infinity=False)
trials_strategy = st.builds(
    TrialRecord,
    trial=st.just(1),
    block=labels,
    block_index=st.integers(1, 10**6),
    trial_type=labels,
    t_start=finite,
    t_end=finite,
    choice=st.none() | labels,
    response=st.none() | labels,
    latency_s=st.none() | finite,
    rewarded=st.booleans(),
    reward=finite,
    correct=st.none() | st.booleans(),
    omission=st.booleans(),
    interrupted=st.booleans(),
    iti_s=finite,
    steps=st.lists(st.tuples(labels, finite), max_size=4).map(tuple),
    counts=st.dictionaries(labels, st.integers(0, 10**9), max_size=3),
    first_s=st.dictionaries(labels, finite, max_size=3),
    extra=st.dictionaries(labels, st.none() | st.booleans() | finite | labels, max_size=3),
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(record=trials_strategy)
def test_any_trial_reads_back_equal(store, begin, reader, record):
    # Exact float equality: replaying stored trials must reproduce an online estimate bit for bit.
    session_id = begin()
    store.write(session_id, record)
    assert queries.trial_records(reader, session_id) == [record]


def test_numpy_values_are_stored_as_plain_numbers(store, begin, reader):
    np = pytest.importorskip("numpy")
    session_id = begin(seed=np.int64(42))
    extra = {"q": np.array([0.5, 0.25]), "n": np.int32(3)}
    store.write(session_id, make_trial(1, reward=np.float64(2.0), extra=extra))
    assert queries.trial_records(reader, session_id)[0].extra == {"q": [0.5, 0.25], "n": 3}
    assert queries.get_session(reader, session_id)["seed"] == 42


# ---------------------------------------------------------------- durability


def test_events_wait_for_a_flush_but_a_trial_commits_them_at_once(store, begin, reader):
    session_id = begin()
    store.write(session_id, EventLogged(t=0.5, kind="input", name="head_entry", value=1.0))
    assert stored_events(reader, session_id) == []
    assert store.pending == 1
    store.write(session_id, make_trial(1))
    assert [e["name"] for e in stored_events(reader, session_id)] == ["head_entry"]
    assert len(queries.session_trials(reader, session_id)) == 1
    assert store.pending == 0


def test_every_event_is_durable_within_one_second(store, begin, reader):
    """50 events/s for 20 s of virtual monotonic time, flush_due called every 0.25 s."""
    session_id = begin()
    tick, rate, seconds = 0.25, 50, 20.0
    written_at: dict[int, float] = {}  # event number -> monotonic time it was written
    visible_at: dict[int, float] = {}
    commits = 0
    now = 1000.0  # an arbitrary monotonic origin
    n = 0
    next_tick = now
    while now < 1000.0 + seconds:
        n += 1
        store.write(session_id, EventLogged(t=now - 1000.0, kind="input", name="lick", value=float(n)))
        written_at[n] = now
        now += 1.0 / rate
        if now >= next_tick:
            commits += store.flush_due(now)
            next_tick += tick
            for event in stored_events(reader, session_id):
                visible_at.setdefault(int(event["value"]), now)
    store.flush_due(now + tick)
    for event in stored_events(reader, session_id):
        visible_at.setdefault(int(event["value"]), now + tick)
    assert sorted(visible_at) == list(range(1, n + 1))
    delays = [visible_at[k] - written_at[k] for k in written_at]
    assert max(delays) <= 1.0
    # Batched: one commit per batch_s (0.5 s), not one per event.
    assert commits <= seconds / store.batch_s + 2
    assert n > 10 * commits


def test_first_event_after_a_quiet_spell_is_flushed_at_the_next_call(store, begin, reader):
    session_id = begin()
    store.write(session_id, EventLogged(t=1.0, kind="input", name="nose_poke"))
    assert store.flush_due(50.0)
    store.write(session_id, EventLogged(t=31.0, kind="input", name="nose_poke"))
    assert not store.flush_due(50.2)  # within batch_s of the last batch
    assert store.flush_due(80.0)
    assert len(stored_events(reader, session_id)) == 2


def test_a_full_buffer_commits_without_waiting(db_path, wall_clock):
    store = Store.open(db_path, wall_clock=wall_clock, max_buffered=100)
    session_id = store.begin_session("shelf-1/right", "M-03", "bandit-4", None, None, 1, STARTED_AT, {})
    for k in range(250):
        store.write(session_id, EventLogged(t=k * 0.01, kind="input", name="lick"))
    assert store.pending == 50
    store.close()


def test_replayed_device_events_are_stored_once(store, begin, reader):
    session_id = begin()
    other = begin(box="shelf-2/right", animal="R-118")

    def press(seq):
        return EventLogged(
            t=seq / 10, kind="input", name="press_left", value=1.0, device_t_us=seq * 100_000, device_seq=seq
        )

    for seq in (1, 2, 3):
        store.write(session_id, press(seq))
    store.flush()
    # After a reconnect the device replays from seq 2; seq 3 also repeats inside one batch.
    for seq in (2, 3, 4, 3, 5):
        store.write(session_id, press(seq))
    # Host-side events have no device_seq and are never deduplicated.
    store.write(session_id, EventLogged(t=0.6, kind="link_restored", name="box"))
    store.write(session_id, EventLogged(t=0.6, kind="link_restored", name="box"))
    store.write(other, press(2))  # the same seq in another session is a different event
    store.flush()
    seqs = [e["device_seq"] for e in stored_events(reader, session_id)]
    assert [s for s in seqs if s is not None] == [1, 2, 3, 4, 5]
    assert seqs.count(None) == 2
    assert store.duplicate_events(session_id) == 3
    assert store.duplicate_events(other) == 0
    assert [e["device_seq"] for e in stored_events(reader, other)] == [2]


# ---------------------------------------------------------------- refusals


@pytest.mark.parametrize(
    "bad, message",
    [
        (make_trial(1, t_end=float("nan")), "trial 1 t_end must be finite, got nan"),
        (make_trial(1, extra={"when": object()}), "trial 1 extra cannot be stored as json"),
        (
            EventLogged(t=1.0, kind="input", name="lick", device_seq=2**64),
            "event input/lick device_seq does not fit a 64-bit integer",
        ),
        (make_trial(1, block="acq\x00uire"), "trial 1 block contains a NUL character"),
    ],
)
def test_unstorable_records_are_refused_at_write(store, begin, reader, bad, message):
    session_id = begin()
    with pytest.raises(StoreError, match=f"^{message}"):
        store.write(session_id, bad)
    assert store.pending == 0


def test_trials_must_move_forward(store, begin):
    session_id = begin()
    store.write(session_id, make_trial(2))
    with pytest.raises(StoreError, match=f"^trial 2 of session {session_id} is not after trial 2$"):
        store.write(session_id, make_trial(2))


def test_writes_need_a_running_session_of_this_store(store, begin):
    with pytest.raises(StoreError, match="^session 41 was not begun by this store$"):
        store.write(41, make_trial(1))
    session_id = begin()
    store.write(session_id, SessionEnded(t=1.0, reason="done", trials=0, rewards=0))
    with pytest.raises(StoreError, match=f"^session {session_id} has already ended$"):
        store.write(session_id, make_trial(1))
    # An event after the end (the box confirming its safe state, a late replayed line) is kept.
    store.write(session_id, EventLogged(t=2.0, kind="input", name="lick"))
    store.flush()
    stored = store.conn.execute("SELECT count(*) FROM events WHERE session_id = ? AND name = 'lick'", (session_id,))
    assert tuple(stored.fetchone()) == (1,)


@pytest.mark.parametrize(
    "started_at, message",
    [
        ("2031-04-07T21:30:00", "started_at has no UTC offset"),
        ("last tuesday", "started_at is not an ISO 8601 time"),
    ],
)
def test_start_time_needs_iso_8601_with_offset(begin, started_at, message):
    with pytest.raises(StoreError, match=f"^{message}"):
        begin(started_at=started_at)


def test_a_record_the_database_refuses_does_not_block_the_others(store, begin, reader):
    session_id = begin()
    store.write(session_id, EventLogged(t=1.0, kind="input", name="lick"))
    with pytest.raises(
        StoreError,
        match=r"^database refused estimate after trial 1 of session "
        r"999 \(foreign key constraint failed\)$",
    ):
        store.write_estimate(999, 1, "q_learning", {"alpha": 0.3})
    assert [e["name"] for e in stored_events(reader, session_id)] == ["lick"]
    assert store.pending == 0


# ---------------------------------------------------------------- the rest of the API


def test_running_sessions_show_live_counts(store, begin, reader):
    session_id = begin()
    for n in (1, 2, 3):
        store.write(session_id, make_trial(n))
    row = queries.get_session(reader, session_id)
    assert (row["trials"], row["rewards"], row["end_reason"]) == (3, 2, None)


def test_estimates_are_stored_and_replaced(store, begin, reader):
    session_id = begin()
    store.write(session_id, make_trial(1))
    store.write_estimate(session_id, 1, "q_learning", {"alpha": {"mean": 0.31}, "q": [0.2, 0.0]})
    store.write_estimate(session_id, 1, "q_learning", {"alpha": {"mean": 0.32}, "q": [0.2, 0.0]})
    assert queries.session_estimates(reader, session_id) == [
        {
            "session_id": session_id,
            "trial": 1,
            "model": "q_learning",
            "data": {"alpha": {"mean": 0.32}, "q": [0.2, 0.0]},
        }
    ]


def test_start_time_comes_from_the_injected_wall_clock(store, wall_clock, reader):
    session_id = store.begin_session("shelf-1/left", "M-01", "bandit-4", None, None, 5)
    assert queries.get_session(reader, session_id)["started_at"] == "2031-04-07T21:30:00.000+02:00"


def test_interrupted_sessions_are_closed_at_their_last_stored_time(db_path, store, begin, wall_clock):
    crashed = begin()
    store.write(
        crashed,
        BlockStarted(t=0.0, block="acquire", block_index=1, contingencies={"left": 0.8}, outcomes_withheld=False),
    )
    for n in (1, 2, 3):
        store.write(crashed, make_trial(n))  # last t_end = 43.25
    store.write(crashed, EventLogged(t=47.5, kind="input", name="head_entry"))
    store.flush()
    quiet = begin(box="shelf-3/left", animal="R-120")  # nothing stored after its start
    store.conn.close()  # the process dies: no SessionEnded was written

    wall_clock.advance(3600)
    again = Store.open(db_path, wall_clock=wall_clock)
    still_running = again.begin_session("shelf-1/left", "M-01", "bandit-4", None, None, 5)
    assert again.close_interrupted() == [crashed, quiet]
    assert again.close_interrupted() == []
    reader = queries.open_readonly(db_path)
    row = queries.get_session(reader, crashed)
    assert (row["end_reason"], row["trials"], row["rewards"]) == ("interrupted", 3, 2)
    assert row["ended_at"] == "2031-04-07T21:30:47.500+02:00"  # started_at + 47.5 s
    assert queries.get_session(reader, quiet)["ended_at"] == STARTED_AT
    note = queries.session_events(reader, crashed, kind="note")[-1]
    assert (note["name"], note["t"], note["detail"]) == (
        "closed_interrupted",
        47.5,
        {"closed_at": "2031-04-07T22:30:00.000+02:00"},
    )
    assert queries.get_session(reader, still_running)["end_reason"] is None
    assert queries.list_sessions(reader, running=True) == [queries.get_session(reader, still_running)]
    reader.close()
    again.close()


def test_close_commits_what_is_buffered(db_path, store, begin):
    session_id = begin()
    store.write(session_id, EventLogged(t=1.0, kind="note", name="operator", detail={"text": "ok"}))
    store.close()
    conn = queries.open_readonly(db_path)
    assert conn.execute("SELECT count(*) FROM events").fetchone()[0] == 1
    conn.close()
