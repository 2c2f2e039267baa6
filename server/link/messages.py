"""The messages of the box wire protocol (hardware_stubs/PROTOCOL.md), as frozen dataclasses.

Device lines carry `seq`: an input edge's own event number, or, on every other device line,
the number of the last event written before it (so a lost trailing event shows up on the
next heartbeat). Host lines carry `command_id`, which is also their line sequence number.
"""

from __future__ import annotations

from dataclasses import dataclass

from server.protocol.wiring import INPUT_KINDS, OUTPUT_KINDS

PROTOCOL_VERSION = 1

# Two-letter wire codes for the hardware kinds of server.protocol.wiring (ours).
INPUT_KIND_CODES = {
    "lever_press": "lp",
    "head_entry": "he",
    "nose_poke": "np",
    "lick": "lk",
    "pellet_sensor": "ps",
}
OUTPUT_KIND_CODES = {
    "lever": "lv",
    "cue_light": "cl",
    "house_light": "hl",
    "tone": "tn",
    "aversive": "av",
    "feeder": "fd",
    "sync": "sy",
}
assert set(INPUT_KIND_CODES) == set(INPUT_KINDS) and set(OUTPUT_KIND_CODES) == set(OUTPUT_KINDS)

# A code this build does not know decodes to "unknown:xx", so a newer device still completes
# the handshake and the wiring check can name the channel, instead of the line being dropped.
UNKNOWN_KIND_PREFIX = "unknown:"

# Results a device may put in an acknowledgement.
RESULT_OK = "ok"
RESULT_LOST = "lost"  # replay: the ring no longer holds the requested events
RESULT_NO_CHANNEL = "no-channel"
RESULT_BAD_VALUE = "bad-value"
RESULTS = (RESULT_OK, RESULT_LOST, RESULT_NO_CHANNEL, RESULT_BAD_VALUE)

# Query topics the reference firmware answers.
TOPIC_IDENTITY = "iam"
TOPIC_BEAT = "beat"


# ---------------------------------------------------------------- device -> host


@dataclass(frozen=True, slots=True)
class Channel:
    number: int
    kind: str  # a kind of server.protocol.wiring, or "unknown:xx"


@dataclass(frozen=True, slots=True)
class Identity:
    """Handshake: who the device is, which protocol it speaks, what it has wired."""

    seq: int  # last event written
    firmware: str
    version: int
    boot: int  # changes on every device restart: the event ring and clock start again
    inputs: tuple[Channel, ...]
    outputs: tuple[Channel, ...]


@dataclass(frozen=True, slots=True)
class Edge:
    """A debounced input edge, stamped by the device's free-running microsecond counter."""

    seq: int
    channel: int
    rising: bool
    device_us: int  # 32-bit, wraps every 2**32 us (about 71.6 min)


@dataclass(frozen=True, slots=True)
class Beat:
    """Heartbeat: liveness, the device clock, and how many bad host lines it has dropped."""

    seq: int  # last event written
    device_us: int
    boot: int
    rx_rejected: int


@dataclass(frozen=True, slots=True)
class Ack:
    """Acknowledges one host command; `device_us` is when this ack was written."""

    seq: int  # last event written
    command_id: int
    result: str
    device_us: int
    value: int  # result detail: first seq to be replayed for a replay, else 0


DeviceMessage = Identity | Edge | Beat | Ack


# ---------------------------------------------------------------- host -> device


@dataclass(frozen=True, slots=True)
class DriveCommand:
    """Hold an output on or off (cancels a pulse in progress on that channel)."""

    command_id: int
    channel: int
    on: bool


@dataclass(frozen=True, slots=True)
class PulseCommand:
    """Turn an output on for `ms` milliseconds, timed on the device."""

    command_id: int
    channel: int
    ms: int


@dataclass(frozen=True, slots=True)
class QueryCommand:
    """Ask for a line now: "iam" (identity) or "beat" (a heartbeat, used as a ping)."""

    command_id: int
    topic: str


@dataclass(frozen=True, slots=True)
class ReplayCommand:
    """Resend every event still held from `from_seq` on, in order."""

    command_id: int
    from_seq: int


HostCommand = DriveCommand | PulseCommand | QueryCommand | ReplayCommand
Message = DeviceMessage | HostCommand
