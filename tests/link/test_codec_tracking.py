"""Pure helpers around the codec: counter unwrapping, sequence tracking, pending commands."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from server.link.codec import encode
from server.link.messages import PulseCommand, QueryCommand, ReplayCommand
from server.link.pending import PendingCommands
from server.link.sequence import SequenceTracker, Verdict
from server.link.unwrap import WRAP, DeviceClockUnwrapper

# ---------------------------------------------------------------- 32-bit counter wrap


def test_wrap_period_is_about_71_6_minutes():
    # 2**32 us = 4294.967296 s (arithmetic); the issue quotes ~71.6 min.
    assert WRAP / 1e6 / 60 == pytest.approx(71.58, abs=0.01)


def test_readings_across_the_wrap_keep_increasing():
    unwrap = DeviceClockUnwrapper()
    start = WRAP - 2_500_000
    raw = [(start + k * 1_000_000) % WRAP for k in range(6)]  # a beat a second, crossing 0
    assert raw[3] < raw[2]
    assert [unwrap.unwrap(r) for r in raw] == [start + k * 1_000_000 for k in range(6)]


@given(st.integers(0, WRAP - 1), st.lists(st.integers(0, WRAP // 2 - 1), min_size=1, max_size=60))
def test_unwrapped_time_matches_true_64_bit_time(t0, steps):
    unwrap = DeviceClockUnwrapper()
    true = t0
    assert unwrap.unwrap(true % WRAP) == t0
    for step in steps:  # forward steps under half a wrap, possibly many wraps in all
        true += step
        assert unwrap.unwrap(true % WRAP) == true
    assert unwrap.newest == true


def test_an_older_replayed_reading_lands_before_the_newest_without_moving_it():
    unwrap = DeviceClockUnwrapper()
    unwrap.unwrap(WRAP - 100)
    assert unwrap.unwrap(400) == WRAP + 400  # wrapped forward
    assert unwrap.unwrap(WRAP - 50) == WRAP - 50  # a replayed event from before the wrap
    assert unwrap.newest == WRAP + 400
    assert unwrap.unwrap(900) == WRAP + 900


def test_unwrapper_reset_and_range():
    unwrap = DeviceClockUnwrapper()
    unwrap.unwrap(5_000)
    unwrap.reset()
    assert unwrap.newest is None and unwrap.unwrap(7) == 7
    with pytest.raises(ValueError, match="device time out of range: 4294967296"):
        unwrap.unwrap(WRAP)


# ---------------------------------------------------------------- sequence tracking


def test_in_order_events_are_accepted_and_repeats_dropped():
    seq = SequenceTracker()
    assert [seq.on_event(n) for n in (1, 2, 3)] == [Verdict.ACCEPT] * 3
    assert seq.on_event(2) is Verdict.DUPLICATE and seq.duplicates == 1
    assert seq.expected == 4 and seq.replay_from(0.0) is None


def test_a_gap_asks_for_replay_from_the_first_missing_event_once_per_holdoff():
    seq = SequenceTracker(holdoff_s=0.5)
    seq.on_event(1)
    assert seq.on_event(4) is Verdict.AHEAD  # 2 and 3 lost
    assert seq.replay_from(10.0) == 2
    assert seq.on_event(5) is Verdict.AHEAD
    assert seq.replay_from(10.2) is None  # the request stands
    assert seq.replay_from(10.5) == 2  # no progress in 0.5 s: ask again
    for n in (2, 3, 4, 5):
        assert seq.on_event(n) is Verdict.ACCEPT
    assert not seq.missing and seq.replay_from(10.6) is None


def test_progress_then_a_new_gap_asks_again_at_once():
    seq = SequenceTracker()
    seq.on_event(1)
    seq.on_event(3)
    assert seq.replay_from(1.0) == 2
    seq.on_event(2)
    seq.on_event(4)  # 3 was dropped as ahead; replay under way brings 3.. back
    assert seq.replay_from(1.01) == 3


def test_a_heartbeat_mark_reveals_a_lost_trailing_event():
    seq = SequenceTracker()
    seq.on_event(1)
    seq.on_mark(1)
    assert seq.replay_from(0.0) is None
    seq.on_mark(2)  # the beat says event 2 was written, and we never saw it
    assert seq.replay_from(0.1) == 2


def test_events_the_ring_no_longer_holds_are_skipped_and_counted():
    seq = SequenceTracker()
    seq.on_event(1)
    seq.on_event(300)
    assert seq.replay_from(0.0) == 2
    assert seq.skip_to(173) == 171  # ack "lost", value 173: the oldest still held
    assert seq.lost == 171 and seq.expected == 173
    assert seq.skip_to(100) == 0  # nothing to give up behind us


def test_reconnect_asks_for_replay_even_with_nothing_known_missing():
    seq = SequenceTracker(next_seq=41)
    assert seq.replay_from(0.0) is None
    seq.reconnected()
    assert seq.replay_from(0.0) == 41
    assert seq.replay_from(0.1) is None


def test_tracker_refuses_a_start_below_one():
    with pytest.raises(ValueError, match="at least 1: 0"):
        SequenceTracker(next_seq=0)


def test_lossy_duplicating_link_delivers_every_event_once_in_order():
    """A device model with a ring and replay (PROTOCOL.md s6) over a link that drops 20 %
    and duplicates 10 % of lines; the host keeps exactly events 1..N."""
    rng = np.random.default_rng(3)
    n_events, ring = 400, 128
    device_last = 0
    cursor = 1  # next event the device writes
    host = SequenceTracker()
    kept: list[int] = []
    now = 0.0
    for step in range(20_000):
        now += 0.01
        if device_last < n_events and rng.random() < 0.1:  # events far slower than lines
            device_last += 1
        wire: list[tuple[str, int]] = []
        if cursor <= device_last:
            wire.append(("edge", cursor))
            cursor += 1
        if step % 100 == 0:
            wire.append(("beat", cursor - 1))
        for kind, number in wire:
            if rng.random() < 0.2:
                continue  # dropped
            for _ in range(2 if rng.random() < 0.1 else 1):
                if kind == "beat":
                    host.on_mark(number)
                elif host.on_event(number) is Verdict.ACCEPT:
                    kept.append(number)
        ask = host.replay_from(now)
        if ask is not None and rng.random() >= 0.2:  # the request itself may be lost
            assert ask >= device_last - ring + 1  # still held: this link never stays away long
            cursor = ask
        if device_last == n_events and len(kept) == n_events:
            break
    assert kept == list(range(1, n_events + 1))
    assert host.duplicates > 0 and host.dropped_ahead > 0  # the link really misbehaved


# ---------------------------------------------------------------- pending commands


def test_ids_count_up_from_the_chosen_start():
    pending = PendingCommands(first_id=1_000_000)
    assert [pending.next_id() for _ in range(3)] == [1_000_000, 1_000_001, 1_000_002]


def test_unacknowledged_command_is_resent_with_the_same_id_then_given_up():
    pending = PendingCommands(first_id=7, resend_after_s=0.25, max_attempts=3)
    cmd = PulseCommand(pending.next_id(), 7, 40)
    pending.sent(cmd, now=100.0)
    assert pending.next_deadline() == pytest.approx(100.25)
    assert pending.due(100.2).resend == ()
    plan = pending.due(100.25)
    assert plan.resend == (cmd,) and plan.given_up == ()
    assert encode(plan.resend[0]) == encode(cmd)  # byte-identical: the device sees a repeat
    assert pending.due(100.4).resend == ()
    assert pending.due(100.5).resend == (cmd,)  # third send
    plan = pending.due(100.75)
    assert plan.resend == () and [p.command for p in plan.given_up] == [cmd]
    assert plan.given_up[0].attempts == 3 and len(pending) == 0
    assert pending.next_deadline() is None


def test_ack_returns_the_round_trip_and_only_first_sends_make_clock_samples():
    pending = PendingCommands()
    ping = QueryCommand(pending.next_id(), "beat")
    late = QueryCommand(pending.next_id(), "beat")
    pending.sent(ping, 5.0)
    pending.sent(late, 5.0)
    pending.due(5.3)  # both resent
    got = pending.acknowledge(ping.command_id)
    assert got is not None and got.first_sent_s == 5.0 and got.last_sent_s == 5.3
    assert got.attempts == 2  # ambiguous round trip: not a clock sample (Karn & Partridge 1987)
    assert pending.acknowledge(ping.command_id) is None  # a repeated ack is harmless
    assert late.command_id in pending and ping.command_id not in pending


def test_after_a_reconnect_everything_pending_goes_out_again_in_order():
    pending = PendingCommands()
    cmds = [ReplayCommand(pending.next_id(), 5), PulseCommand(pending.next_id(), 7, 40)]
    for c in cmds:
        pending.sent(c, 1.0)
    assert pending.resend_all(9.0) == tuple(cmds)
    assert pending.next_deadline() == pytest.approx(9.25)


def test_pending_refuses_misuse():
    pending = PendingCommands()
    cmd = QueryCommand(pending.next_id(), "iam")
    pending.sent(cmd, 0.0)
    with pytest.raises(ValueError, match="already pending: 1"):
        pending.sent(cmd, 0.1)
    with pytest.raises(ValueError, match="first command id out of range"):
        PendingCommands(first_id=0)
    last = PendingCommands(first_id=2**32 - 1)
    last.next_id()
    with pytest.raises(ValueError, match="command ids exhausted"):
        last.next_id()
