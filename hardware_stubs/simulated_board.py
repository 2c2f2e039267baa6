"""A box's firmware on a simulated ATmega328P (simavr), reached through a pty.

`SimulatedBoard.start(link)` builds the firmware image and our simavr harness
(hardware_stubs/simulator/) when needed, starts the harness, and returns once the board's
UART is on a pseudo-terminal linked at `link`: open that path with pyserial (or give it to a
lab config as `port:`) exactly like a real board's port. The harness answers on its stdin and
stdout; this wrapper turns that into method calls and lists of pin changes, each stamped in
simulated CPU cycles (16 MHz, counted from power-on, never restarting).

`box` names the box the firmware is built for (`BOXES`: "ref", the reference box, or "ports",
the five-port box); the image and the harness's pin map follow it. Given a hex file instead,
the box is the one whose firmware id the image carries.

Channels are the README's numbers for that box, active = 1: on the reference box inputs
1 left lever ... 8 centre nose poke and outputs 1 left lever ... 10 magazine light; on the
five-port box inputs 1 centre poke ... 7 pellet sensor and outputs 1 centre port light ...
10 tone gate.
"""

from __future__ import annotations

import os
import re
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
# Box -> the image its build writes (hardware_stubs/firmware/Makefile, BOX=...).
BOXES = {"ref": "vigil-box", "ports": "vigil-ports"}


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


def firmware_ids() -> dict[str, str]:
    """Each box's firmware id, as the firmware's boxes.h declares it (REF_FIRMWARE_ID ...)."""
    text = (FIRMWARE_DIR / "boxes.h").read_text()
    return {m[1].lower(): m[2] for m in re.finditer(r'#define (\w+)_FIRMWARE_ID "([^"]+)"', text)}


def box_of_image(hex_file: Path) -> str:
    """The box an Intel hex image was built for: the one whose firmware id it carries."""
    try:
        records = Path(hex_file).read_text().split()
    except OSError as exc:
        raise BoardError(f"cannot read {hex_file}: {exc.strerror}") from None
    # Intel hex: ':' count(1) address(2) type(1) data checksum(1); type 00 is data.
    data = b"".join(bytes.fromhex(r[9:-2]) for r in records if r.startswith(":") and r[7:9] == "00")
    found = [box for box, ident in firmware_ids().items() if ident.encode() + b"\0" in data]
    if len(found) != 1:
        raise BoardError(f"{hex_file} carries no firmware id of a known box ({', '.join(BOXES)})")
    return found[0]


def build(build_root: Path | None = None, box: str = "ref") -> tuple[Path, Path, str]:
    """Build a box's firmware image and the harness; returns (harness, hex, firmware size report)."""
    if box not in BOXES:
        raise BoardError(f"unknown box '{box}' (known: {', '.join(BOXES)})")
    why = missing_parts()
    if why:
        raise BoardError(why)
    fw_build = (build_root / "firmware") if build_root else FIRMWARE_DIR / "build"
    sim_build = (build_root / "simulator") if build_root else SIMULATOR_DIR / "build"
    reports = []
    for folder, out in ((FIRMWARE_DIR, fw_build), (SIMULATOR_DIR, sim_build)):
        done = subprocess.run(["make", "-C", str(folder), f"BUILD={out}", f"BOX={box}"],
                              capture_output=True, text=True, timeout=180)  # fmt: skip
        if done.returncode != 0:
            tail = (done.stderr or done.stdout).strip().splitlines()[-1:] or ["(no output)"]
            raise BoardError(f"building {folder.name} failed: {tail[0]}")
        reports.append(done.stdout)
    return sim_build / "board-sim", fw_build / f"{BOXES[box]}.hex", reports[0]


class SimulatedBoard:
    """One running harness; `close()` (or the context manager) ends it."""

    def __init__(self, harness: Path, hex_file: Path, link: Path, box: str | None = None) -> None:
        self.box = box or box_of_image(hex_file)
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
            [str(harness), "--box", self.box, "--hex", str(hex_file), "--link", str(self.link)],
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
    def start(cls, link: Path | str, build_root: Path | None = None, box: str = "ref") -> SimulatedBoard:
        harness, hex_file, _ = build(build_root, box)
        return cls(harness, hex_file, Path(link), box)

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
                elif word in ("stats", "pins"):
                    self._replies[word] = rest
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

    def pins(self) -> dict[str, dict[int, str]]:
        """The harness's pin map: {"in": {1: "PD2", ...}, "out": {1: "PB0", ...}}."""
        _, *fields = self._ask("pins", "pins\n", 5.0).split()
        out: dict[str, dict[int, str]] = {}
        for label, items in zip(fields[::2], fields[1::2]):
            out[label] = {int(ch): pin for ch, pin in (item.split(":") for item in items.split(","))}
        return out

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
