"""The device side of the box wire protocol, sans-I/O: the reference firmware's state machine
in Python, so the emulated box answers exactly as a real box would.

It mirrors hardware_stubs/firmware/vproto.c step for step (event ring and write cursor,
replay, (id, CRC) memory for idempotent commands, acks queued behind the query lines they
answer, a beat every second, every output off after 5 s without a valid host line), with
one difference: channel numbers come from a channel map instead of counting from 1, so an
emulated box can carry a protocol's own wiring. Time is passed in as the device's 32-bit
microsecond counter; nothing here reads a clock or touches a port.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable
from dataclasses import dataclass

from server.link.codec import Decoder, encode
from server.link.messages import (
    PROTOCOL_VERSION,
    RESULT_BAD_VALUE,
    RESULT_LOST,
    RESULT_NO_CHANNEL,
    RESULT_OK,
    TOPIC_BEAT,
    TOPIC_IDENTITY,
    Ack,
    Beat,
    Channel,
    DriveCommand,
    Edge,
    Identity,
    PulseCommand,
    QueryCommand,
    ReplayCommand,
)

RING = 128  # events held for replay (vproto.h VP_RING)
RX_MAX = 40  # receive buffer: no valid host line is longer than 33 bytes (VP_RX_MAX)
MEMORY = 16  # set/pulse commands remembered for idempotence (VP_MEMORY)
BEAT_US = 1_000_000  # heartbeat period (VP_BEAT_US)
HOST_SILENCE_US = 5_000_000  # no valid host line this long: outputs off (VP_HOST_SILENCE_US)
U32 = 1 << 32


def reached(now_us: int, deadline_us: int) -> bool:
    """True once `now` has reached `deadline` on a wrapping 32-bit counter (half-range rule)."""
    return (now_us - deadline_us) % U32 < U32 // 2


@dataclass(frozen=True, slots=True)
class _QueuedAck:
    command_id: int
    result: str
    value: int
    before: str | None  # query line written just before the ack: "iam", "beat" or None


class DeviceWire:
    """One box's protocol state; feed it bytes and time, take the lines it writes.

    `set_output(channel, on)` is called whenever the device drives an output, as the
    firmware's board layer is: a pulse is an on now and an off when its time is up.
    """

    def __init__(
        self,
        inputs: tuple[Channel, ...],
        outputs: tuple[Channel, ...],
        set_output: Callable[[int, bool], None],
        boot: int,
        now_us: int,
        *,
        firmware: str = "vigil-emu-1.0",
        ring: int = RING,
    ) -> None:
        self.inputs = inputs
        self.outputs = outputs
        self._output_numbers = frozenset(c.number for c in outputs)
        self._set_output = set_output
        self.boot = boot
        self.firmware = firmware
        self._ring_size = ring
        self._ring: dict[int, tuple[int, int, bool]] = {}  # seq -> (channel, rising, t_us)
        self.last_seq = 0  # newest event number, 0 before the first
        self.cursor = 1  # next event number to write
        self._memo: deque[tuple[int, int, str]] = deque(maxlen=MEMORY)  # (id, crc, result)
        self._acks: deque[_QueuedAck] = deque()
        self._want_identity = True  # announce ourselves after every boot
        self._beat_due = (now_us + BEAT_US) % U32
        self._host_seen = now_us
        self._host_silent = True  # outputs start off: already safe
        self._pulse_end: dict[int, int] = {}  # channel -> device time its pulse ends
        self.on: set[int] = set()  # outputs driven on now
        self._rx = b""
        self._rx_overlong = False
        self.rx_rejected = 0
        self._host_lines = Decoder("host")
        for ch in outputs:
            self._drive(ch.number, False)

    # ------------------------------------------------------------ events

    def _oldest_held(self) -> int:
        return self.last_seq - self._ring_size + 1 if self.last_seq >= self._ring_size else 1

    def add_event(self, channel: int, rising: bool, t_us: int) -> int:
        """Hold a debounced input edge stamped `t_us`; returns its event number."""
        self.last_seq += 1
        self._ring[self.last_seq] = (channel, rising, t_us % U32)
        self._ring.pop(self.last_seq - self._ring_size, None)
        if self.cursor < self._oldest_held():
            self.cursor = self._oldest_held()  # overwritten before it was written: lost
        return self.last_seq

    # ------------------------------------------------------------ outputs and time

    def _drive(self, channel: int, on: bool) -> None:
        if on:
            self.on.add(channel)
        else:
            self.on.discard(channel)
        self._set_output(channel, on)

    def tick(self, now_us: int) -> None:
        """Pulse ends and the host-silence safe state (the firmware's vp_tick)."""
        for channel, end in sorted(self._pulse_end.items()):
            if reached(now_us, end):
                del self._pulse_end[channel]
                self._drive(channel, False)
        if not self._host_silent and reached(now_us, (self._host_seen + HOST_SILENCE_US) % U32):
            self._host_silent = True
            self.safe_state()

    def safe_state(self) -> None:
        """Every output off, pulses cancelled (the firmware's all_off)."""
        for ch in self.outputs:
            self._drive(ch.number, False)
        self._pulse_end.clear()

    @property
    def host_silent(self) -> bool:
        """Outputs are in the safe state for want of a host."""
        return self._host_silent

    # ------------------------------------------------------------ receiving

    def receive(self, data: bytes, now_us: int) -> None:
        """Bytes from the host; each complete line is checked, then carried out."""
        rx = self._rx + data
        *lines, self._rx = rx.split(b"\n")
        if len(self._rx) > RX_MAX:
            self._rx, self._rx_overlong = b"", True
        for line in lines:
            overlong, self._rx_overlong = self._rx_overlong or len(line) > RX_MAX, False
            if overlong or not self._take_line(line, now_us):
                self.rx_rejected += 1

    def _take_line(self, line: bytes, now_us: int) -> bool:
        messages = self._host_lines.feed(line + b"\n")
        if not messages:
            return False
        msg = messages[0]
        crc = int(line.rstrip(b"\r")[-4:], 16)
        if isinstance(msg, (DriveCommand, PulseCommand)):
            memo = next((m for m in self._memo if m[0] == msg.command_id and m[1] == crc), None)
            result = memo[2] if memo is not None else self._actuate(msg, now_us)
            if memo is None:
                self._memo.append((msg.command_id, crc, result))
            self._acks.append(_QueuedAck(msg.command_id, result, 0, None))
        elif isinstance(msg, QueryCommand):
            if msg.topic in (TOPIC_IDENTITY, TOPIC_BEAT):
                self._acks.append(_QueuedAck(msg.command_id, RESULT_OK, 0, msg.topic))
            else:
                self._acks.append(_QueuedAck(msg.command_id, RESULT_BAD_VALUE, 0, None))
        elif isinstance(msg, ReplayCommand):
            self._replay(msg.command_id, msg.from_seq)
        else:  # pragma: no cover - Decoder("host") yields host commands only
            return False
        self._host_seen = now_us
        self._host_silent = False
        return True

    def _actuate(self, msg: DriveCommand | PulseCommand, now_us: int) -> str:
        channel = msg.channel
        if channel not in self._output_numbers:
            return RESULT_NO_CHANNEL
        if isinstance(msg, PulseCommand):
            self._pulse_end[channel] = (now_us + msg.ms * 1000) % U32
            self._drive(channel, True)
        else:
            self._pulse_end.pop(channel, None)
            self._drive(channel, msg.on)
        return RESULT_OK

    def _replay(self, command_id: int, start: int) -> None:
        oldest = self._oldest_held()
        if start > self.last_seq + 1:
            self._acks.append(_QueuedAck(command_id, RESULT_BAD_VALUE, self.last_seq + 1, None))
        elif start < oldest:
            self.cursor = oldest
            self._acks.append(_QueuedAck(command_id, RESULT_LOST, oldest, None))
        else:
            self.cursor = start
            self._acks.append(_QueuedAck(command_id, RESULT_OK, start, None))

    # ------------------------------------------------------------ writing

    def identity(self) -> Identity:
        return Identity(self.cursor - 1, self.firmware, PROTOCOL_VERSION, self.boot, self.inputs, self.outputs)

    def _beat(self, now_us: int) -> Beat:
        self._beat_due = (now_us + BEAT_US) % U32
        return Beat(self.cursor - 1, now_us, self.boot, self.rx_rejected)

    def write_next(self, now_us: int) -> bytes | None:
        """The next line due, or None. Order: a query's line, then acks, the boot identity,
        a due beat, then events in order (as vp_write_next)."""
        if self._acks:
            ack = self._acks[0]
            if ack.before is not None:
                self._acks[0] = _QueuedAck(ack.command_id, ack.result, ack.value, None)
                return encode(self.identity() if ack.before == TOPIC_IDENTITY else self._beat(now_us))
            self._acks.popleft()
            return encode(Ack(self.cursor - 1, ack.command_id, ack.result, now_us, ack.value))
        if self._want_identity:
            self._want_identity = False
            return encode(self.identity())
        if reached(now_us, self._beat_due):
            return encode(self._beat(now_us))
        if self.cursor <= self.last_seq:
            channel, rising, t_us = self._ring[self.cursor]
            line = encode(Edge(self.cursor, channel, rising, t_us))
            self.cursor += 1
            return line
        return None

    def write_all(self, now_us: int) -> list[bytes]:
        """Every line due now, in order."""
        out = []
        while (line := self.write_next(now_us)) is not None:
            out.append(line)
        return out
