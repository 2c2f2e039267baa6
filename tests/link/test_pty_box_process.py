"""The emulated-box process: it leaves with its parent, and a bad start is one clear line."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

from server.link.emulator_process import EmulatorProcess, emulator_command

PROTOCOL = Path(__file__).resolve().parents[2] / "protocols" / "bandit.yaml"


def alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    # A zombie still answers kill(0): read its state.
    return Path(f"/proc/{pid}/stat").read_text().split(") ")[1][0] != "Z"


def test_the_box_exits_when_its_parent_is_killed(tmp_path):
    link = tmp_path / "box.tty"
    parent = subprocess.Popen([sys.executable, "-c", textwrap.dedent(f"""
        import sys, time
        from pathlib import Path
        from server.link.emulator_process import EmulatorProcess, emulator_command
        cmd = emulator_command(Path({str(link)!r}), {str(PROTOCOL)!r}, "random", 3)
        child = EmulatorProcess("orphan", Path({str(link)!r}), cmd)
        print(child.process.pid, flush=True)
        time.sleep(60)
    """)], stdout=subprocess.PIPE, text=True)  # fmt: skip
    try:
        pid = int(parent.stdout.readline())
        deadline = time.monotonic() + 20
        while not link.exists() and time.monotonic() < deadline:
            time.sleep(0.05)
        assert link.is_symlink()  # the box is up and linked its pty
        parent.send_signal(signal.SIGKILL)
        parent.wait()
        deadline = time.monotonic() + 3
        while alive(pid) and time.monotonic() < deadline:
            time.sleep(0.05)
        assert not alive(pid)
        assert not link.exists()  # it unplugged on the way out
    finally:
        parent.kill()


def test_a_bad_start_is_reported_in_one_line(tmp_path):
    link = tmp_path / "box.tty"
    child = EmulatorProcess("rack-3", link, emulator_command(
        link, str(PROTOCOL), "q_learner", 1, traits={"alpah": 0.3}))  # fmt: skip
    try:
        child.process.wait(20)
        why = child.failure()
    finally:
        child.stop()
    assert why is not None and why.startswith("emulated box 'rack-3' exited: emulated box: ")
    assert "alpah" in why and "\n" not in why
