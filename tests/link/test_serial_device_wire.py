"""The emulated box's device side (hardware_stubs/box_wire.py) against the reference firmware:
the same stdin script, run through the firmware's host build and through a Python harness
that loops the same way, must give byte-identical output (device lines and output drives)."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from hardware_stubs.box_wire import U32, DeviceWire, reached
from server.link.codec import Decoder, encode
from server.link.messages import (
    INPUT_KIND_CODES,
    OUTPUT_KIND_CODES,
    Ack,
    Channel,
    DriveCommand,
    Edge,
    PulseCommand,
    QueryCommand,
    ReplayCommand,
)

FIRMWARE = Path(__file__).resolve().parents[2] / "hardware_stubs" / "firmware"
# The reference box's channel map (hardware_stubs/firmware/channels.c).
_IN = "lp lp he np np lk ps np".split()
_OUT = "lv lv cl cl hl tn fd sy av cl".split()
_KIND_IN = {c: k for k, c in INPUT_KIND_CODES.items()}
_KIND_OUT = {c: k for k, c in OUTPUT_KIND_CODES.items()}
REF_INPUTS = tuple(Channel(n, _KIND_IN[c]) for n, c in enumerate(_IN, 1))
REF_OUTPUTS = tuple(Channel(n, _KIND_OUT[c]) for n, c in enumerate(_OUT, 1))
DEBOUNCE_US = 2000  # vproto.h VP_DEBOUNCE_US


class PythonHarness:
    """host_sim.c in Python: the same directives, the same 100 us loop pass."""

    def __init__(self) -> None:
        self.now = 0
        self.out = bytearray()
        self.levels = [0] * len(REF_INPUTS)
        self.stable = [0] * len(REF_INPUTS)
        self.pending: dict[int, tuple[int, int]] = {}  # index -> (first change, last change)
        self.box = self._boot(1)
        self.loop_pass()

    def _boot(self, boot: int) -> DeviceWire:
        return DeviceWire(REF_INPUTS, REF_OUTPUTS, self._drive, boot, self.now,
                          firmware="vigil-ref-1.0")  # fmt: skip

    def _drive(self, channel: int, on: bool) -> None:
        self.out += b"@out %d %d %d\n" % (channel, int(on), self.now)

    def loop_pass(self) -> None:
        # The firmware's debounce, enough for clean level changes (vp_poll_inputs).
        for i, (first, last) in sorted(self.pending.items()):
            if reached(self.now, (last + DEBOUNCE_US) % U32):
                del self.pending[i]
                if self.levels[i] != self.stable[i]:
                    self.stable[i] = self.levels[i]
                    self.box.add_event(i + 1, bool(self.levels[i]), first)
        self.box.tick(self.now)
        for line in self.box.write_all(self.now):
            self.out += line

    def run(self, stdin: bytes) -> bytes:
        for line in stdin.splitlines(keepends=True):
            if line.startswith(b"@time "):
                self.now = int(line.split()[1]) % U32
                self.loop_pass()
            elif line.startswith(b"@wait "):
                span = int(line.split()[1])
                while span:
                    step = min(span, 100)
                    self.now = (self.now + step) % U32
                    span -= step
                    self.loop_pass()
            elif line.startswith(b"@in "):
                ch, level = (int(x) for x in line.split()[1:])
                self.levels[ch - 1] = level
                first = self.pending.get(ch - 1, (self.now, self.now))[0]
                self.pending[ch - 1] = (first, self.now)
                self.loop_pass()
            elif line.startswith(b"@boot "):
                self.box = self._boot(int(line.split()[1]))
                self.loop_pass()
            else:
                for byte in line:  # byte by byte, as the firmware receives
                    self.box.receive(bytes([byte]), self.now)
                self.loop_pass()
        return bytes(self.out)


@pytest.fixture(scope="module")
def firmware_host(tmp_path_factory) -> Path:
    if shutil.which("make") is None or shutil.which("cc") is None:
        pytest.skip("make or a C compiler (cc) not installed")
    build = tmp_path_factory.mktemp("firmware-host")
    done = subprocess.run(["make", "-C", str(FIRMWARE), f"BUILD={build}", "host"],
                          capture_output=True, text=True, timeout=120)  # fmt: skip
    assert done.returncode == 0, done.stdout + done.stderr
    return build / "host_sim"


def both(program: Path, script: list) -> tuple[bytes, bytes]:
    stdin = b"".join(item if isinstance(item, bytes) else encode(item) for item in script)
    done = subprocess.run([str(program)], input=stdin, capture_output=True, timeout=60)
    assert done.returncode == 0, done.stderr
    return done.stdout, PythonHarness().run(stdin)


def wait(us: int) -> bytes:
    return b"@wait %d\n" % us


def test_boot_commands_queries_and_bad_values_match_the_firmware(firmware_host):
    script = [
        wait(1_000_000), DriveCommand(101, 5, True), PulseCommand(102, 7, 40), wait(50_000),
        DriveCommand(103, 5, False), QueryCommand(104, "beat"), QueryCommand(105, "iam"),
        DriveCommand(106, 11, True), QueryCommand(107, "status"),
        encode(DriveCommand(108, 3, True))[:-1] + b"\r\n", wait(1_200_000),
    ]  # fmt: skip
    firmware, python = both(firmware_host, script)
    assert python == firmware
    acks = [m for m in Decoder("device").feed(python) if isinstance(m, Ack)]
    assert [a.result for a in acks] == ["ok"] * 5 + ["no-channel", "bad-value", "ok"]


def test_resent_pulse_and_reused_id_match_the_firmware(firmware_host):
    pulse = PulseCommand(500, 7, 40)
    script = [pulse, wait(1_000), pulse, pulse, wait(50_000), DriveCommand(500, 7, True)]
    firmware, python = both(firmware_host, script)
    assert python == firmware
    assert python.count(b"@out 7 1 ") == 2  # the resends did not deliver a second pellet


def test_edges_replay_and_ring_loss_match_the_firmware(firmware_host):
    script: list = [b"@time 1000\n"]
    for k in range(200):
        script += [b"@in 2 %d\n" % ((k + 1) % 2), wait(3_000)]
    script += [ReplayCommand(900, 150), wait(1_000), ReplayCommand(901, 1), wait(1_000),
               ReplayCommand(902, 202), wait(1_000)]  # fmt: skip
    firmware, python = both(firmware_host, script)
    assert python == firmware
    edges = [m for m in Decoder("device").feed(python) if isinstance(m, Edge)]
    assert len(edges) == 200 + 51 + 128  # first writing, replay from 150, replay of the ring


def test_host_silence_and_clock_wrap_match_the_firmware(firmware_host):
    script = [b"@time %d\n" % (U32 - 2_500_000), DriveCommand(20, 5, True),
              b"@in 4 1\n", wait(3_000), b"@in 4 0\n", wait(5_200_000)]  # fmt: skip
    firmware, python = both(firmware_host, script)
    assert python == firmware
    assert b"@out 10 0 " in python.split(b"@out 5 1 ")[1]  # all off after the silence


def test_garbage_from_the_host_is_counted_like_the_firmware_counts_it(firmware_host):
    rng = np.random.default_rng(11)
    good = encode(DriveCommand(7, 1, True))[:-1]
    lines = []
    for i in range(400):
        if i % 2:
            line = bytearray(good)
            pos = int(rng.integers(len(line)))
            line[pos] = (line[pos] + int(rng.integers(1, 94)) - 0x20) % 95 + 0x20
            lines.append(bytes(line))
        else:
            raw = rng.integers(0, 256, int(rng.integers(0, 70)), dtype=np.uint8).tobytes()
            lines.append(raw.replace(b"\n", b"\x0b"))
    lines = [b"#" + ln[1:] if ln.startswith(b"@") else ln for ln in lines]
    firmware, python = both(firmware_host, [ln + b"\n" for ln in lines] + [wait(1_000_000)])
    assert python == firmware


def test_a_mapped_box_uses_the_channel_numbers_it_is_given():
    driven: list[tuple[int, bool]] = []
    box = DeviceWire((Channel(0, "lever_press"),), (Channel(0, "lever"), Channel(5, "feeder")),
                     lambda ch, on: driven.append((ch, on)), boot=9, now_us=0)  # fmt: skip
    box.write_all(0)
    box.receive(encode(PulseCommand(3, 5, 20)) + encode(DriveCommand(4, 1, True)), 10)
    lines = Decoder("device").feed(b"".join(box.write_all(20)))
    assert driven == [(0, False), (5, False), (5, True)]
    assert [(a.command_id, a.result) for a in lines] == [(3, "ok"), (4, "no-channel")]
    box.tick(20_010)
    assert driven[-1] == (5, False)  # the pulse ended on the device after 20 ms
