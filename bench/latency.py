"""Press-to-pellet latency through real pseudo-terminals and the real host stack.

An emulated device (the firmware's state machine, hardware_stubs/box_wire.py, in a separate
process) writes a lever-press line and times until it reads the feeder pulse the session
answers with (a continuous-reinforcement protocol: every press earns a pellet). The host
side is the lab exactly as `vigil run` runs it: serial link, live driver, session core and
the SQLite store. Baseline in the same run: the same device against a bare asyncio echo that
answers each press line with a pulse line at once (pty + event loop, no Vigil), so the ratio
is what our stack adds.

    python bench/latency.py [--json] [--boxes 32] [--samples 2000] [--rate 200] [--firmware]
                            [--dead-alarm-receiver]

`--rate` is the press rate over all boxes together (presses per second); `--json` prints one
line {"n", "p50_ms", "p99_ms", "max_ms"} for the full stack. The first 3 presses of each box
are left out (the lab is still starting the other sessions then).

`--dead-alarm-receiver` runs the lab a second time with two alarm channels whose receivers
are dead (a webhook that accepts and never answers, an SMTP relay that refuses) and an alarm
every second on each, to show that a failing channel does not reach the boxes' loop.

`--firmware` adds the same loop through the reference firmware on a simulated board
(bench/firmware_latency.py: lever pin edge -> feeder pin edge, in simulated cycles), printed
beside the pty figures, with the share of it that the serial line alone takes.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import selectors
import sys
import tempfile
import time
import tty
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import serial  # noqa: E402
from machine import where_run  # noqa: E402  (bench/ is this script's folder)

from hardware_stubs.box_wire import U32, DeviceWire  # noqa: E402
from server.link.codec import encode  # noqa: E402
from server.link.handshake import device_channels  # noqa: E402
from server.link.messages import DriveCommand, PulseCommand  # noqa: E402

# A scenario of our own: lever and house light on from the start, each press one pellet.
FR1 = """\
vigil_protocol: 1
name: press-to-pellet latency
about: Every press on the lever earns one pellet.
wiring:
  outputs:
    lever: {kind: lever, channel: 0}
    room_light: {kind: house_light, channel: 4}
    pellet: {kind: feeder, channel: 5, pulse_ms: 20}
  inputs:
    press: {kind: lever_press, channel: 0, presented_by: lever}
    magazine: {kind: head_entry, channel: 2}
at_start: {activate: [room_light, lever]}
trial_types:
  continuous:
    steps:
      - step: work
        schedule: {input: press, kind: FR, value: 1, on_met: reward}
      - step: reward
        pulse: pellet
        wait_s: 0
blocks:
  - block: training
    trial_types: [continuous]
    until: {trials: 1000000}
    next: end_session
