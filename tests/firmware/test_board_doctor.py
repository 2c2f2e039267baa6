"""`vigil doctor` on a lab whose box is a healthy simulated reference board: every check
passes, the handshake and the wiring check name the firmware and the protocol, the pings
come back, and the exit code is 0."""

from __future__ import annotations

import subprocess
import sys

import yaml

from hardware_stubs.simulated_board import HERE

PROTOCOL = HERE.parent / "protocols" / "reversal.yaml"


def test_vigil_doctor_on_a_healthy_board_is_all_good(board, tmp_path):
    config = {"lab": "healthy", "database": "x.sqlite", "caps": {"max_rewards": 10, "max_minutes": 5},
              "boxes": [{"name": "sim-1", "animal": "A-1", "protocol": str(PROTOCOL),
                         "port": str(board.link)}]}  # fmt: skip
    lab = tmp_path / "lab.yaml"
    lab.write_text(yaml.safe_dump(config))
    done = subprocess.run([sys.executable, "-m", "server.cli", "doctor", str(lab)],
                          capture_output=True, text=True, timeout=60)  # fmt: skip
    print("\n" + done.stdout)
    assert done.returncode == 0, done.stdout + done.stderr
    lines = done.stdout.splitlines()
    assert all(ln.startswith(f"box 'sim-1' ({board.link}): ") for ln in lines[:-1])
    assert not any(": problem: " in ln for ln in lines)
    text = done.stdout
    assert "ok: 'vigil-ref-1.0' answered" in text and "wire protocol version 1" in text
    assert "ok: channel map fits the wiring of 'two-lever reversal'" in text
    assert "ok: 5 pings: round trip min" in text
    assert lines[-1] == "all good"
