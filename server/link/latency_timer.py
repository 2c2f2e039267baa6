"""The USB-serial latency timer: how long a bridge chip may hold a short packet before sending.

Many bridges default to 16 ms, which swamps every other delay on the path (DESIGN.md,
"USB serial floor"); Linux shows it as `latency_timer` in sysfs, settable 1-255 ms. Reading
it is harmless; setting it needs root and belongs in a udev rule, so Vigil only warns.
"""

from __future__ import annotations

import os
from pathlib import Path

WARN_ABOVE_MS = 2

# Where Linux shows the timer for a tty named NAME (two views of the same attribute).
_SYSFS_PLACES = ("bus/usb-serial/devices/{name}/latency_timer", "class/tty/{name}/device/latency_timer")


def latency_timer_ms(port: str, sysfs: str | Path = "/sys") -> int | None:
    """The latency timer of the USB-serial device behind `port` (a path, symlinks followed),
    or None when there is none to read (a pty, a URL, a native USB CDC board)."""
    if "://" in port:
        return None
    name = os.path.basename(os.path.realpath(port))
    for place in _SYSFS_PLACES:
        try:
            text = (Path(sysfs) / place.format(name=name)).read_text()
        except OSError:
            continue
        try:
            return int(text.strip())
        except ValueError:
            return None
    return None


def latency_warning(box: str, port: str, sysfs: str | Path = "/sys") -> str | None:
    """A one-line warning when the port's latency timer is above 2 ms, else None."""
    ms = latency_timer_ms(port, sysfs)
    if ms is None or ms <= WARN_ABOVE_MS:
        return None
    return (
        f"warning: box '{box}': the USB-serial latency timer of {port} is {ms} ms, so input "
        f"events can arrive up to {ms} ms late; set it to 1 ms (see the README, 'Serial boxes')"
    )