"""
LEVER, PRESS, FEEDER = 0, 0, 5
# Presses per box left out at the start: they meet the lab still starting every session.
WARMUP = 3


# ---------------------------------------------------------------- the device process


class BenchBox:
    """One pty with the device state machine; presses, then waits for its pellet."""

    def __init__(self, wiring, pause_s: float, rng: np.random.Generator) -> None:
        inputs, outputs = device_channels(wiring)
        self.master, slave = os.openpty()
        tty.setraw(slave)
        os.set_blocking(self.master, False)
        self.slave, self.path = slave, os.ttyname(slave)
        self.wire = DeviceWire(inputs, outputs, self._drive, 1, self.now_us())
        self.pause_s, self.rng = pause_s, rng
        self.lever_out = False
        self.pressed_at: float | None = None
        self.read_at = 0.0
        self.next_press = 0.0
        self.latencies: list[float] = []

    @staticmethod
    def now_us() -> int:
        return (time.monotonic_ns() // 1000) % U32

    def _drive(self, channel: int, on: bool) -> None:
        if channel == LEVER:
            self.lever_out = on
        elif channel == FEEDER and on and self.pressed_at is not None:
            self.latencies.append(self.read_at - self.pressed_at)
            self.pressed_at = None
            self.wire.add_event(PRESS, False, self.now_us())  # the switch opens
            self.next_press = time.perf_counter() + self.pause_s * self.rng.uniform(0.5, 1.5)

    def flush(self) -> None:
        lines = self.wire.write_all(self.now_us())
        if lines:
            os.write(self.master, b"".join(lines))

    def step(self, now: float) -> None:
        self.wire.tick(self.now_us())
        if self.lever_out and self.pressed_at is None and now >= self.next_press:
            self.wire.add_event(PRESS, True, self.now_us())
            lines = b"".join(self.wire.write_all(self.now_us()))
            self.pressed_at = time.perf_counter()  # the press line leaves now
            os.write(self.master, lines)
        else:
            self.flush()

    def readable(self) -> None:
        data = os.read(self.master, 65536)
        self.read_at = time.perf_counter()
        self.wire.receive(data, self.now_us())
        self.flush()


def device_main(boxes: int, per_box: int, pause_s: float, protocol: str) -> None:
    from server.protocol.load import load_protocol

    wiring = load_protocol(protocol).wiring
    rng = np.random.default_rng(7)
    fleet = [BenchBox(wiring, pause_s, rng) for _ in range(boxes)]
    sel = selectors.DefaultSelector()
    for box in fleet:
        sel.register(box.master, selectors.EVENT_READ, box)
    print(json.dumps([box.path for box in fleet]), flush=True)
    while min(len(box.latencies) for box in fleet) < per_box + WARMUP:
        for key, _ in sel.select(0.001):
            key.data.readable()
        now = time.perf_counter()
        for box in fleet:
            box.step(now)
    samples = [lat for box in fleet for lat in box.latencies[WARMUP : WARMUP + per_box]]
    print(json.dumps(samples), flush=True)
    while sys.stdin.read(1):  # keep the ptys open until the host is done with them
        pass


# ---------------------------------------------------------------- the host side


async def echo_host(paths: list[str], until: asyncio.Future) -> None:
    """Baseline: answer every press line with a pulse line, straight from the read callback."""
    loop = asyncio.get_running_loop()
    ports = [serial.serial_for_url(p, baudrate=115_200, timeout=0) for p in paths]
    next_id = [1000]
    partial: dict[int, bytes] = {}

    def readable(fd: int) -> None:
        # whole lines only: with many boxes a read can end inside a press line, which a search
        # of each read alone would miss (that box then waited for ever for its pellet)
        *lines, partial[fd] = (partial.get(fd, b"") + os.read(fd, 65536)).split(b"\n")
        for line in lines:
            if b" edge 0 + " in line:
                next_id[0] += 1  # a fresh id: the device carries out a repeated one only once
                os.write(fd, encode(PulseCommand(next_id[0], FEEDER, 20)))

    for port in ports:
        fd = port.fileno()
        loop.add_reader(fd, readable, fd)
        os.write(fd, encode(DriveCommand(99, LEVER, True)))  # lever out: the device may press
    await until
    for port in ports:
        loop.remove_reader(port.fileno())
        port.close()


def dead_alarms(folder: Path):
    """Alarm settings whose receivers are dead, and the socket that keeps one of them hung.

    The webhook's port accepts connections (the kernel's backlog) and never answers, so every
    send waits out its whole timeout; nothing listens on the SMTP relay's port. The disk
    threshold is above any disk and repeats are not held back, so the lab says "still disk
    nearly full" every second on both channels for the whole run."""
    import socket

    from server.lab.config_alarms import ALARM_KINDS, AlarmChannel, AlarmSettings, EmailTo, WebhookTo

    hung = socket.socket()
    hung.bind(("127.0.0.1", 0))
    hung.listen(1024)
    closed = socket.socket()
    closed.bind(("127.0.0.1", 0))
    refused_port = closed.getsockname()[1]
    closed.close()
    kinds = frozenset(ALARM_KINDS)
    channels = (
        AlarmChannel(WebhookTo(f"http://127.0.0.1:{hung.getsockname()[1]}/hook"), kinds),
        AlarmChannel(EmailTo("127.0.0.1", refused_port, "none", "bench@lab.example", ("on-call@lab.example",)), kinds),
    )
    return AlarmSettings(channels, repeat_minutes=0.0, disk_free_mb=1e12, queue=50), hung


