"""Ask a board on a serial port who it is and how fast it answers, for `vigil doctor`.

Blocking and short (a few seconds per port): it opens the port like the lab does
(`serial.serial_for_url`, exclusive for a plain device), asks `ask iam` every 0.5 s for the
boot allowance (PROTOCOL.md section 5), checks the answer against a protocol's wiring, then
times a few `ask beat` round trips. Every outcome is a Finding; nothing is raised.
"""

from __future__ import annotations

import secrets
import statistics
import time
from dataclasses import dataclass

import serial

from server.link.codec import Decoder, encode
from server.link.handshake import identity_problems
from server.link.messages import (
    PROTOCOL_VERSION,
    TOPIC_BEAT,
    TOPIC_IDENTITY,
    Ack,
    Channel,
    Identity,
    QueryCommand,
)
from server.link.serial_link import ASK_IDENTITY_EVERY_S, BAUDRATE, GREET_WITHIN_S
from server.link.serial_port import PORT_ERRORS, reason_of
from server.protocol.wiring import Wiring

PINGS = 5
PING_TIMEOUT_S = 0.5

OK, NOTE, PROBLEM = "ok", "note", "problem"


@dataclass(frozen=True, slots=True)
class Finding:
    """One line of `vigil doctor`: what was checked, how it went, and what to do."""

    target: str  # "box 'rack-1' (/dev/ttyUSB0)" or the port alone
    check: str  # short name: node, stable-name, permission, busy, latency-timer, handshake, ...
    level: str  # ok | note | problem
    message: str
    advice: str = ""


def _channels(channels: tuple[Channel, ...]) -> str:
    return ", ".join(f"{c.number}:{c.kind}" for c in channels) or "none"


def _greet(port, decoder: Decoder, within_s: float) -> tuple[Identity | None, int]:
    """Ask for the identity until it comes; returns it (or None) and the bytes received."""
    next_id = 1 + secrets.randbelow(1 << 30)
    received = 0
    end = time.monotonic() + within_s
    next_ask = 0.0
    while time.monotonic() < end:
        if time.monotonic() >= next_ask:
            port.write(encode(QueryCommand(next_id, TOPIC_IDENTITY)))
            next_id += 1
            next_ask = time.monotonic() + ASK_IDENTITY_EVERY_S
        data = port.read(4096)
        received += len(data)
        for message in decoder.feed(data):
            if isinstance(message, Identity):
                return message, received
    return None, received


def _ping(port, decoder: Decoder, count: int) -> list[float | None]:
    """Round trips of `ask beat` in seconds (None: no answer within 0.5 s)."""
    out: list[float | None] = []
    command_id = 1 + secrets.randbelow(1 << 30)
    for _ in range(count):
        command_id += 1
        sent = time.perf_counter()
        port.write(encode(QueryCommand(command_id, TOPIC_BEAT)))
        answered = None
        while answered is None and time.perf_counter() - sent < PING_TIMEOUT_S:
            for message in decoder.feed(port.read(max(1, port.in_waiting))):
                if isinstance(message, Ack) and message.command_id == command_id:
                    answered = time.perf_counter() - sent
        out.append(answered)
    return out


def probe_board(
    target: str,
    url: str,
    wiring: Wiring | None,
    protocol_name: str = "",
    *,
    greet_s: float = GREET_WITHIN_S,
    pings: int = PINGS,
) -> list[Finding]:
    """Handshake, wiring check and round trips of the board at `url`."""
    exclusive = {"exclusive": True} if "://" not in url else {}
    try:
        port = serial.serial_for_url(url, baudrate=BAUDRATE, timeout=0.02, **exclusive)
    except PORT_ERRORS as exc:
        return [Finding(target, "open", PROBLEM, f"cannot open {url}: {reason_of(exc)}",
                        "check the checks above; is another program using the port?")]  # fmt: skip
    try:
        return _probe_open(target, port, wiring, protocol_name, greet_s, pings)
    except PORT_ERRORS as exc:
        return [Finding(target, "handshake", PROBLEM, f"the port failed: {reason_of(exc)}",
                        "check the cable and the board's power")]  # fmt: skip
    finally:
        port.close()


def _probe_open(target, port, wiring, protocol_name, greet_s, pings) -> list[Finding]:
    decoder = Decoder("device")
    identity, received = _greet(port, decoder, greet_s)
    if identity is None:
        if received == 0:
            return [Finding(target, "handshake", PROBLEM,
                            f"silent: nothing came back within {greet_s:g} s",
                            "is the board powered and flashed with the Vigil firmware "
                            "(hardware_stubs/firmware), and is this its port?")]  # fmt: skip
        reasons = ", ".join(f"{k} {v}" for k, v in sorted(decoder.rejected.items())) or "none whole"
        return [Finding(target, "handshake", PROBLEM,
                        f"garbage: {received} bytes came back in {greet_s:g} s but no Vigil "
                        f"identity (bad lines: {reasons})",
                        f"check that the board runs at {BAUDRATE} baud and speaks the Vigil "
                        "wire protocol (hardware_stubs/PROTOCOL.md)")]  # fmt: skip
    found = [Finding(target, "handshake", OK,
                     f"'{identity.firmware}' answered (boot {identity.boot}), wire protocol "
                     f"version {identity.version}")]  # fmt: skip
    if identity.version != PROTOCOL_VERSION:
        found[0] = Finding(target, "version", PROBLEM,
                           f"'{identity.firmware}' speaks wire protocol version {identity.version}, "
                           f"this vigil speaks version {PROTOCOL_VERSION}",
                           "flash firmware that speaks version "
                           f"{PROTOCOL_VERSION}, or use a vigil that speaks {identity.version}")  # fmt: skip
        return found
    channels = f"inputs {_channels(identity.inputs)}; outputs {_channels(identity.outputs)}"
    if wiring is None:
        found.append(Finding(target, "channels", NOTE, f"channel map: {channels}"))
    else:
        problems = identity_problems(identity, wiring)
        for problem in problems:
            wiring_of = protocol_name or "the protocol"
            found.append(Finding(target, "channels", PROBLEM, problem,
                                 f"rewire the box or change the wiring of {wiring_of}"))  # fmt: skip
        if not problems:
            found.append(Finding(target, "channels", OK,
                                 f"channel map fits the wiring of {protocol_name or 'the protocol'}"))  # fmt: skip
    trips = _ping(port, decoder, pings)
    answered = [t * 1e3 for t in trips if t is not None]
    if len(answered) < len(trips):
        found.append(Finding(target, "ping", PROBLEM,
                             f"{len(trips) - len(answered)} of {len(trips)} pings unanswered",
                             "a flaky cable or a board that stalls; try another cable or port"))  # fmt: skip
    elif answered:
        found.append(Finding(target, "ping", OK,
                             f"{len(answered)} pings: round trip min {min(answered):.1f} ms, "
                             f"median {statistics.median(answered):.1f} ms, max {max(answered):.1f} ms"))  # fmt: skip
    return found
