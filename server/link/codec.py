"""Sans-I/O codec of the box wire protocol: bytes in -> messages out, message -> bytes.

The same code serves the host link, the emulated box and the fuzz tests; it owns no port and
no clock. Grammar and rationale: hardware_stubs/PROTOCOL.md.
"""

from __future__ import annotations

import binascii
import re
from collections import Counter
from collections.abc import Callable
from typing import Literal

from server.link.messages import (
    INPUT_KIND_CODES,
    OUTPUT_KIND_CODES,
    UNKNOWN_KIND_PREFIX,
    Ack,
    Beat,
    Channel,
    DriveCommand,
    Edge,
    Identity,
    Message,
    PulseCommand,
    QueryCommand,
    ReplayCommand,
)

# Longest line accepted, not counting the LF (an optional CR counts). The longest line the
# reference firmware writes (its identity) is about 140 bytes.
MAX_LINE = 255
U32_MAX = 0xFFFF_FFFF
U16_MAX = 0xFFFF
CHANNEL_MAX = 255
VERSION_MAX = 255
CRC_INIT = 0xFFFF

# Reasons a line is dropped; the decoder counts each.
EMPTY = "empty"
OVERLONG = "overlong"
NON_ASCII = "non_ascii"
NO_CRC = "no_crc"
BAD_CRC = "bad_crc"
BAD_SYNTAX = "bad_syntax"
UNKNOWN_VERB = "unknown_verb"
WRONG_SIDE = "wrong_side"
REASONS = (EMPTY, OVERLONG, NON_ASCII, NO_CRC, BAD_CRC, BAD_SYNTAX, UNKNOWN_VERB, WRONG_SIDE)

_FIRMWARE = re.compile(rb"[A-Za-z0-9._-]{1,32}")
_TOPIC = re.compile(rb"[a-z]{1,8}")
_RESULT = re.compile(rb"[a-z][a-z-]{0,11}")
_KIND = re.compile(rb"[a-z]{2}")


def crc16_ccitt_false(data: bytes) -> int:
    """CRC-16/CCITT-FALSE: poly 0x1021, init 0xFFFF, no reflection, no final xor."""
    # binascii.crc_hqx is this CRC when started from 0xFFFF (Python binascii docs).
    return binascii.crc_hqx(data, CRC_INIT)


_crc = binascii.crc_hqx


# ---------------------------------------------------------------- field parsing


def _num(tok: bytes, hi: int) -> int:
    """Decimal 0..hi with no sign, no leading zero, no spaces; -1 when not."""
    if not tok.isdigit() or len(tok) > 10 or (tok[0] == 48 and len(tok) > 1):
        return -1
    value = int(tok)
    return value if value <= hi else -1


def _channels(tok: bytes, kinds: dict[bytes, str]) -> tuple[Channel, ...] | None:
    """`-` or `n:cc,n:cc,...` with channel numbers strictly increasing."""
    if tok == b"-":
        return ()
    out: list[Channel] = []
    last = -1
    for item in tok.split(b","):
        num, colon, code = item.partition(b":")
        number = _num(num, CHANNEL_MAX)
        if not colon or number <= last or not _KIND.fullmatch(code):
            return None
        kind = kinds.get(code)
        out.append(Channel(number, kind or UNKNOWN_KIND_PREFIX + code.decode()))
        last = number
    return tuple(out)


_INPUT_KINDS = {c.encode(): k for k, c in INPUT_KIND_CODES.items()}
_OUTPUT_KINDS = {c.encode(): k for k, c in OUTPUT_KIND_CODES.items()}


# ---------------------------------------------------------------- device -> host lines


def _parse_identity(p: list[bytes]) -> Identity | None:
    if len(p) != 7 or not _FIRMWARE.fullmatch(p[2]):
        return None
    seq, version, boot = _num(p[0], U32_MAX), _num(p[3], VERSION_MAX), _num(p[4], U16_MAX)
    inputs, outputs = _channels(p[5], _INPUT_KINDS), _channels(p[6], _OUTPUT_KINDS)
    if seq < 0 or version < 1 or boot < 0 or inputs is None or outputs is None:
        return None
    return Identity(seq, p[2].decode(), version, boot, inputs, outputs)


def _parse_edge(p: list[bytes]) -> Edge | None:
    if len(p) != 5:
        return None
    seq, channel, us, sign = _num(p[0], U32_MAX), _num(p[2], CHANNEL_MAX), _num(p[4], U32_MAX), p[3]
    if seq < 1 or channel < 0 or us < 0 or (sign != b"+" and sign != b"-"):
        return None
    return Edge(seq, channel, sign == b"+", us)


def _parse_beat(p: list[bytes]) -> Beat | None:
    if len(p) != 5:
        return None
    seq, us, boot, bad = (
        _num(p[0], U32_MAX),
        _num(p[2], U32_MAX),
        _num(p[3], U16_MAX),
        _num(p[4], U32_MAX),
    )
    if seq < 0 or us < 0 or boot < 0 or bad < 0:
        return None
    return Beat(seq, us, boot, bad)


