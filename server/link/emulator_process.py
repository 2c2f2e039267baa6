"""Emulated boxes as child processes, each on its own pseudo-terminal (hardware_stubs/box.py),
so `vigil demo` and `vigil run` drive them through the same serial path as real boxes."""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from collections.abc import Mapping
from pathlib import Path
from typing import Any

# Lab-config fault keys -> the emulator's command-line options.
FAULT_FLAGS = {
    "unplug_every_s": "--unplug-every",
    "unplug_for_s": "--unplug-for",
    "drop_rate": "--drop-rate",
    "garbage_rate": "--garbage-rate",
    "delay_ms": "--delay-ms",
}


def emulator_command(
    link: Path,
    protocol: str,
    agent: str,
    seed: int,
    traits: Mapping[str, Any] | None = None,
    faults: Mapping[str, float] | None = None,
    extra: tuple[str, ...] = (),
) -> list[str]:
    """The command line that starts one emulated box linked at `link`."""
    cmd = [sys.executable, "-m", "hardware_stubs.box", "--link", str(link),
           "--protocol", protocol, "--agent", agent, "--seed", str(seed)]  # fmt: skip
    for key, value in (traits or {}).items():
        cmd += ["--trait", f"{key}={json.dumps(value)}"]  # JSON is YAML: the box reads it back
    for key, value in (faults or {}).items():
        if key not in FAULT_FLAGS:
            raise ValueError(f"unknown fault '{key}'")
        cmd += [FAULT_FLAGS[key], repr(float(value))]
    return cmd + list(extra)


class EmulatorProcess:
    """One running emulated box; `stop()` ends it. It also ends by itself with its parent."""

    def __init__(self, name: str, link: Path, command: list[str]) -> None:
        self.name = name
        self.link = link
        self._stderr = tempfile.TemporaryFile()
        # Its own session: a Ctrl-C at the terminal reaches the lab, which ends the sessions
        # cleanly and then stops its boxes, instead of pulling every box's cable at once.
        self.process = subprocess.Popen(
            command,
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=self._stderr,
            start_new_session=True,
        )

    def failure(self) -> str | None:
        """Why the emulator has exited, None while it runs."""
        code = self.process.poll()
        if code is None:
            return None
        self._stderr.seek(0)
        lines = self._stderr.read().decode(errors="replace").strip().splitlines()
        why = lines[-1] if lines else f"exit status {code}"
        return f"emulated box '{self.name}' exited: {why}"

    def stop(self, timeout_s: float = 3.0) -> None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout_s)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        self._stderr.close()
