"""Reference firmware: the AVR image builds and fits; its protocol core, built for the host,
speaks the same language as the Python codec, in both directions."""

from __future__ import annotations

import re
import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from server.link.codec import Decoder, encode
from server.link.messages import (
    INPUT_KIND_CODES,
    OUTPUT_KIND_CODES,
    PROTOCOL_VERSION,
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
from server.link.sequence import SequenceTracker, Verdict
from server.link.unwrap import WRAP, DeviceClockUnwrapper

FIRMWARE = Path(__file__).resolve().parents[2] / "hardware_stubs" / "firmware"
FLASH_BYTES = 32 * 1024  # ATmega328P datasheet: 32 KiB flash, 2 KiB SRAM
RAM_BYTES = 2 * 1024


def header_define(name: str, header: str = "vproto.h") -> str:
    match = re.search(rf"#define {name} (\S+)", (FIRMWARE / header).read_text())
    assert match, name
    return match.group(1).strip('"').rstrip("u")


def channel_table(name: str, source: str = "channels.c") -> list[str]:
    """Kind codes of one table in a box's channel file, in channel order."""
    block = re.search(
        rf"{name}\[BOX_\w+\]\[3\] VP_FLASH = \{{(.*?)\}};",
        (FIRMWARE / source).read_text(),
        re.S,
    )
    assert block, name
    return re.findall(r'"([a-z]{2})"', block.group(1))


def make(target: str, build: Path, box: str = "ref") -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        ["make", "-C", str(FIRMWARE), f"BUILD={build}", f"BOX={box}", target],
        capture_output=True,
        text=True,
        timeout=120,
    )


# ---------------------------------------------------------------- (a) the AVR image


