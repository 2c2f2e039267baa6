"""Running `vigil` verbs as child processes and reading what they print as they go."""

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
    """`python -m server.cli ARGS` with its output collected line by line."""

    def __init__(self, args: list[str], cwd: Path, env: dict[str, str] | None = None):
        full_env = {**os.environ, "PYTHONUNBUFFERED": "1", **(env or {})}
        full_env["PYTHONPATH"] = os.pathsep.join(
            p for p in (str(REPO), full_env.get("PYTHONPATH", "")) if p)
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "server.cli", *args], cwd=cwd, env=full_env,
            stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
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
                return line[len(prefix):].strip()
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
                return line[len(prefix):].strip()

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
