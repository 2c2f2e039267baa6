"""`vigil doctor` against pseudo-terminals that misbehave on purpose: a silent one, one that
speaks another protocol version, one wired differently from the protocol, and one that only
sends garbage. Each planted fault must be named; a healthy board is checked in
tests/firmware/test_board_doctor.py (it needs the simulated board)."""

from __future__ import annotations

import contextlib
import os
import select
import subprocess
import sys
import threading
import time
import tty
from pathlib import Path

import numpy as np
import pytest
import yaml

from server.link.codec import Decoder, encode
from server.link.doctor import any_problem, check_port, holders, node_findings
from server.link.messages import Ack, Channel, Identity, QueryCommand
from server.protocol.load import load_protocol

ROOT = Path(__file__).resolve().parents[2]
PROTOCOL = ROOT / "protocols" / "lever_training_devaluation.yaml"
WIRING = load_protocol(PROTOCOL).wiring
RIGHT_INPUTS = (Channel(1, "lever_press"), Channel(3, "head_entry"))
RIGHT_OUTPUTS = (Channel(1, "lever"), Channel(5, "house_light"), Channel(7, "feeder"))


class FaultyBoard:
    """A pty whose far end answers `ask` lines in one planted wrong way (or not at all)."""

    def __init__(self, folder: Path, fault: str) -> None:
        self.fault = fault
        self.master, slave = os.openpty()
        tty.setraw(slave)
        self.path = folder / f"{fault}.tty"
        self.path.symlink_to(os.ttyname(slave))
        os.close(slave)  # open only while a host has it, like a real device node
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._serve, daemon=True)
        self._thread.start()

    def _identity(self, version: int, inputs) -> bytes:
        return encode(Identity(0, "planted-fault", version, 9, inputs, RIGHT_OUTPUTS))

    def _serve(self) -> None:
        decoder = Decoder("host")
        rng = np.random.default_rng(3)
        while not self._stop.is_set():
            if self.fault == "garbage":
                with contextlib.suppress(OSError):
                    os.write(self.master, rng.integers(0, 256, 40, dtype=np.uint8).tobytes() + b"\n")
            try:
                ready, _, _ = select.select([self.master], [], [], 0.05)
                data = os.read(self.master, 4096) if ready else b""
            except OSError:  # no host has the port open: nothing to read
                self._stop.wait(0.02)
                continue
            for message in decoder.feed(data):
                if not isinstance(message, QueryCommand) or self.fault in ("silent", "garbage"):
                    continue
                if message.topic == "iam":
                    version = 2 if self.fault == "version" else 1
                    inputs = (Channel(1, "nose_poke"), Channel(3, "head_entry")) \
                        if self.fault == "channels" else RIGHT_INPUTS  # fmt: skip
                    os.write(self.master, self._identity(version, inputs))
                os.write(self.master, encode(Ack(0, message.command_id, "ok", 1000, 0)))

    def close(self) -> None:
        self._stop.set()
        self._thread.join(timeout=1)
        os.close(self.master)


@pytest.fixture
def faulty(tmp_path):
    made = []

    def make(fault: str) -> FaultyBoard:
        made.append(FaultyBoard(tmp_path, fault))
        return made[-1]

    yield make
    for board in made:
        board.close()


def levels(findings, check):
    return [f.level for f in findings if f.check == check]


def test_a_silent_port_is_named_silent(faulty):
    board = faulty("silent")
    found = check_port("box 'quiet'", str(board.path), WIRING, greet_s=1.0)
    (hand,) = [f for f in found if f.check == "handshake"]
    assert hand.level == "problem" and hand.message.startswith("silent: nothing came back")
    assert "flashed" in hand.advice


def test_garbage_is_named_with_the_reasons_the_lines_failed(faulty):
    board = faulty("garbage")
    found = check_port("box 'noisy'", str(board.path), WIRING, greet_s=1.0)
    (hand,) = [f for f in found if f.check == "handshake"]
    assert hand.level == "problem" and hand.message.startswith("garbage:")
    assert "baud" in hand.advice


def test_another_protocol_version_names_both_versions(faulty):
    board = faulty("version")
    found = check_port("box 'old'", str(board.path), WIRING, greet_s=2.0)
    (version,) = [f for f in found if f.check == "version"]
    # PROTOCOL.md section 10: refuse a version we do not speak, naming both.
    assert version.level == "problem"
    assert "version 2" in version.message and "version 1" in version.message
    assert not levels(found, "ping")  # a board we cannot read is not pinged


def test_a_different_channel_map_names_the_channel_and_both_kinds(faulty):
    board = faulty("channels")
    found = check_port("box 'rewired'", str(board.path), WIRING, "'lever training'", greet_s=2.0)
    problems = [f for f in found if f.check == "channels"]
    assert [f.level for f in problems] == ["problem"]
    assert problems[0].message == ("input 'press' (lever_press) is wired to channel 1, which is "
                                   "a nose_poke on the device")  # fmt: skip
    assert levels(found, "ping") == ["ok"] and any_problem(found)


def test_node_checks_name_a_missing_node_and_a_holder(faulty, tmp_path):
    (missing,) = node_findings("box 'gone'", str(tmp_path / "nothing.tty"))
    assert missing.level == "problem" and "does not exist" in missing.message
    board = faulty("silent")
    with open(board.path, "rb"):  # this process holds it; doctor looks at other processes
        pass
    child = subprocess.Popen([sys.executable, "-c", f"f = open({str(board.path)!r}, 'rb'); "
                              "import sys; sys.stdin.read()"], stdin=subprocess.PIPE)  # fmt: skip
    try:
        for _ in range(50):
            if holders(str(board.path)):
                break
            time.sleep(0.05)
        assert [pid for pid, _ in holders(str(board.path))] == [child.pid]
        busy = [f for f in node_findings("box 'shared'", str(board.path)) if f.check == "busy"]
        assert busy[0].level == "problem" and f"pid {child.pid}" in busy[0].message
    finally:
        child.stdin.close()
        child.wait()


def test_vigil_doctor_prints_one_line_per_finding_and_exits_1(faulty, tmp_path):
    boards = {"old": faulty("version"), "rewired": faulty("channels")}
    config = {"lab": "faults", "database": "x.sqlite", "caps": {"max_rewards": 10, "max_minutes": 5},
              "boxes": [{"name": n, "animal": f"A-{i}", "protocol": str(PROTOCOL), "port": str(b.path)}
                        for i, (n, b) in enumerate(boards.items())]}  # fmt: skip
    lab = tmp_path / "lab.yaml"
    lab.write_text(yaml.safe_dump(config))
    done = subprocess.run([sys.executable, "-m", "server.cli", "doctor", str(lab)],
                          capture_output=True, text=True, timeout=60)  # fmt: skip
    assert done.returncode == 1, done.stdout + done.stderr
    assert "Traceback" not in done.stderr
    lines = done.stdout.splitlines()
    assert any(ln.startswith("box 'old'") and "problem: 'planted-fault' speaks wire protocol version 2"
               in ln for ln in lines)  # fmt: skip
    assert any(ln.startswith("box 'rewired'") and "which is a nose_poke on the device" in ln
               and "->" in ln for ln in lines)  # fmt: skip
    assert lines[-1] == "2 problem(s)"
    usage = subprocess.run([sys.executable, "-m", "server.cli", "doctor", "a", "b"],
                           capture_output=True, text=True, timeout=60)  # fmt: skip
    assert usage.returncode == 2