@pytest.mark.skipif(
    shutil.which("avr-gcc") is None,
    reason="avr-gcc not installed (Debian: gcc-avr avr-libc binutils-avr)",
)
@pytest.mark.skipif(shutil.which("make") is None, reason="make not installed")
def test_avr_image_builds_with_warnings_as_errors_and_fits(tmp_path):
    done = make("all", tmp_path)
    assert done.returncode == 0, done.stdout + done.stderr
    # The issue's own command line builds it too, with no Makefile and no extra flags.
    sources = sorted(str(p) for p in FIRMWARE.glob("*.c") if p.name != "host_sim.c")
    plain = subprocess.run(
        [
            "avr-gcc",
            "-mmcu=atmega328p",
            "-Os",
            "-Wall",
            "-Werror",
            "-o",
            str(tmp_path / "plain.elf"),
            *sources,
        ],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert plain.returncode == 0, plain.stderr
    program = int(re.search(r"Program:\s+(\d+) bytes", done.stdout).group(1))
    data = int(re.search(r"Data:\s+(\d+) bytes", done.stdout).group(1))
    print(f"avr-size: program {program} B of {FLASH_BYTES}, data {data} B of {RAM_BYTES}")
    assert program <= FLASH_BYTES // 2  # room for a bootloader and growth
    assert data <= RAM_BYTES * 3 // 4  # at least 512 B left for the stack
    assert (tmp_path / "vigil-box.hex").read_text().startswith(":")


# ---------------------------------------------------------------- (b) the host build


@pytest.fixture(scope="module")
def box_program(tmp_path_factory) -> Path:
    if shutil.which("make") is None or shutil.which("cc") is None:
        pytest.skip("make or a C compiler (cc) not installed")
    build = tmp_path_factory.mktemp("firmware-host")
    done = make("host", build)
    assert done.returncode == 0, done.stdout + done.stderr
    return build / "host_sim"


@dataclass
class BoxRun:
    messages: list
    outputs: list[tuple[int, int, int]]  # (channel, on, device us) as the box drove them
    decoder: Decoder

    def acks(self) -> dict[int, list[Ack]]:
        out: dict[int, list[Ack]] = {}
        for m in self.messages:
            if isinstance(m, Ack):
                out.setdefault(m.command_id, []).append(m)
        return out

    def of(self, kind: type) -> list:
        return [m for m in self.messages if isinstance(m, kind)]


def run_box(program: Path, script: list[bytes | object]) -> BoxRun:
    """Feed the harness directives and Python-encoded lines; decode what the box writes."""
    stdin = b"".join(item if isinstance(item, bytes) else encode(item) for item in script)
    done = subprocess.run([str(program)], input=stdin, capture_output=True, timeout=60)
    assert done.returncode == 0, done.stderr
    outputs, device_lines = [], []
    for line in done.stdout.splitlines(keepends=True):
        if line.startswith(b"@out "):
            ch, on, us = (int(x) for x in line.split()[1:])
            outputs.append((ch, on, us))
        else:
            device_lines.append(line)
    decoder = Decoder("device")
    messages = decoder.feed(b"".join(device_lines))
    assert decoder.buffered == 0
    return BoxRun(messages, outputs, decoder)


def wait(us: int) -> bytes:
    return b"@wait %d\n" % us


def test_boot_identity_decodes_and_matches_the_channel_table(box_program):
    run = run_box(box_program, [wait(1_000_000)])
    assert run.decoder.rejected_total == 0
    ident, beat = run.messages
    assert isinstance(ident, Identity) and isinstance(beat, Beat)
    assert header_define("VP_FIRMWARE_ID") == "BOX_FIRMWARE_ID"  # the box's own (boxes.h)
    assert ident.firmware == header_define("REF_FIRMWARE_ID", "boxes.h")
    assert ident.version == PROTOCOL_VERSION == int(header_define("VP_PROTOCOL_VERSION"))
    kind_of_input = {c: k for k, c in INPUT_KIND_CODES.items()}
    kind_of_output = {c: k for k, c in OUTPUT_KIND_CODES.items()}
    assert ident.inputs == tuple(Channel(n, kind_of_input[c]) for n, c in enumerate(channel_table("input_codes"), 1))
    assert ident.outputs == tuple(Channel(n, kind_of_output[c]) for n, c in enumerate(channel_table("output_codes"), 1))
    assert (beat.seq, beat.device_us, beat.boot, beat.rx_rejected) == (0, 1_000_000, ident.boot, 0)
    # Every output is driven to its safe (off) state at boot.
    assert run.outputs == [(ch.number, 0, 0) for ch in ident.outputs]


def test_the_five_port_build_names_itself_and_its_own_channels(tmp_path):
    """make host BOX=ports: the same core with the five-port box's table (channels_ports.c)."""
    if shutil.which("make") is None or shutil.which("cc") is None:
        pytest.skip("make or a C compiler (cc) not installed")
    done = make("host", tmp_path, box="ports")
    assert done.returncode == 0, done.stdout + done.stderr
    run = run_box(tmp_path / "host_sim-ports", [wait(10_000), b"@in 7 1\n", wait(3_000)])
    ident, edge = run.messages
    assert ident.firmware == header_define("PORTS_FIRMWARE_ID", "boxes.h") == "vigil-ports-1.0"
    kind_of_input = {c: k for k, c in INPUT_KIND_CODES.items()}
    kind_of_output = {c: k for k, c in OUTPUT_KIND_CODES.items()}
    codes_in = channel_table("input_codes", "channels_ports.c")
    codes_out = channel_table("output_codes", "channels_ports.c")
    assert codes_in == ["np"] * 5 + ["he", "ps"] and len(codes_out) == 10
    assert ident.inputs == tuple(Channel(n, kind_of_input[c]) for n, c in enumerate(codes_in, 1))
    assert ident.outputs == tuple(Channel(n, kind_of_output[c]) for n, c in enumerate(codes_out, 1))
    assert edge == Edge(1, 7, True, 10_000)  # the pellet sensor, its last input
    assert run.outputs == [(ch, 0, 0) for ch in range(1, 11)]  # every output off at boot
    refused = subprocess.run([str(tmp_path / "host_sim-ports")], input=b"@in 8 1\n", capture_output=True)
    assert refused.returncode == 2  # it has no input 8


@pytest.mark.skipif(
    shutil.which("avr-gcc") is None, reason="avr-gcc not installed (Debian: gcc-avr avr-libc binutils-avr)"
)
@pytest.mark.parametrize(
    ("line", "wrong", "message"),
    [
        (
            "X(10, C, 3) /* tone gate */",
            "X(10, C, 2) /* tone gate */",
            "one output pin per output channel, none shared",
        ),
        ("X(7, C, 4)  /* pellet sensor */", "X(7, C, 5)  /* pellet sensor */", "inputs 1-6 on PD2-PD7, then PC4 up"),
        ("X(3, D, 4)  /* east", "X(3, D, 5)  /* east", "inputs 1-6 on PD2-PD7, then PC4 up"),
    ],
)
def test_a_box_wired_in_a_way_the_board_layer_cannot_read_does_not_build(tmp_path, line, wrong, message):
    """boxes.h is checked at compile time: a shared output pin or an input out of its place."""
    for source in FIRMWARE.glob("*.[ch]"):
        shutil.copy(source, tmp_path)
    boxes = (tmp_path / "boxes.h").read_text()
    ports = boxes.index("PORTS_INPUT_PINS(X)")  # change the five-port box's lists only
    assert line in boxes[ports:]
    (tmp_path / "boxes.h").write_text(boxes[:ports] + boxes[ports:].replace(line, wrong, 1))
    done = subprocess.run(["avr-gcc", "-mmcu=atmega328p", "-Os", "-DBOX_PORTS", "-c", "main_avr.c", "-o", "x.o"],
                          cwd=tmp_path, capture_output=True, text=True, timeout=60)  # fmt: skip
    assert done.returncode != 0 and f'static assertion failed: "{message}' in done.stderr, done.stderr


@pytest.mark.skipif(shutil.which("make") is None, reason="make not installed")
def test_an_unknown_box_is_one_line_from_make(tmp_path):
    done = make("all", tmp_path, box="sixport")
    assert done.returncode != 0
    assert "BOX is ref (the reference box) or ports (the five-port box), not 'sixport'" in done.stderr


def test_python_commands_are_carried_out_and_acknowledged(box_program):
    script = [
        wait(10_000),
        DriveCommand(101, 5, True),
        PulseCommand(102, 7, 40),
        wait(50_000),
        DriveCommand(103, 5, False),
        QueryCommand(104, "beat"),
        QueryCommand(105, "iam"),
        DriveCommand(106, 11, True),  # the reference box has 10 outputs
        QueryCommand(107, "status"),  # no such topic
        encode(DriveCommand(108, 3, True))[:-1] + b"\r\n",  # a host that ends lines CR LF
    ]
    run = run_box(box_program, script)
    assert run.decoder.rejected_total == 0
    acks = run.acks()
    results = {cid: [a.result for a in got] for cid, got in acks.items()}
    assert results == {
        101: ["ok"], 102: ["ok"], 103: ["ok"], 104: ["ok"], 105: ["ok"],
        106: ["no-channel"], 107: ["bad-value"], 108: ["ok"],
    }  # fmt: skip
    driven = run.outputs[10:]  # after the ten boot-time offs
    assert [(ch, on) for ch, on, _ in driven] == [(5, 1), (7, 1), (7, 0), (5, 0), (3, 1)]
    pulse_on, pulse_off = driven[1][2], driven[2][2]
    assert 40_000 <= pulse_off - pulse_on <= 40_100  # timed on the device, loop pass 100 us
    # The ack follows the change, stamped with the device clock.
    assert acks[101][0].device_us == driven[0][2]
    # A query's line comes just before its ack.
    order = [type(m).__name__ + (f":{m.command_id}" if isinstance(m, Ack) else "") for m in run.messages]
    assert order[order.index("Ack:104") - 1] == "Beat"
    assert order[order.index("Ack:105") - 1] == "Identity"
    assert run.of(Beat)[-1].rx_rejected == 0


def test_a_resent_pulse_is_delivered_once(box_program):
    pulse = PulseCommand(500, 7, 40)
    reused_id = DriveCommand(500, 7, True)  # same id, other content: a different command
    run = run_box(box_program, [pulse, wait(1_000), pulse, pulse, wait(50_000), reused_id])
    assert [(ch, on) for ch, on, _ in run.outputs[10:]] == [(7, 1), (7, 0), (7, 1)]
    assert [a.result for a in run.acks()[500]] == ["ok"] * 4


def test_edges_are_debounced_and_stamped_at_their_first_change(box_program):
    script = [
        b"@time 1000\n", b"@in 1 1\n", wait(300), b"@in 1 0\n", wait(200), b"@in 1 1\n",  # bounce
        wait(5_000), b"@in 1 0\n", wait(5_000),
        b"@in 3 1\n", wait(1_500), b"@in 3 0\n", wait(5_000),  # a 1.5 ms flicker: no edge
        b"@in 8 1\n", wait(2_500),
    ]  # fmt: skip
    run = run_box(box_program, script)
    edges = run.of(Edge)
    assert edges == [Edge(1, 1, True, 1000), Edge(2, 1, False, 6500), Edge(3, 8, True, 18_000)]
    tracker = SequenceTracker()
    assert [tracker.on_event(e.seq) for e in edges] == [Verdict.ACCEPT] * 3


def test_replay_resends_identical_events_and_reports_what_the_ring_lost(box_program):
    ring = int(header_define("VP_RING"))
    toggles = []
    for k in range(200):
        toggles += [b"@in 2 %d\n" % ((k + 1) % 2), wait(3_000)]
    run = run_box(
        box_program,
        [
            *toggles,
            ReplayCommand(900, 150),
            wait(1_000),
            ReplayCommand(901, 1),
            wait(1_000),
            ReplayCommand(902, 202),
        ],
    )
    assert run.decoder.rejected_total == 0
    edges = run.of(Edge)
    first = edges[:200]
    assert [e.seq for e in first] == list(range(1, 201))
    by_seq = {e.seq: e for e in first}
    acks = run.acks()
    assert (acks[900][0].result, acks[900][0].value) == ("ok", 150)
    assert (acks[901][0].result, acks[901][0].value) == ("lost", 200 - ring + 1)
    assert (acks[902][0].result, acks[902][0].value) == ("bad-value", 201)
    replayed = edges[200:]
    assert replayed[:51] == [by_seq[s] for s in range(150, 201)]  # byte-for-byte the same events
    assert replayed[51:] == [by_seq[s] for s in range(200 - ring + 1, 201)]
    # The host side keeps each event once, in order.
    tracker = SequenceTracker()
    kept = [e.seq for e in edges if tracker.on_event(e.seq) is Verdict.ACCEPT]
    assert kept == list(range(1, 201)) and tracker.duplicates == len(replayed)


def test_device_clock_wrap_is_handled_on_both_sides(box_program):
    start = WRAP - 1_300
    script = [b"@time %d\n" % start, b"@in 4 1\n", wait(3_000), b"@in 4 0\n", wait(1_010_000)]
    run = run_box(box_program, script)
    on, off = run.of(Edge)
    assert (on.device_us, off.device_us) == (start, (start + 3_000) % WRAP)  # debounced across 0
    unwrap = DeviceClockUnwrapper()
    times = [unwrap.unwrap(m.device_us) for m in run.messages if isinstance(m, (Edge, Beat))]
    assert times == sorted(times) and times[1] - times[0] == 3_000


def bad_host_lines(rng: np.random.Generator, n: int) -> list[bytes]:
    good = [
        encode(c)[:-1]
        for c in (
            DriveCommand(7, 1, True),
            PulseCommand(8, 7, 40),
            QueryCommand(9, "iam"),
            ReplayCommand(10, 1),
        )
    ]
    echo = encode(Ack(0, 7, "ok", 5, 0))[:-1]  # the device's own line fed back
    out = []
    for i in range(n):
        kind = i % 5
        if kind == 0:
            line = rng.integers(0, 256, int(rng.integers(0, 60)), dtype=np.uint8).tobytes().replace(b"\n", b"\x0b")
        elif kind == 1:  # one byte changed
            line = bytearray(good[i % 4])
            pos = int(rng.integers(len(line)))
            line[pos] = (line[pos] + int(rng.integers(1, 94)) - 0x20) % 95 + 0x20
            line = bytes(line)
        elif kind == 2:
            line = good[i % 4][: int(rng.integers(1, len(good[i % 4])))]
        elif kind == 3:
            line = good[i % 4] + b" " * int(rng.integers(1, 3)) + b"x" * int(rng.integers(0, 80))
        else:
            line = echo
        out.append(b"#" + line[1:] if line.startswith(b"@") else line)
    return out


def test_bad_lines_are_dropped_by_the_box_and_counted(box_program):
    lines = bad_host_lines(np.random.default_rng(5), 3_000)
    run = run_box(box_program, [ln + b"\n" for ln in lines] + [wait(1_000_000)])
    assert run.acks() == {} and run.outputs[10:] == []
    assert run.of(Beat)[-1].rx_rejected == len(lines)
    # The Python codec agrees that none of them is a valid host command.
    host_view = Decoder("host")
    assert host_view.feed(b"\n".join(lines) + b"\n") == [] and host_view.rejected_total == len(lines)


def test_a_silent_host_gets_outputs_turned_off(box_program):
    run = run_box(box_program, [DriveCommand(20, 5, True), wait(4_900_000), wait(200_000)])
    (on_ch, on, t_on), *safe = run.outputs[10:]
    assert (on_ch, on) == (5, 1)
    assert [(ch, state) for ch, state, _ in safe] == [(ch, 0) for ch in range(1, 11)]  # all off
    assert {t for _, _, t in safe} == {safe[0][2]}
    assert 5_000_000 <= safe[0][2] - t_on <= 5_000_100  # VP_HOST_SILENCE_US
