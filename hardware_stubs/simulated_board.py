"""The reference box firmware on a simulated ATmega328P (simavr), reached through a pty.

`SimulatedBoard.start(link)` builds the firmware image and our simavr harness
(hardware_stubs/simulator/) when needed, starts the harness, and returns once the board's
UART is on a pseudo-terminal linked at `link`: open that path with pyserial (or give it to a
lab config as `port:`) exactly like a real board's port. The harness answers on its stdin and
stdout; this wrapper turns that into method calls and lists of pin changes, each stamped in
simulated CPU cycles (16 MHz, counted from power-on, never restarting).

Inputs are the README's channel numbers (1 left lever ... 8 centre nose poke), active = 1;
outputs likewise (1 left lever ... 10 magazine light).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import threading
from dataclasses import dataclass
from pathlib import Path

HERE = Path(__file__).resolve().parent
FIRMWARE_DIR = HERE / "firmware"
SIMULATOR_DIR = HERE / "simulator"
FREQ_HZ = 16_000_000
SIMAVR_HEADER = Path("/usr/include/simavr/sim_avr.h")


class BoardError(Exception):
    """The simulated board cannot be built or started; a short lower-case message."""


@dataclass(frozen=True, slots=True)
class PinChange:
    cycle: int
    channel: int
    level: int

    @property
    def us(self) -> float:
        return self.cycle / (FREQ_HZ / 1e6)


def missing_parts() -> str | None:
    """Why the simulated board cannot be built here (one line), or None when it can."""
    for tool, package in (("make", "make"), ("cc", "gcc"), ("avr-gcc", "gcc-avr avr-libc binutils-avr")):
        if shutil.which(tool) is None:
            return f"{tool} not installed (Debian: {package})"
    if not SIMAVR_HEADER.exists():
        return "simavr headers not installed (Debian: simavr libsimavr-dev libsimavrparts1)"
    return None


def build(build_root: Path | None = None) -> tuple[Path, Path, str]:
    """Build the firmware image and the harness; returns (harness, hex, firmware size report)."""
    why = missing_parts()
    if why:
        raise BoardError(why)
    fw_build = (build_root / "firmware") if build_root else FIRMWARE_DIR / "build"
    sim_build = (build_root / "simulator") if build_root else SIMULATOR_DIR / "build"
    reports = []
    for folder, out in ((FIRMWARE_DIR, fw_build), (SIMULATOR_DIR, sim_build)):
        done = subprocess.run(["make", "-C", str(folder), f"BUILD={out}"],
                              capture_output=True, text=True, timeout=180)  # fmt: skip
        if done.returncode != 0:
            tail = (done.stderr or done.stdout).strip().splitlines()[-1:] or ["(no output)"]
            raise BoardError(f"building {folder.name} failed: {tail[0]}")
        reports.append(done.stdout)
    return sim_build / "board-sim", fw_build / "vigil-box.hex", reports[0]


class SimulatedBoard:
    """One running harness; `close()` (or the context manager) ends it."""

    def __init__(self, harness: Path, hex_file: Path, link: Path) -> None:
        self.link = Path(link)
        self.outputs: list[PinChange] = []
        self.inputs: list[PinChange] = []
        self.host_lines: list[int] = []  # cycles at which a host line reached the board
        self.board_lines: list[int] = []  # cycles at which a board line reached the host
        self.resets: list[int] = []
        self.corrupted: dict[str, list[int]] = {"rx": [], "tx": []}
        self.errors: list[str] = []
        self._replies: dict[str, str] = {}
        self._token = 0
        self._changed = threading.Condition()
        self._proc = subprocess.Popen(
            [str(harness), "--hex", str(hex_file), "--link", str(self.link)],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
            bufsize=0,
        )  # fmt: skip
        first = self._proc.stdout.readline().decode()
        if not first.startswith("ready "):
            err = self._proc.stderr.read().decode().strip()
            self._proc.wait()
            raise BoardError(err or "the board simulator did not start")
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    @classmethod
    def start(cls, link: Path | str, build_root: Path | None = None) -> SimulatedBoard:
        harness, hex_file, _ = build(build_root)
        return cls(harness, hex_file, Path(link))

    def __enter__(self) -> SimulatedBoard:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------------------ reports

    def _read(self) -> None:
        for raw in self._proc.stdout:
            word, _, rest = raw.decode(errors="replace").strip().partition(" ")
            parts = rest.split()
            with self._changed:
                if word == "out":
                    self.outputs.append(PinChange(*map(int, parts)))
                elif word == "in":
                    self.inputs.append(PinChange(*map(int, parts)))
                elif word == "rxlf":
                    self.host_lines.append(int(parts[0]))
                elif word == "txlf":
                    self.board_lines.append(int(parts[0]))
                elif word == "reset":
                    self.resets.append(int(parts[0]))
                elif word == "corrupt":
                    self.corrupted[parts[1]].append(int(parts[0]))
                elif word == "synced":
                    self._replies[parts[0]] = parts[1]
                elif word == "stats":
                    self._replies["stats"] = rest
                elif word == "error":
                    self.errors.append(rest)
                self._changed.notify_all()

    def _send(self, text: str) -> None:
        try:
            self._proc.stdin.write(text.encode())
        except (BrokenPipeError, ValueError):
            raise BoardError("the board simulator has stopped") from None

    def _ask(self, key: str, text: str, timeout: float) -> str:
        self._send(text)
        with self._changed:
            if not self._changed.wait_for(lambda: key in self._replies or self._proc.poll() is not None,
                                          timeout):  # fmt: skip
                raise BoardError(f"the board simulator did not answer '{text.strip()}'")
            if key not in self._replies:
                raise BoardError("the board simulator has stopped")
            return self._replies.pop(key)

    # ------------------------------------------------------------ driving

    def drive(self, channel: int, active: bool, after_us: float = 0) -> None:
        """Input `channel` goes active (switch closed, beam broken) or idle, `after_us` from now."""
        self._send(f"in {channel} {int(active)} {round(after_us)}\n")

    def script(self, steps: list[tuple[float, int, bool]]) -> int:
        """Several input changes (after_us, channel, active) timed from one instant; returns the
        cycle of that instant. Written at once, so their spacing is exact in simulated time."""
        self._token += 1
        text = "".join(f"in {ch} {int(on)} {round(us)}\n" for us, ch, on in steps)
        return int(self._ask(str(self._token), text + f"sync {self._token}\n", 5.0))

    def press(self, channel: int, hold_us: float, after_us: float = 0) -> int:
        """A press (or beam break) lasting `hold_us`; returns the cycle the script was timed from."""
        return self.script([(after_us, channel, True), (after_us + hold_us, channel, False)])

    def now(self) -> int:
        """The board's current cycle (after every command sent before)."""
        self._token += 1
        return int(self._ask(str(self._token), f"sync {self._token}\n", 5.0))

    def unplug(self) -> None:
        self._send("unplug\n")
        self.now()

    def plug(self) -> None:
        self._send("plug\n")
        self.now()
        if self.errors:
            raise BoardError(self.errors[-1])

    def reset(self) -> None:
        self._send("reset\n")
        self.now()

    def noise(self, direction: str, every: int) -> None:
        """Change one byte in 1 of `every` lines (drawn): 'rx' host to board, 'tx' board to host."""
        self._send(f"noise {direction} {every}\n")
        self.now()

    def stats(self) -> dict[str, float]:
        rest = self._ask("stats", "stats\n", 5.0)
        return {k: float(v) for k, v in (item.split("=") for item in rest.split())}

    def wait_for(self, condition, timeout: float) -> bool:
        """Wait until condition(board) holds (checked on every report)."""
        with self._changed:
            return self._changed.wait_for(lambda: condition(self), timeout)

    def output_log(self, channel: int) -> list[PinChange]:
        with self._changed:
            return [c for c in self.outputs if c.channel == channel]

    def pulses_us(self, channel: int) -> list[tuple[int, float]]:
        """Every completed on-pulse of an output: (cycle it went on, width in microseconds)."""
        out, on_at = [], None
        for c in self.output_log(channel):
            if c.level and on_at is None:
                on_at = c.cycle
            elif not c.level and on_at is not None:
                out.append((on_at, (c.cycle - on_at) / (FREQ_HZ / 1e6)))
                on_at = None
        return out

    def close(self) -> None:
        if self._proc.poll() is None:
            try:
                self._proc.stdin.write(b"quit\n")
                self._proc.stdin.close()
            except (BrokenPipeError, ValueError):
                pass
            try:
                self._proc.wait(timeout=3)
            except subprocess.TimeoutExpired:
                self._proc.kill()
                self._proc.wait()
        self._reader.join(timeout=2)
        for stream in (self._proc.stdout, self._proc.stderr):
            stream.close()
        if os.path.islink(self.link):
            os.unlink(self.link)
