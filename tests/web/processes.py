"""Running `vigil` verbs (or a test's own lab script) as child processes, reading what they
print as they go, and finding the status page's process among their children."""

from __future__ import annotations

import os
import queue
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

from web_samples import REPO


class Vigil:
    """`python -m server.cli ARGS` (or `python SCRIPT ARGS`) with its output collected line
    by line."""

    def __init__(self, args: list[str], cwd: Path, env: dict[str, str] | None = None, script: Path | None = None):
        full_env = {**os.environ, "PYTHONUNBUFFERED": "1", **(env or {})}
        full_env["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), full_env.get("PYTHONPATH", "")) if p)
        self.proc = subprocess.Popen(
            [sys.executable, *([str(script)] if script else ["-m", "server.cli"]), *args],
            cwd=cwd,
            env=full_env,
            stdin=subprocess.DEVNULL,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
        )
        self.lines: list[str] = []
        self._queue: queue.Queue = queue.Queue()
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self._queue.put(line.rstrip("\n"))
        self._queue.put(None)

    def wait_for(self, prefix: str, timeout: float = 60.0) -> str:
        """The first line starting with `prefix` (its remainder), reading until it comes."""
        for line in self.lines:
            if line.startswith(prefix):
                return line[len(prefix) :].strip()
        deadline = time.monotonic() + timeout
        while True:
            try:
                line = self._queue.get(timeout=max(0.01, deadline - time.monotonic()))
            except queue.Empty:
                raise AssertionError(f"no line starting {prefix!r}; got {self.lines}") from None
            if line is None:
                raise AssertionError(f"exited before {prefix!r}: {self.lines}")
            self.lines.append(line)
            if line.startswith(prefix):
                return line[len(prefix) :].strip()

    def finish(self, sig: int | None = signal.SIGINT, timeout: float = 30.0) -> int:
        """Send `sig` (None: just wait), wait for the exit, collect the rest of the output."""
        if sig is not None and self.proc.poll() is None:
            self.proc.send_signal(sig)
        try:
            code = self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
            raise AssertionError(f"vigil did not exit within {timeout:g} s: {self.lines}") from None
        while True:
            try:
                line = self._queue.get(timeout=5)
            except queue.Empty:
                break
            if line is None:
                break
            self.lines.append(line)
        return code

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()


def _stat(pid: int) -> list[str] | None:
    """Fields of /proc/PID/stat after the command name (state first), None once reaped."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return None
    return text.rsplit(")", 1)[1].split()


def page_process_of(pid: int) -> int:
    """The pid of the status page's process started by process `pid` (Linux /proc)."""
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        fields = _stat(int(entry.name))
        if fields is None or fields[1] != str(pid):
            continue
        try:
            argv = (entry / "cmdline").read_bytes().split(b"\0")
        except OSError:
            continue
        if b"server.web.child" in argv:
            return int(entry.name)
    raise AssertionError(f"process {pid} has no status page process")


def has_exited(pid: int) -> bool:
    """True once `pid` has exited: reaped, or a zombie waiting for whoever adopted it."""
    fields = _stat(pid)
    return fields is None or fields[0] in ("Z", "X")


def wait_exited(pid: int, timeout: float = 15.0) -> None:
    deadline = time.monotonic() + timeout
    while not has_exited(pid):
        assert time.monotonic() < deadline, f"process {pid} still running after {timeout:g} s"
        time.sleep(0.05)
