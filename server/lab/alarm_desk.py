"""The lab's alarms: what holds for each box, the store and the disk, and where it is sent.

The supervisor calls `AlarmDesk.check` on its loop about once a second with every box's
facts (the same `BoxFacts` the status page is fed, so the page's alarm strip and the
messages agree), what the store reports and the free space on the database's disk. The desk
turns changes into messages (`AlarmWatch`) and hands them to each channel's own thread;
nothing here waits on the network.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable, Mapping

from server.lab.alarm_send import FIRST_RETRY_S, ChannelThread, Outgoing, make_sender
from server.lab.alarm_watch import LAB_WIDE, AlarmNote, AlarmWatch
from server.lab.config_alarms import AlarmSettings
from server.lab.status import BoxFacts, alarms_for
from server.store.wall_clock import wall_now

CLOSE_GRACE_S = 5.0


class AlarmSetupError(Exception):
    """A channel cannot be set up (an environment variable it names is not set)."""


def box_conditions(facts: BoxFacts, now: float, quiet_after_s: float) -> dict[tuple[str, str], str]:
    """(box, kind) -> text of the alarms one box raises at session time `now`."""
    finished = facts["finished"]
    if finished and facts["ended_at"] is not None:
        now = facts["ended_at"]
    last = facts["last_input_t"]
    found = alarms_for(
        running=not finished,
        paused=facts["paused"],
        link_lost=facts["link_lost"],
        silent_s=now - (last if last is not None else 0.0),
        cap_reached=facts["cap_reached"],
        end_reason=facts["end_reason"],
        quiet_after_s=quiet_after_s,
        rule_alarm=facts["rule_alarm"],
    )
    return {(facts["box"], alarm.kind): alarm.text for alarm in found}


def lab_conditions(store_problem: str | None, disk_free_mb: float | None, threshold_mb: float) -> dict:
    found = {}
    if store_problem:
        found[(LAB_WIDE, "store_unreachable")] = f"store unreachable: {store_problem}"
    if disk_free_mb is not None and disk_free_mb < threshold_mb:
        found[(LAB_WIDE, "disk_nearly_full")] = (
            f"disk nearly full: {disk_free_mb:.0f} MB free for the database (alarm below {threshold_mb:g} MB)"
        )
    return found


class AlarmDesk:
    def __init__(
        self,
        settings: AlarmSettings,
        lab: str,
        no_response_minutes: float,
        *,
        say: Callable[[str], None] = print,
        environ: dict[str, str] | None = None,
        senders: Mapping[int, Callable[[Outgoing], None]] | None = None,
        first_retry_s: float = FIRST_RETRY_S,
    ):
        """`senders` replaces the send function of channels by index (tests, benchmarks)."""
        self.settings = settings
        self.lab = lab
        self.quiet_after_s = (settings.no_response_minutes or no_response_minutes) * 60.0
        self.watch = AlarmWatch(settings.repeat_minutes * 60.0)
        self.say = say
        self.channels: list[ChannelThread] = []
        for i, channel in enumerate(settings.channels):
            try:
                send = senders[i] if senders and i in senders else make_sender(channel, environ)
            except KeyError as exc:
                raise AlarmSetupError(
                    f"alarms.send[{i + 1}] ({channel.label}): environment variable {exc.args[0]} is not set"
                ) from None
            self.channels.append(
                ChannelThread(channel, send, size=settings.queue, say=say, first_retry_s=first_retry_s)
            )
        self._about: dict[str, dict] = {}

    def start(self) -> None:
        for channel in self.channels:
            channel.start()
        if self.channels:
            self.say(f"alarms go to: {', '.join(c.label for c in self.channels)}")

    def check(
        self,
        now: float,
        boxes: Iterable[BoxFacts],
        store_problem: str | None = None,
        disk_free_mb: float | None = None,
        rule_alarms: Mapping[str, int] | None = None,
    ) -> list[AlarmNote]:
        """Compare what holds now with what held before; post and return the messages due.

        `rule_alarms`: box -> alarms its rules raised so far (a repeated message is a new one)."""
        holding: dict[tuple[str, str], str] = {}
        for facts in boxes:
            self._about[facts["box"]] = {"animal": facts["animal"], "session_id": facts["session_id"]}
            holding.update(box_conditions(facts, now, self.quiet_after_s))
        holding.update(lab_conditions(store_problem, disk_free_mb, self.settings.disk_free_mb))
        counts = {(box, "rule_alarm"): n for box, n in (rule_alarms or {}).items()}
        notes = self.watch.update(now, holding, counts)
        if notes:
            at = wall_now()
            for note in notes:
                self.say(f"alarm: {note.line()}")
                out = Outgoing(note, self.lab, at, self._about.get(note.box, {}))
                for channel in self.channels:
                    channel.post(out)
        return notes

    def close(self, grace_s: float = CLOSE_GRACE_S) -> None:
        """Give every channel `grace_s` together to send what is queued, then stop them."""
        for channel in self.channels:
            channel.begin_close()
        deadline = time.monotonic() + grace_s
        for channel in self.channels:
            channel.join(max(0.0, deadline - time.monotonic()))