def _parse_ack(p: list[bytes]) -> Ack | None:
    if len(p) != 6 or not _RESULT.fullmatch(p[3]):
        return None
    seq, cid, us, value = (
        _num(p[0], U32_MAX),
        _num(p[2], U32_MAX),
        _num(p[4], U32_MAX),
        _num(p[5], U32_MAX),
    )
    if seq < 0 or cid < 1 or us < 0 or value < 0:
        return None
    return Ack(seq, cid, p[3].decode(), us, value)


# ---------------------------------------------------------------- host -> device lines


def _parse_drive(p: list[bytes]) -> DriveCommand | None:
    if len(p) != 4 or (p[3] != b"1" and p[3] != b"0"):
        return None
    cid, channel = _num(p[0], U32_MAX), _num(p[2], CHANNEL_MAX)
    if cid < 1 or channel < 0:
        return None
    return DriveCommand(cid, channel, p[3] == b"1")


def _parse_pulse(p: list[bytes]) -> PulseCommand | None:
    if len(p) != 4:
        return None
    cid, channel, ms = _num(p[0], U32_MAX), _num(p[2], CHANNEL_MAX), _num(p[3], U16_MAX)
    if cid < 1 or channel < 0 or ms < 1:
        return None
    return PulseCommand(cid, channel, ms)


def _parse_query(p: list[bytes]) -> QueryCommand | None:
    if len(p) != 3 or not _TOPIC.fullmatch(p[2]):
        return None
    cid = _num(p[0], U32_MAX)
    return QueryCommand(cid, p[2].decode()) if cid >= 1 else None


def _parse_replay(p: list[bytes]) -> ReplayCommand | None:
    if len(p) != 3:
        return None
    cid, seq = _num(p[0], U32_MAX), _num(p[2], U32_MAX)
    return ReplayCommand(cid, seq) if cid >= 1 and seq >= 1 else None


Parser = Callable[[list[bytes]], Message | None]
DEVICE_VERBS: dict[bytes, Parser] = {
    b"iam": _parse_identity,
    b"edge": _parse_edge,
    b"beat": _parse_beat,
    b"ack": _parse_ack,
}
HOST_VERBS: dict[bytes, Parser] = {
    b"set": _parse_drive,
    b"pulse": _parse_pulse,
    b"ask": _parse_query,
    b"replay": _parse_replay,
}


class Decoder:
    """Turns a byte stream into messages; bad lines are counted by reason and dropped.

    `source` says who writes the stream: "device" (the host's view), "host" (the box's
    view) or None for either (logs, fuzzing). Lines of the other side count as wrong_side,
    so an echoing adaptor can never be mistaken for the peer.
    """

    def __init__(self, source: Literal["device", "host"] | None = "device") -> None:
        if source == "device":
            self._verbs, self._others = DEVICE_VERBS, HOST_VERBS
        elif source == "host":
            self._verbs, self._others = HOST_VERBS, DEVICE_VERBS
        elif source is None:
            self._verbs, self._others = {**DEVICE_VERBS, **HOST_VERBS}, {}
        else:
            raise ValueError(f"unknown line source: {source!r}")
        self._partial = b""
        self._discarding = False  # inside an overlong line: drop bytes until the next LF
        self.accepted = 0
        self.rejected: Counter[str] = Counter()
        self.last_rejected: bytes | None = None  # first 80 bytes of the latest bad line

    @property
    def rejected_total(self) -> int:
        return sum(self.rejected.values())

    @property
    def buffered(self) -> int:
        """Bytes held waiting for a line end (never more than MAX_LINE)."""
        return len(self._partial)

    def feed(self, data: bytes) -> list[Message]:
        """Consume bytes; return the messages of every line completed by them."""
        if self._discarding:
            end = data.find(b"\n")
            if end < 0:
                return []
            self._reject(OVERLONG, b"")
            self._discarding = False
            data = data[end + 1 :]
        lines = (self._partial + data if self._partial else data).split(b"\n")
        tail = lines.pop()
        if len(tail) > MAX_LINE:
            self._discarding, tail = True, b""
        self._partial = tail
        out: list[Message] = []
        for line in lines:
            msg = self._decode_line(line)
            if msg is not None:
                out.append(msg)
        return out

    def _decode_line(self, line: bytes) -> Message | None:
        if len(line) > MAX_LINE:
            self._reject(OVERLONG, line)
            return None
        if line[-1:] == b"\r":
            line = line[:-1]
        if not line:
            self._reject(EMPTY, line)
            return None
        if not line.isascii():
            self._reject(NON_ASCII, line)
            return None
        body, space, crc = line.rpartition(b" ")
        if not space or len(crc) != 4:
            self._reject(NO_CRC, line)
            return None
        if b"%04X" % _crc(body, CRC_INIT) != crc:
            self._reject(BAD_CRC, line)
            return None
        parts = body.split(b" ")
        parse = self._verbs.get(parts[1]) if len(parts) > 1 else None
        if parse is None:
            reason = WRONG_SIDE if len(parts) > 1 and parts[1] in self._others else UNKNOWN_VERB
            self._reject(reason if len(parts) > 1 else BAD_SYNTAX, line)
            return None
        msg = parse(parts)
        if msg is None:
            self._reject(BAD_SYNTAX, line)
            return None
        self.accepted += 1
        return msg

    def _reject(self, reason: str, line: bytes) -> None:
        self.rejected[reason] += 1
        self.last_rejected = line[:80]


