"""Wall-clock time as Vigil stores it: local time with its UTC offset, to the millisecond.

Only session starts, ends and annotations carry wall time (DESIGN.md "Time"); everything
else is seconds from session start, so this is the one reading of the wall clock.
"""

from __future__ import annotations

from datetime import datetime


def local_now() -> datetime:
    """Now, in local time with its UTC offset."""
    return datetime.now().astimezone()


def iso(moment: datetime) -> str:
    """ISO 8601 with the offset, milliseconds kept."""
    return moment.isoformat(timespec="milliseconds")


def wall_now() -> str:
    """Now as stored: ISO 8601 local time with offset, e.g. 2026-12-03T09:30:00.125+01:00."""
    return iso(local_now())
