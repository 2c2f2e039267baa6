"""`vigil doctor`: why a box's serial port may fail before a session finds out.

For every `port:` box of a lab config (or every serial port found when there is none) it
checks the device node and its stable name, permission to open it, other processes holding
it, the USB-serial latency timer, and then asks the board itself (board_probe.py). Findings
are data; the command line prints them. Linux paths (/dev, /proc, /sys) are read only.
"""

from __future__ import annotations

import grp
import os
from collections.abc import Iterable
from pathlib import Path

from server.link.board_probe import NOTE, OK, PROBLEM, Finding, probe_board
from server.link.latency_timer import WARN_ABOVE_MS, latency_timer_ms
from server.protocol.wiring import Wiring

BY_ID = Path("/dev/serial/by-id")


def stable_names(device: str, by_id: Path = BY_ID) -> list[str]:
    """The /dev/serial/by-id/ links that point at `device` (symlinks followed)."""
    real = os.path.realpath(device)
    try:
        return sorted(str(p) for p in by_id.iterdir() if os.path.realpath(p) == real)
    except OSError:
        return []


def holders(device: str, proc: Path = Path("/proc")) -> list[tuple[int, str]]:
    """Other processes with `device` open: (pid, command name). Unreadable ones are skipped."""
    real = os.path.realpath(device)
    found = []
    for entry in proc.iterdir() if proc.is_dir() else ():
        if not entry.name.isdigit() or int(entry.name) == os.getpid():
            continue
        try:
            fds = list((entry / "fd").iterdir())
        except OSError:
            continue
        for fd in fds:
            try:
                if os.readlink(fd) == real:
                    name = (entry / "comm").read_text().strip()
                    found.append((int(entry.name), name))
                    break
            except OSError:
                continue
    return found


def node_findings(target: str, device: str, sysfs: str | Path = "/sys") -> list[Finding]:
    """Checks of the device node itself; a PROBLEM here means the board is not asked."""
    if "://" in device:
        return [Finding(target, "node", NOTE, f"{device} is a pyserial URL: no device node to check")]
    if not os.path.exists(device):
        return [Finding(target, "node", PROBLEM, f"{device} does not exist",
                        f"plug the board in; its stable names are listed in {BY_ID}/")]  # fmt: skip
    found = [Finding(target, "node", OK, f"{device} exists ({os.path.realpath(device)})")]
    if device.startswith(str(BY_ID) + "/"):
        found.append(Finding(target, "stable-name", OK, "a /dev/serial/by-id/ name: survives re-plugging"))
    else:
        names = stable_names(device)
        if names:
            found.append(Finding(target, "stable-name", NOTE, f"stable name: {names[0]}",
                                 "use it as `port:` in the lab config; /dev/ttyUSBn names change "
                                 "when boards are re-plugged"))  # fmt: skip
        else:
            found.append(Finding(target, "stable-name", NOTE,
                                 "no /dev/serial/by-id/ name (not a USB serial device)"))  # fmt: skip
    if not os.access(device, os.R_OK | os.W_OK):
        st = os.stat(device)
        try:
            group = grp.getgrgid(st.st_gid).gr_name
        except KeyError:
            group = str(st.st_gid)
        found.append(Finding(target, "permission", PROBLEM,
                             f"no permission to open {device} (group '{group}')",
                             f"join the group: sudo usermod -aG {group} $USER, then log in again"))  # fmt: skip
    else:
        found.append(Finding(target, "permission", OK, "this user may open it"))
    busy = holders(device)
    if busy:
        who = ", ".join(f"{name} (pid {pid})" for pid, name in busy)
        found.append(Finding(target, "busy", PROBLEM, f"already open in {who}",
                             "close that program (a serial monitor, another vigil) first"))  # fmt: skip
    ms = latency_timer_ms(device, sysfs)
    if ms is not None:
        if ms > WARN_ABOVE_MS:
            found.append(Finding(target, "latency-timer", PROBLEM,
                                 f"USB-serial latency timer {ms} ms: input events can arrive up "
                                 f"to {ms} ms late",
                                 "set it to 1 ms with the udev rule in the README ('Serial boxes', "
                                 "Latency timer)"))  # fmt: skip
        else:
            found.append(Finding(target, "latency-timer", OK, f"USB-serial latency timer {ms} ms"))
    return found


def check_port(target: str, device: str, wiring: Wiring | None = None, protocol_name: str = "",
               *, greet_s: float | None = None) -> list[Finding]:  # fmt: skip
    """Every check of one port, in order; the board is asked only if the node looks usable."""
    found = node_findings(target, device)
    if any(f.level == PROBLEM for f in found):
        return found
    if greet_s is None:
        return found + probe_board(target, device, wiring, protocol_name)
    return found + probe_board(target, device, wiring, protocol_name, greet_s=greet_s)


def check_lab(boxes: Iterable, *, greet_s: float | None = None) -> list[Finding]:
    """Every `port:` box of a lab config (boxes with `emulate:` have no port to check)."""
    found: list[Finding] = []
    for box in boxes:
        if box.port is None:
            continue
        protocol = box.protocol
        found += check_port(f"box '{box.name}' ({box.port})", box.port, protocol.wiring,
                            f"'{protocol.name}'", greet_s=greet_s)  # fmt: skip
    return found


def serial_ports() -> list[str]:
    """Serial ports this computer has, by their stable names where there are some."""
    from serial.tools import list_ports

    out = []
    for info in sorted(list_ports.comports(), key=lambda p: p.device):
        names = stable_names(info.device)
        out.append(names[0] if names else info.device)
    return out


def any_problem(findings: Iterable[Finding]) -> bool:
    return any(f.level == PROBLEM for f in findings)
