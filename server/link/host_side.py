"""The host side of one box's wire conversation, sans-I/O: bytes and time in, lines to write
and accepted input edges out. The asyncio link (serial_link.py) owns the port and the clock.

It ties the pure helpers together: the codec, the sequence tracker (gaps -> replay request,
duplicates dropped), pending commands (resend until acknowledged), the clock unwrapper and
clock sync (ping round trips). It lives as long as the session, across reconnects, so event
numbering and the clock estimate survive a dropped cable.
"""

from __future__ import annotations

import math
import secrets
from dataclasses import dataclass

from server.link.clock_sync import ClockSync
from server.link.codec import Decoder, encode
from server.link.messages import (
    RESULT_LOST,
    RESULT_OK,
    TOPIC_BEAT,
    TOPIC_IDENTITY,
    Ack,
    Beat,
    DriveCommand,
    Edge,
    HostCommand,
    Identity,
    PulseCommand,
    QueryCommand,
    ReplayCommand,
)
from server.link.pending import Pending, PendingCommands
from server.link.sequence import SequenceTracker, Verdict
from server.link.unwrap import DeviceClockUnwrapper

PING_EVERY_S = 1.0  # PROTOCOL.md section 9: `ask beat` every second
SILENCE_S = 3.0  # no valid line this long: the link is lost


# ---------------------------------------------------------------- what the host side reports


@dataclass(frozen=True, slots=True)
class EdgeArrived:
    """An input edge accepted in device order; `host_s` on the link's clock."""

    edge: Edge
    host_s: float
    seq: int  # number to store: the device's, continued across a device restart


@dataclass(frozen=True, slots=True)
class IdentitySeen:
    identity: Identity


@dataclass(frozen=True, slots=True)
class DeviceRestarted:
    """A new boot id: the device's held events, ring and clock started again."""

    old_boot: int
    new_boot: int


@dataclass(frozen=True, slots=True)
class EventsLost:
    """The device no longer held events first..first+count-1 when asked to replay them."""

    first: int
    count: int


@dataclass(frozen=True, slots=True)
class CommandFailed:
    """A command went unacknowledged through every resend."""

    pending: Pending


@dataclass(frozen=True, slots=True)
class CommandApplied:
    """The device acknowledged an output command (drive or pulse): it writes the ack right
    after applying it, so `device_us` (raw, as on the wire) is when the output changed on
    the device's clock; `host_s` is that time on the link's clock. An ack to a resend
    (`pending.attempts` > 1) may come from a repeat the device only answered, later."""

    pending: Pending
    device_us: int
    host_s: float


Happening = EdgeArrived | IdentitySeen | DeviceRestarted | EventsLost | CommandFailed | CommandApplied