# ---------------------------------------------------------------- encoding


def _check(name: str, value: int, lo: int, hi: int) -> int:
    if not isinstance(value, int) or isinstance(value, bool):
        raise ValueError(f"{name} must be an integer, got {value!r}")
    if not lo <= value <= hi:
        raise ValueError(f"{name} out of range {lo}..{hi}: {value}")
    return value


def _check_token(name: str, value: str, pattern: re.Pattern[bytes]) -> str:
    if not isinstance(value, str) or not value.isascii() or not pattern.fullmatch(value.encode()):
        raise ValueError(f"bad {name}: {value!r}")
    return value


def _channel_list(channels: tuple[Channel, ...], codes: dict[str, str]) -> str:
    if not channels:
        return "-"
    items, last = [], -1
    for ch in channels:
        number = _check("channel", ch.number, 0, CHANNEL_MAX)
        if number <= last:
            raise ValueError(f"channel numbers must increase: {number} after {last}")
        code = codes.get(ch.kind)
        if code is None and ch.kind.startswith(UNKNOWN_KIND_PREFIX):
            code = ch.kind[len(UNKNOWN_KIND_PREFIX) :]
        if code is None or not _KIND.fullmatch(code.encode()):
            raise ValueError(f"no wire code for kind: {ch.kind!r}")
        items.append(f"{number}:{code}")
        last = number
    return ",".join(items)


def _u(name: str, value: int, lo: int = 0, hi: int = U32_MAX) -> str:
    return str(_check(name, value, lo, hi))


def _body_identity(m: Identity) -> str:
    return " ".join((
        _u("seq", m.seq), "iam", _check_token("firmware id", m.firmware, _FIRMWARE),
        _u("version", m.version, 1, VERSION_MAX), _u("boot", m.boot, 0, U16_MAX),
        _channel_list(m.inputs, INPUT_KIND_CODES), _channel_list(m.outputs, OUTPUT_KIND_CODES),
    ))  # fmt: skip


def _body_edge(m: Edge) -> str:
    return " ".join((
        _u("seq", m.seq, 1), "edge", _u("channel", m.channel, 0, CHANNEL_MAX),
        "+" if m.rising else "-", _u("device_us", m.device_us),
    ))  # fmt: skip


def _body_beat(m: Beat) -> str:
    return " ".join((
        _u("seq", m.seq), "beat", _u("device_us", m.device_us), _u("boot", m.boot, 0, U16_MAX),
        _u("rx_rejected", m.rx_rejected),
    ))  # fmt: skip


def _body_ack(m: Ack) -> str:
    return " ".join((
        _u("seq", m.seq), "ack", _u("command id", m.command_id, 1),
        _check_token("result", m.result, _RESULT), _u("device_us", m.device_us),
        _u("value", m.value),
    ))  # fmt: skip


def _body_drive(m: DriveCommand) -> str:
    return " ".join((
        _u("command id", m.command_id, 1), "set", _u("channel", m.channel, 0, CHANNEL_MAX),
        "1" if m.on else "0",
    ))  # fmt: skip


def _body_pulse(m: PulseCommand) -> str:
    return " ".join((
        _u("command id", m.command_id, 1), "pulse", _u("channel", m.channel, 0, CHANNEL_MAX),
        _u("pulse ms", m.ms, 1, U16_MAX),
    ))  # fmt: skip


def _body_query(m: QueryCommand) -> str:
    topic = _check_token("topic", m.topic, _TOPIC)
    return " ".join((_u("command id", m.command_id, 1), "ask", topic))


def _body_replay(m: ReplayCommand) -> str:
    return " ".join((_u("command id", m.command_id, 1), "replay", _u("replay seq", m.from_seq, 1)))


_BODIES: dict[type, Callable[..., str]] = {
    Identity: _body_identity,
    Edge: _body_edge,
    Beat: _body_beat,
    Ack: _body_ack,
    DriveCommand: _body_drive,
    PulseCommand: _body_pulse,
    QueryCommand: _body_query,
    ReplayCommand: _body_replay,
}


def encode(message: Message) -> bytes:
    """One wire line for `message`, LF-terminated; ValueError if a field is out of range."""
    body_of = _BODIES.get(type(message))
    if body_of is None:
        raise TypeError(f"not a wire message: {type(message).__name__}")
    body = body_of(message).encode("ascii")
    return b"%s %04X\n" % (body, _crc(body, CRC_INIT))
