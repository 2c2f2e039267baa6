"""An emulated operant box on a pseudo-terminal, speaking the wire protocol in real time.

    python -m hardware_stubs.box --link /tmp/boxes/rack-1.tty --protocol protocols/bandit.yaml \
        --agent q_learner --seed 7 --trait alpha=0.3 --unplug-every 20 --unplug-for 3

The pty's slave side is linked at --link, so a host opens that path like a serial device.
Behind it: the firmware's state machine (box_wire.DeviceWire) with a channel map taken from
the protocol's wiring, and an EmulatedBox with a virtual animal, paced by the monotonic
clock. Faults a lab sees overnight can be injected: an unplugged cable (the pty closes and
comes back at the same path; events keep filling the ring meanwhile), dropped lines (both
ways), garbage bytes on the line, and delayed device lines. The process ends when its parent
does.
"""

from __future__ import annotations

import argparse
import ctypes
import os
import selectors
import signal
import sys
import time
import tty
from collections import deque
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import yaml

from hardware_stubs.box_wire import U32, DeviceWire
from server.engine.records import PulseOutput, SetOutput
from server.link.handshake import device_channels

POLL_S = 0.02  # the longest the loop sleeps: beats, pulse ends and faults need no finer
PR_SET_PDEATHSIG = 1  # linux/prctl.h


@dataclass(frozen=True, slots=True)
class FaultPlan:
    unplug_every_s: float = 0.0  # 0: never
    unplug_for_s: float = 0.0
    drop_rate: float = 0.0  # fraction of lines lost, each direction
    garbage_rate: float = 0.0  # fraction of device lines preceded by a burst of random bytes
    delay_ms: float = 0.0  # every device line written this much later

    def __post_init__(self) -> None:
        for name in ("unplug_every_s", "unplug_for_s", "delay_ms"):
            if getattr(self, name) < 0:
                raise ValueError(f"{name.replace('_', '-')} must not be negative")
        for name in ("drop_rate", "garbage_rate"):
            if not 0 <= getattr(self, name) < 1:
                raise ValueError(f"{name.replace('_', '-')} must be at least 0 and below 1")
        if self.unplug_every_s and not 0 < self.unplug_for_s < self.unplug_every_s:
            raise ValueError("unplug-for must be above 0 and below unplug-every")


def die_with_parent() -> int:
    """Ask Linux to send SIGTERM when the parent exits; returns the parent's pid to watch."""
    parent = os.getppid()
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(PR_SET_PDEATHSIG, signal.SIGTERM, 0, 0, 0)
    except (OSError, AttributeError):
        pass  # not Linux: the getppid() check in the loop still catches it
    return parent


