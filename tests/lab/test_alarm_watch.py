"""Which condition changes become messages: rate-limited repeats, reminders, all clears,
one-shot kinds; and a channel's quiet hours and full queue (no network: a list as sender)."""

from __future__ import annotations

import threading
import time

from server.lab.alarm_send import ChannelThread, Outgoing
from server.lab.alarm_watch import AlarmNote, AlarmWatch
from server.lab.config_alarms import ALARM_KINDS, AlarmChannel, QuietHours, WebhookTo

LOST = {("rig-2", "link_lost"): "link lost"}


def states(notes):
    return [(n.box, n.kind, n.state, n.repeats) for n in notes]


def test_a_condition_is_raised_once_and_cleared_once():
    watch = AlarmWatch(repeat_s=600)
    assert states(watch.update(0.0, LOST)) == [("rig-2", "link_lost", "raised", 0)]
    assert watch.update(1.0, LOST) == [] and watch.update(2.0, LOST) == []
    [clear] = watch.update(30.0, {})
    assert (clear.state, clear.since_s) == ("cleared", 30.0)
    assert clear.line() == "rig-2: all clear: link lost is over (after 30 s)"


def test_flapping_within_the_repeat_window_is_counted_not_sent():
    watch = AlarmWatch(repeat_s=600)
    sent = []
    t = 0.0
    for _ in range(5):  # lost for 2 s every 20 s, as the soak's boxes are unplugged
        sent += watch.update(t, LOST)
        sent += watch.update(t + 2, {})
        t += 20
    assert states(sent) == [("rig-2", "link_lost", "raised", 0), ("rig-2", "link_lost", "cleared", 0)]
    # the next loss after the window says how many were held back
    [late] = watch.update(700.0, LOST)
    assert (late.state, late.repeats) == ("raised", 4)
    assert late.line() == "rig-2: link lost; 4 more times since the last message"


def test_a_condition_that_stays_is_said_again_once_per_window():
    watch = AlarmWatch(repeat_s=600)
    silent = {("rig-3", "no_response"): "no response for 5 min"}
    watch.update(0.0, silent)
    notes = [n for t in range(1, 1300) for n in watch.update(float(t), silent)]
    assert [(n.state, n.since_s) for n in notes] == [("still", 600.0), ("still", 1200.0)]
    assert notes[0].line() == "rig-3: still no response for 5 min (for 10 min)"


def test_a_raise_held_back_is_sent_late_if_the_condition_still_holds():
    watch = AlarmWatch(repeat_s=60)
    watch.update(0.0, LOST)
    watch.update(1.0, {})
    assert watch.update(10.0, LOST) == []  # within the window: held back
    [late] = watch.update(60.0, LOST)
    assert (late.state, late.repeats) == ("raised", 0)  # this very loss, not another one
    assert [n.state for n in watch.update(61.0, {})] == ["cleared"]


def test_one_shot_kinds_are_raised_per_distinct_text_and_never_cleared():
    watch = AlarmWatch(repeat_s=0)
    first = {("rig-4", "rule_alarm"): "rule alarm: stopped pressing"}
    assert states(watch.update(0.0, first)) == [("rig-4", "rule_alarm", "raised", 0)]
    assert watch.update(5.0, first) == []
    second = {("rig-4", "rule_alarm"): "rule alarm: too many omissions"}
    assert [n.text for n in watch.update(6.0, second)] == ["rule alarm: too many omissions"]
    assert watch.update(7.0, {}) == []  # no all clear for an event
    # the first message again, raised by the rule a second time later in the session
    again = watch.update(8.0, first, {("rig-4", "rule_alarm"): 3})
    assert [n.text for n in again] == ["rule alarm: stopped pressing"]


def note(box="rig-5", state="raised"):
    return Outgoing(AlarmNote("link_lost", box, state, "link lost", 0.0), "Rig 5", "2026-12-03T23:10:00+01:00")


def wait_for(check, timeout=5.0):
    deadline = time.monotonic() + timeout
    while not check() and time.monotonic() < deadline:
        time.sleep(0.01)
    return check()


def test_quiet_hours_hold_messages_and_send_what_still_holds_when_they_end():
    minute = [23 * 60 + 10]  # 23:10, inside 22:00-07:00
    sent: list[Outgoing] = []
    channel = AlarmChannel(WebhookTo("http://127.0.0.1:9/x"), frozenset(ALARM_KINDS), QuietHours(22 * 60, 7 * 60))
    thread = ChannelThread(channel, sent.append, size=10, say=lambda s: None, minute=lambda: minute[0])
    thread.start()
    thread.post(note("rig-5"))
    thread.post(note("rig-5", "cleared"))  # lost and back within the night: nothing to say
    thread.post(note("rig-6"))  # still lost in the morning
    time.sleep(0.2)
    assert sent == []
    minute[0] = 7 * 60 + 1
    with thread._wake:  # the thread looks at the clock every 30 s; the test does not wait that long
        thread._wake.notify()
    assert wait_for(lambda: len(sent) == 1)
    assert sent[0].note.box == "rig-6"
    thread.begin_close()
    thread.join(2)
    assert QuietHours(22 * 60, 7 * 60).holds(6 * 60 + 59) and not QuietHours(22 * 60, 7 * 60).holds(7 * 60)
    assert QuietHours(12 * 60, 13 * 60).holds(12 * 60 + 30) and not QuietHours(12 * 60, 13 * 60).holds(23 * 60)


def test_a_full_queue_drops_its_oldest_message_and_says_so():
    gate = threading.Event()
    sent: list[Outgoing] = []

    def slow(out: Outgoing) -> None:
        gate.wait()
        sent.append(out)

    said: list[str] = []
    channel = AlarmChannel(WebhookTo("http://127.0.0.1:9/x"), frozenset(ALARM_KINDS))
    thread = ChannelThread(channel, slow, size=2, say=said.append)
    thread.start()
    thread.post(note("rig-1"))  # taken by the thread, which then waits on the gate
    assert wait_for(lambda: not thread._queue)
    for box in ("rig-2", "rig-3", "rig-4", "rig-5"):
        thread.post(note(box))
    assert thread.dropped == 2
    assert [s for s in said if "queue full" in s] == [
        "warning: alarms to webhook 127.0.0.1:9: queue full (2); dropped the oldest message (rig-2: link lost)",
        "warning: alarms to webhook 127.0.0.1:9: queue full (2); dropped the oldest message (rig-3: link lost)",
    ]
    gate.set()
    assert wait_for(lambda: len(sent) == 3)
    assert [o.note.box for o in sent] == ["rig-1", "rig-4", "rig-5"]
    thread.begin_close()
    thread.join(2)
