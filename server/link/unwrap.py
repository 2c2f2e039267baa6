"""Unwrapping the device's 32-bit microsecond counter into a monotonic 64-bit count."""

from __future__ import annotations

WRAP = 1 << 32  # the counter wraps every 2**32 us = 4294.967296 s (about 71.6 min)
HALF = WRAP >> 1


class DeviceClockUnwrapper:
    """Maps raw 32-bit device times to an unwrapped microsecond count from the first seen.

    Each reading is placed within half a wrap (about 35.8 min) of the newest reading so far:
    forward steps advance the reference, backward steps (a replayed or reordered event) are
    placed just before it without moving it. Heartbeats arrive every second, so consecutive
    readings are never half a wrap apart while the link lives; after a device restart call
    `reset`, because its counter starts again from zero.
    """

    def __init__(self) -> None:
        self._raw: int | None = None  # newest raw reading
        self._unwrapped = 0  # its unwrapped value

    def unwrap(self, device_us: int) -> int:
        if not 0 <= device_us < WRAP:
            raise ValueError(f"device time out of range: {device_us}")
        if self._raw is None:
            self._raw, self._unwrapped = device_us, device_us
            return device_us
        step = (device_us - self._raw) % WRAP
        if step < HALF:
            self._raw = device_us
            self._unwrapped += step
            return self._unwrapped
        return self._unwrapped - (WRAP - step)

    @property
    def newest(self) -> int | None:
        """Unwrapped value of the newest reading, None before the first."""
        return None if self._raw is None else self._unwrapped

    def reset(self) -> None:
        self._raw, self._unwrapped = None, 0