class PtyCable:
    """The pty standing for a USB cable: `plug` makes a new one and links it at `path`."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.master: int | None = None
        self._slave: int | None = None

    @property
    def plugged(self) -> bool:
        return self.master is not None

    def plug(self) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)  # no echo, no line editing: bytes pass as they are
        os.set_blocking(master, False)
        temp = self.path.with_name(self.path.name + ".new")
        temp.unlink(missing_ok=True)
        temp.symlink_to(os.ttyname(slave))
        os.replace(temp, self.path)
        # Holding the slave open keeps the master readable while no host has it open.
        self.master, self._slave = master, slave

    def unplug(self) -> None:
        self.path.unlink(missing_ok=True)
        for fd in (self.master, self._slave):
            if fd is not None:
                os.close(fd)
        self.master = self._slave = None

    def write(self, data: bytes) -> None:
        if self.master is None:
            return  # a cable that is out: the bytes go nowhere, as from a real UART
        try:
            os.write(self.master, data)
        except (BlockingIOError, OSError):
            pass  # nobody reading and the buffer is full: bytes are lost


class PtyBox:
    """One emulated box: virtual animal + EmulatedBox + DeviceWire + PtyCable + faults."""

    def __init__(self, args: argparse.Namespace) -> None:
        from hardware_stubs.agents import make_agent
        from hardware_stubs.emulated_box import EmulatedBox
        from server.protocol.load import load_protocol

        protocol = load_protocol(args.protocol)
        self.wiring = protocol.wiring
        self.t0 = time.monotonic()
        self.offset_us = args.clock_offset_us if args.clock_offset_us is not None else -int(self.t0 * 1e6)
        self.faults = FaultPlan(args.unplug_every, args.unplug_for, args.drop_rate,
                                args.garbage_rate, args.delay_ms)  # fmt: skip
        self.fault_rng = np.random.default_rng([args.seed, 1])
        agent = make_agent(args.agent, **dict(args.trait))
        self.box = EmulatedBox(self.wiring, agent, np.random.default_rng(args.seed))
        self.channel_of = {line.name: line.channel for line in self.wiring.inputs.values()}
        self.output_at = {line.channel: line for line in self.wiring.outputs.values()}
        inputs, outputs = device_channels(self.wiring)
        boot = args.boot if args.boot is not None else int(self.fault_rng.integers(0, 65536))
        self._box_t = 0.0
        self.device = DeviceWire(inputs, outputs, self._drive, boot, self.device_us(self.t0))
        self.cable = PtyCable(Path(args.link))
        self._delayed: deque[tuple[float, bytes]] = deque()
        self._rx = b""

    def device_us(self, monotonic_s: float) -> int:
        return (round(monotonic_s * 1e6) + self.offset_us) % U32

    def _drive(self, channel: int, on: bool) -> None:
        """The device drove an output: tell the emulated box (a pulse starts with an on)."""
        line = self.output_at.get(channel)
        if line is None:
            return
        if line.pulsed:
            if on:
                self.box.apply(PulseOutput(line.name, channel, max(1, line.pulse_ms)), self._box_t)
        else:
            self.box.apply(SetOutput(line.name, channel, on), self._box_t)

    # ------------------------------------------------------------ lines with faults

    def _emit(self, line: bytes, now: float) -> None:
        rng, faults = self.fault_rng, self.faults
        if faults.drop_rate and rng.random() < faults.drop_rate:
            return
        if faults.garbage_rate and rng.random() < faults.garbage_rate:
            line = rng.integers(0, 256, int(rng.integers(1, 24)), dtype=np.uint8).tobytes() + line
        if faults.delay_ms:
            self._delayed.append((now + faults.delay_ms / 1000.0, line))
        else:
            self.cable.write(line)

    def _receive(self, data: bytes, now: float) -> None:
        if self.faults.drop_rate:  # drop whole host lines
            *lines, self._rx = (self._rx + data).split(b"\n")
            kept = [ln + b"\n" for ln in lines if self.fault_rng.random() >= self.faults.drop_rate]
            data = b"".join(kept)
        if data:
            self._box_t = now - self.t0
            self.device.receive(data, self.device_us(now))

    # ------------------------------------------------------------ the loop

    def run(self, parent: int) -> None:
        faults = self.faults
        sel = selectors.DefaultSelector()
        self.cable.plug()
        next_unplug = self.t0 + faults.unplug_every_s if faults.unplug_every_s else float("inf")
        replug_at = float("inf")
        while True:
            now = time.monotonic()
            if os.getppid() != parent:
                return
            if now >= next_unplug:
                self.cable.unplug()
                next_unplug, replug_at = float("inf"), now + faults.unplug_for_s
                self._rx = b""
            elif now >= replug_at:
                self.cable.plug()
                replug_at, next_unplug = float("inf"), now + faults.unplug_every_s
            self._box_t = now - self.t0
            for t, event in self.box.pop_due(self._box_t):
                self.device.add_event(self.channel_of[event.name], event.rising,
                                      self.device_us(self.t0 + t))  # fmt: skip
            dev_now = self.device_us(now)
            self.device.tick(dev_now)
            for line in self.device.write_all(dev_now):
                self._emit(line, now)
            while self._delayed and self._delayed[0][0] <= now:
                self.cable.write(self._delayed.popleft()[1])
            wake = min(now + POLL_S, self.t0 + self.box.next_time(), next_unplug, replug_at,
                       self._delayed[0][0] if self._delayed else float("inf"))  # fmt: skip
            master = self.cable.master
            if master is None:
                time.sleep(max(0.0, wake - time.monotonic()))
                continue
            sel.register(master, selectors.EVENT_READ)
            try:
                ready = sel.select(max(0.0, wake - time.monotonic()))
            finally:
                sel.unregister(master)
            if ready:
                try:
                    data = os.read(master, 4096)
                except (BlockingIOError, OSError):
                    continue
                self._receive(data, time.monotonic())


def _trait(text: str) -> tuple[str, object]:
    key, eq, value = text.partition("=")
    if not eq or not key:
        raise argparse.ArgumentTypeError(f"expected NAME=VALUE, found '{text}'")
    return key, yaml.safe_load(value)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m hardware_stubs.box",
                                description="An emulated operant box on a pseudo-terminal.")  # fmt: skip
    p.add_argument("--link", required=True, metavar="PATH", help="where to link the pty")
    p.add_argument("--protocol", required=True, metavar="FILE", help="protocol whose wiring to carry")
    p.add_argument("--agent", default="random", metavar="NAME", help="virtual animal")
    p.add_argument("--seed", type=int, default=0, metavar="S")
    p.add_argument("--trait", "--option", dest="trait", type=_trait, action="append", default=[], metavar="K=V",
                   help="a trait of the virtual animal (repeatable; --option is its old name)")  # fmt: skip
    p.add_argument("--unplug-every", type=float, default=0.0, metavar="S")
    p.add_argument("--unplug-for", type=float, default=0.0, metavar="S")
    p.add_argument("--drop-rate", type=float, default=0.0, metavar="R")
    p.add_argument("--garbage-rate", type=float, default=0.0, metavar="R")
    p.add_argument("--delay-ms", type=float, default=0.0, metavar="D")
    p.add_argument("--boot", type=int, default=None, metavar="N", help="boot id (default: random)")
    p.add_argument("--clock-offset-us", type=int, default=None, metavar="X",
                   help="device clock = monotonic us + X (default: starts near 0)")  # fmt: skip
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    parent = die_with_parent()
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(0))
    try:
        box = PtyBox(args)
    except Exception as exc:  # bad protocol, agent or fault options: one line, no traceback
        sys.stderr.write(f"emulated box: {exc}\n")
        return 2
    try:
        box.run(parent)
    except KeyboardInterrupt:
        pass
    finally:
        box.cable.unplug()
    return 0


if __name__ == "__main__":
    sys.exit(main())