async def lab_host(paths: list[str], until: asyncio.Future, folder: Path, protocol: str, alarms=None) -> None:
    from server.engine.caps import HardCaps
    from server.lab.config import BoxConfig, LabConfig
    from server.lab.config_alarms import AlarmSettings
    from server.lab.config_web import WebSettings
    from server.lab.supervisor import Lab
    from server.protocol.load import load_protocol
    from server.store.writer import Store

    fr1 = load_protocol(protocol)
    boxes = tuple(BoxConfig(f"bench-{i + 1}", f"LT-{i + 1:03d}", fr1, port=p) for i, p in enumerate(paths))
    store = Store.open(folder / "bench.sqlite")
    config = LabConfig("bench", "latency bench", folder / "bench.sqlite", HardCaps(10**7, 600), boxes,
                       WebSettings(), alarms or AlarmSettings())  # fmt: skip
    lab = Lab(config, store, say=lambda s: None)
    until.add_done_callback(lambda _: lab.stop_all("bench done"))
    try:
        await lab.run()
    finally:
        store.close()


async def phase(kind: str, boxes: int, samples: int, rate: float, folder: Path) -> list[float]:
    protocol = folder / "fr1.yaml"
    protocol.write_text(FR1)
    per_box = -(-samples // boxes)
    device = await asyncio.create_subprocess_exec(
        sys.executable, __file__, "--device", "--boxes", str(boxes), "--per-box", str(per_box),
        "--pause", repr(boxes / rate), "--protocol", str(protocol),
        stdin=asyncio.subprocess.PIPE, stdout=asyncio.subprocess.PIPE,
    )  # fmt: skip
    paths = json.loads(await device.stdout.readline())
    until = asyncio.get_running_loop().create_future()

    async def collect() -> list[float]:
        line = await device.stdout.readline()
        until.set_result(None)
        return json.loads(line)

    collector = asyncio.create_task(collect())
    if kind == "echo":
        await echo_host(paths, until)
    elif kind == "dead-alarms":
        alarms, hung = dead_alarms(folder)
        try:
            await lab_host(paths, until, folder, str(protocol), alarms)
        finally:
            hung.close()
    else:
        await lab_host(paths, until, folder, str(protocol))
    result = await collector
    device.stdin.close()
    await device.wait()
    return result


def summary(samples: list[float]) -> dict[str, float]:
    ms = np.asarray(samples) * 1e3
    return {"n": int(ms.size), "p50_ms": round(float(np.percentile(ms, 50)), 3),
            "p99_ms": round(float(np.percentile(ms, 99)), 3), "max_ms": round(float(ms.max()), 3)}  # fmt: skip


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--json", action="store_true", help="print one JSON line for the full stack")
    p.add_argument("--boxes", type=int, default=1)
    p.add_argument("--samples", type=int, default=2000, help="at least this many, all boxes together")
    p.add_argument("--rate", type=float, default=200.0, help="presses per second, all boxes together")
    p.add_argument(
        "--db-dir",
        default=None,
        metavar="DIR",
        help="folder for the bench database (default: the system's temporary folder)",
    )
    p.add_argument(
        "--firmware", action="store_true", help="also through the reference firmware on a simulated board (simavr)"
    )
    p.add_argument(
        "--firmware-samples", type=int, default=1000, metavar="N", help="presses on the simulated board (default 1000)"
    )
    p.add_argument(
        "--dead-alarm-receiver",
        action="store_true",
        help="also run the lab with alarms going every second to a hung webhook and a refused SMTP relay",
    )
    p.add_argument("--device", action="store_true", help=argparse.SUPPRESS)
    p.add_argument("--per-box", type=int, default=0, help=argparse.SUPPRESS)
    p.add_argument("--pause", type=float, default=0.005, help=argparse.SUPPRESS)
    p.add_argument("--protocol", default="", help=argparse.SUPPRESS)
    args = p.parse_args()
    if args.device:
        device_main(args.boxes, args.per_box, args.pause, args.protocol)
        return 0
    load = os.getloadavg()[0]  # the machine is shared: a busy one stretches the tail
    with tempfile.TemporaryDirectory(prefix="vigil-bench-", dir=args.db_dir) as tmp:
        folder = Path(tmp)
        base = summary(asyncio.run(phase("echo", args.boxes, args.samples, args.rate, folder)))
        stack = summary(asyncio.run(phase("lab", args.boxes, args.samples, args.rate, folder)))
        dead = None
        if args.dead_alarm_receiver:
            dead = summary(asyncio.run(phase("dead-alarms", args.boxes, args.samples, args.rate, folder)))
        board = None
        if args.firmware:
            board = firmware_phase(args.firmware_samples, folder)
            if isinstance(board, str):
                print(f"firmware: skipped: {board}")
                board = None
    if args.json:
        print(json.dumps(stack))
        return 0
    print(f"machine: {where_run()}, pyserial {serial.__version__}; load average before the run {load:.2f}")
    print(f"{args.boxes} box(es), {args.rate:g} presses/s in all; press line written -> pulse line read")
    print(f"{'':28}{'n':>6}{'p50 ms':>9}{'p99 ms':>9}{'max ms':>9}")
    rows = [("baseline (pty + echo)", base), ("vigil (link+session+store)", stack)]
    if dead is not None:
        rows.append(("vigil, alarm receivers dead", dead))
    for name, s in rows:
        print(f"{name:28}{s['n']:>6}{s['p50_ms']:>9.3f}{s['p99_ms']:>9.3f}{s['max_ms']:>9.3f}")
    if dead is not None:
        print(f"ratio dead receivers / no alarms: p50 x{dead['p50_ms'] / stack['p50_ms']:.2f}, "
              f"p99 x{dead['p99_ms'] / stack['p99_ms']:.2f}")  # fmt: skip
    print(
        f"ratio vigil / baseline: p50 x{stack['p50_ms'] / base['p50_ms']:.1f}, "
        f"p99 x{stack['p99_ms'] / base['p99_ms']:.1f}"
    )
    print(f"target p99 <= 2 ms (stretch 0.5 ms): {'met' if stack['p99_ms'] <= 2 else 'NOT met'}")
    if board is not None:
        print_firmware(board, stack)
    return 0


def firmware_phase(samples: int, folder: Path) -> dict | str:
    """The loop through the simulated board, or why it cannot run here (one line)."""
    from firmware_latency import run  # bench/ is this script's folder

    from hardware_stubs.simulated_board import BoardError

    try:
        result = asyncio.run(run(samples, WARMUP, folder, lab_host))
    except BoardError as exc:
        return str(exc)
    result["summary"] = summary(result["samples"]) if result["samples"] else None
    return result if result["summary"] else "no press was answered"


def print_firmware(board: dict, pty: dict) -> None:
    s, wire = board["summary"], board["line_ms"]
    print()
    print("through the reference firmware on a simulated ATmega328P (simavr, 16 MHz, 115,200 baud):")
    print("lever pin edge -> feeder pin edge, in simulated cycles (debounce 2 ms, both lines on")
    print(
        f"the wire, firmware, pty, vigil); simulated clock at most {board['lag_max_us'] / 1e3:.1f} ms "
        f"behind the host's, {board['resyncs']:.0f} restarts of the clock"
    )
    print(f"{'':28}{'n':>6}{'p50 ms':>9}{'p99 ms':>9}{'max ms':>9}")
    print(f"{'vigil over pty (above)':28}{pty['n']:>6}{pty['p50_ms']:>9.3f}{pty['p99_ms']:>9.3f}{pty['max_ms']:>9.3f}")
    print(f"{'firmware + line + vigil':28}{s['n']:>6}{s['p50_ms']:>9.3f}{s['p99_ms']:>9.3f}{s['max_ms']:>9.3f}")
    rest = s["p50_ms"] - wire - 2.0
    print(
        f"of the p50: serial line {wire:.2f} ms ({wire / s['p50_ms']:.0%}; edge line + pulse line, "
        f"10 bits a byte), debounce 2.00 ms ({2.0 / s['p50_ms']:.0%}), the rest {rest:.2f} ms "
        f"(firmware, pty, host stack)"
    )


if __name__ == "__main__":
    sys.exit(main())