class HostSide:
    """One box's protocol state on the host; feed it bytes and time, write `take_output()`."""

    def __init__(self, first_id: int | None = None, *, clock_window: int = 120) -> None:
        self.decoder = Decoder("device")
        self.pending = PendingCommands(first_id or 1 + secrets.randbelow(1 << 31))
        self.clock = ClockSync(window=clock_window)
        self.unwrap = DeviceClockUnwrapper()
        self.tracker: SequenceTracker | None = None  # set by the first identity
        self.identity: Identity | None = None
        self.boot: int | None = None
        self.seq_base = 0  # added to device numbers after a device restart
        self.last_line_s: float | None = None
        self.rx_rejected_by_device = 0
        self._next_ping_s = 0.0
        self._replay_asked_s: float | None = None
        self._clock_window = clock_window
        self._out = bytearray()
        self._pulse_until: dict[int, float] = {}  # channel -> when its last pulse is surely over
        self._held_pulses: dict[int, list[int]] = {}  # channel -> widths (ms) waiting their turn

    # ------------------------------------------------------------ sending

    def _send(self, command: HostCommand, now: float) -> HostCommand:
        self._out += encode(command)
        self.pending.sent(command, now)
        return command

    def drive(self, channel: int, on: bool, now: float) -> HostCommand:
        command = DriveCommand(self.pending.next_id(), channel, on)
        self.pending.supersede(command)  # an older resend must not overtake this one
        return self._send(command, now)

    def pulse(self, channel: int, ms: int, now: float) -> HostCommand | None:
        """Pulse an output; held back (None) while an earlier pulse there may still be on.

        A pulse that reaches the device while another runs on its output only restarts the
        time (PROTOCOL.md section 4), so two pellets would drop as one. An earlier pulse whose
        line was damaged and resent can arrive just before the next one: found on the
        simulated board. So the next pulse on an output waits for the earlier one's ack and
        its width.
        """
        if self._pulse_busy(channel, now) or self._held_pulses.get(channel):
            self._held_pulses.setdefault(channel, []).append(ms)
            return None
        return self._send_pulse(channel, ms, now)

    def _send_pulse(self, channel: int, ms: int, now: float) -> HostCommand:
        command = PulseCommand(self.pending.next_id(), channel, ms)
        self.pending.supersede(command)
        self._pulse_until[channel] = math.inf  # until its ack says when it started
        return self._send(command, now)

    def _pulse_busy(self, channel: int, now: float) -> bool:
        return now < self._pulse_until.get(channel, -math.inf)

    def _release_pulses(self, now: float) -> None:
        for channel, queued in self._held_pulses.items():
            if queued and not self._pulse_busy(channel, now):
                self._send_pulse(channel, queued.pop(0), now)

    def ask(self, topic: str, now: float) -> HostCommand:
        return self._send(QueryCommand(self.pending.next_id(), topic), now)

    def take_output(self) -> bytes:
        """Bytes to write to the port now (each line at most once)."""
        out, self._out = bytes(self._out), bytearray()
        return out

    # ------------------------------------------------------------ connection

    def connection_opened(self, now: float) -> None:
        """A fresh port: forget half-read lines, wait for an identity, ask a replay after it."""
        self.decoder = Decoder("device")
        self.last_line_s = now
        self._next_ping_s = now
        if self.tracker is not None:
            self.tracker.reconnected()

    def connection_lost(self) -> tuple[Pending, ...]:
        """Forget what was in flight (the caller restores held outputs after reconnecting);
        returns the commands that were never acknowledged."""
        unacked: list[Pending] = []
        while len(self.pending):  # run every command through its resends at once
            unacked.extend(self.pending.due(math.inf).given_up)
        self._out.clear()
        self._pulse_until.clear()
        self._held_pulses.clear()  # never sent: dropped with the link, like pulses asked while it is down
        return tuple(unacked)

    # ------------------------------------------------------------ receiving

    def receive(self, data: bytes, now: float) -> list[Happening]:
        out: list[Happening] = []
        for msg in self.decoder.feed(data):
            self.last_line_s = now
            if isinstance(msg, Edge):
                self._edge(msg, out)
            elif isinstance(msg, Ack):
                self._ack(msg, now, out)
            elif isinstance(msg, Beat):
                self.rx_rejected_by_device = msg.rx_rejected
                if self._boot_seen(msg.boot, msg.seq, out):
                    self.unwrap.unwrap(msg.device_us)
            elif isinstance(msg, Identity):
                self._identity(msg, out)
        self._ask_replay(now)
        return out

    def _identity(self, msg: Identity, out: list[Happening]) -> None:
        self.identity = msg
        if self.tracker is None:
            # PROTOCOL.md section 5: follow numbers from seq + 1 of the identity line.
            self.tracker = SequenceTracker(msg.seq + 1)
            self.boot = msg.boot
        else:
            self._boot_seen(msg.boot, msg.seq, out)
        out.append(IdentitySeen(msg))

    def _boot_seen(self, boot: int, seq: int, out: list[Happening]) -> bool:
        """Note a line's boot id and its last-written mark; False before any identity."""
        if self.tracker is None:
            return False
        if boot != self.boot:
            out.append(DeviceRestarted(self.boot if self.boot is not None else -1, boot))
            self.seq_base += self.tracker.expected - 1
            self.tracker = SequenceTracker(1)
            self.boot = boot
            self.unwrap.reset()
            self.clock = ClockSync(window=self._clock_window)
        self.tracker.on_mark(seq)
        return True

    def _edge(self, msg: Edge, out: list[Happening]) -> None:
        if self.tracker is None:
            return  # before the identity we cannot tell where numbering starts
        if self.tracker.on_event(msg.seq) is not Verdict.ACCEPT:
            return
        device_us = self.unwrap.unwrap(msg.device_us)
        fit = self.clock.fit()
        host_s = fit.to_host(device_us) if fit is not None else self.last_line_s or 0.0
        out.append(EdgeArrived(msg, host_s, self.seq_base + msg.seq))

    def _ack(self, msg: Ack, now: float, out: list[Happening]) -> None:
        if self.tracker is not None:
            self.tracker.on_mark(msg.seq)
        done = self.pending.acknowledge(msg.command_id)
        if done is None:
            return  # an ack repeated for a resend we already had answered
        if isinstance(done.command, DriveCommand | PulseCommand) and msg.result == RESULT_OK:
            fit = self.clock.fit()
            host_s = fit.to_host(self.unwrap.unwrap(msg.device_us)) if fit is not None else now
            out.append(CommandApplied(done, msg.device_us, min(host_s, now)))
        if isinstance(done.command, PulseCommand):
            # The ack is written right after the output went on: it is off by now + width.
            self._pulse_until[done.command.channel] = now + done.command.ms / 1000.0
            self._release_pulses(now)
        if isinstance(done.command, QueryCommand) and done.attempts == 1 and self.tracker:
            # Round trips of pings only (PROTOCOL.md section 9): about one a second keeps the
            # fit cheap; Karn & Partridge (1987): only a command sent once gives a clean one.
            self.clock.add(done.first_sent_s, self.unwrap.unwrap(msg.device_us), now)
        if isinstance(done.command, ReplayCommand) and msg.result == RESULT_LOST:
            gone = self.tracker.skip_to(msg.value) if self.tracker is not None else 0
            if gone:
                out.append(EventsLost(self.seq_base + msg.value - gone, gone))

    def _ask_replay(self, now: float) -> None:
        if self.tracker is None:
            return
        start = self.tracker.replay_from(now)
        if start is not None:
            self._send(ReplayCommand(self.pending.next_id(), start), now)
            self._replay_asked_s = now

    # ------------------------------------------------------------ time

    def poll(self, now: float) -> list[Happening]:
        """Resends, replay requests and pings due by `now`."""
        out: list[Happening] = []
        plan = self.pending.due(now)
        for command in plan.resend:
            self._out += encode(command)
        out.extend(CommandFailed(p) for p in plan.given_up)
        for p in plan.given_up:  # a pulse never acknowledged no longer holds its output
            if isinstance(p.command, PulseCommand):
                self._pulse_until.pop(p.command.channel, None)
        self._release_pulses(now)
        self._ask_replay(now)
        if self.tracker is not None and now >= self._next_ping_s:
            self.ask(TOPIC_BEAT, now)
            self._next_ping_s = now + PING_EVERY_S
        return out

    def next_deadline(self) -> float:
        """When `poll` next has something to do."""
        due = [self._next_ping_s] if self.tracker is not None else []
        resend = self.pending.next_deadline()
        if resend is not None:
            due.append(resend)
        due.extend(self._pulse_until[c] for c, q in self._held_pulses.items()
                   if q and c in self._pulse_until)  # fmt: skip
        if self.tracker is not None and self.tracker.missing and self._replay_asked_s is not None:
            due.append(self._replay_asked_s + self.tracker.holdoff_s)
        return min(due) if due else float("inf")

    def silent_for(self, now: float) -> float:
        return 0.0 if self.last_line_s is None else now - self.last_line_s

    def ask_identity(self, now: float) -> HostCommand:
        return self.ask(TOPIC_IDENTITY, now)
