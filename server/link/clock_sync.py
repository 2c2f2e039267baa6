"""Offset and drift between the device's microsecond clock and the host's monotonic clock.

Each sample is one round trip: the host sends a command at `sent`, the device stamps its ack
with its own time, the host reads the ack at `received`. The device stamp is taken to fall at
the midpoint of the round trip, which is exact when the two legs take equally long; a round
trip with the least delay leaves the least room for the legs to differ, so only the fastest
samples are fitted (the minimum-delay filter of Mills 1991 for NTP, Paxson 1998 for one-way
transit times). Only round trips whose command went out once may be samples: an ack to a
resent command cannot tell which send it answers (Karn & Partridge 1987).
"""

from __future__ import annotations

import statistics
from collections import deque
from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Sample:
    sent_s: float
    device_us: int  # unwrapped (see DeviceClockUnwrapper)
    received_s: float

    @property
    def delay_s(self) -> float:
        return self.received_s - self.sent_s

    @property
    def midpoint_s(self) -> float:
        return 0.5 * (self.sent_s + self.received_s)


@dataclass(frozen=True, slots=True)
class ClockFit:
    """host_s = ref_host_s + rate * (device_us - ref_device_us) * 1e-6."""

    ref_device_us: int
    ref_host_s: float
    rate: float  # host seconds per device second
    samples_used: int
    min_delay_s: float

    @property
    def drift_ppm(self) -> float:
        """How much faster the host clock runs than the device's, in parts per million."""
        return (self.rate - 1.0) * 1e6

    @property
    def offset_s(self) -> float:
        """Host time minus device time at the reference point."""
        return self.ref_host_s - self.ref_device_us * 1e-6

    def to_host(self, device_us: int) -> float:
        return self.ref_host_s + self.rate * (device_us - self.ref_device_us) * 1e-6


class ClockSync:
    """Fits offset and drift by least squares over the minimum-delay samples of a window.

    The newest `window` samples are cut, in time order, into groups of about 1/`keep`
    samples; the fastest round trip of each group is kept, so the kept samples are both the
    cleanest and spread over the window (which is what pins the drift); a kept sample slower
    than twice their median is dropped, since a midpoint can be off by up to half its round
    trip. Until the kept samples span `min_span_s` of device time the rate is taken as 1.
    """

    def __init__(self, window: int = 120, keep: float = 0.25, min_span_s: float = 2.0) -> None:
        if window < 1 or not 0.0 < keep <= 1.0 or min_span_s < 0:
            raise ValueError("clock sync needs window >= 1, 0 < keep <= 1, min_span_s >= 0")
        self.keep = keep
        self.min_span_s = min_span_s
        self._samples: deque[Sample] = deque(maxlen=window)
        self._fit: ClockFit | None = None

    def add(self, sent_s: float, device_us: int, received_s: float) -> None:
        """Record one round trip (host monotonic seconds, unwrapped device microseconds)."""
        if received_s < sent_s:
            raise ValueError(f"round trip ends before it starts: {sent_s} > {received_s}")
        self._samples.append(Sample(sent_s, device_us, received_s))
        self._fit = None

    def __len__(self) -> int:
        return len(self._samples)

    def selected(self) -> list[Sample]:
        """The minimum-delay sample of each group of the window, in time order, less any
        that took over twice the median of those (a group caught in a burst of congestion)."""
        samples = list(self._samples)
        if not samples:
            return []
        groups = max(1, round(len(samples) * self.keep))
        size = len(samples) / groups
        fastest = [
            min(samples[round(g * size) : round((g + 1) * size)], key=lambda s: s.delay_s) for g in range(groups)
        ]
        limit = 2.0 * statistics.median(s.delay_s for s in fastest)
        return [s for s in fastest if s.delay_s <= limit]

    def fit(self) -> ClockFit | None:
        """The current estimate, None before the first sample."""
        if self._fit is None and self._samples:
            self._fit = _least_squares(self.selected(), self.min_span_s)
        return self._fit

    def to_host(self, device_us: int) -> float:
        """Host monotonic seconds at unwrapped device time `device_us`."""
        fit = self.fit()
        if fit is None:
            raise ValueError("clock not synchronised yet: no round trip recorded")
        return fit.to_host(device_us)


def _least_squares(kept: list[Sample], min_span_s: float) -> ClockFit:
    """Ordinary least squares of midpoint host time on device time, centred for precision."""
    n = len(kept)
    ref_us = round(sum(s.device_us for s in kept) / n)
    xs = [(s.device_us - ref_us) * 1e-6 for s in kept]
    ys = [s.midpoint_s for s in kept]
    x_mean = sum(xs) / n
    y_mean = sum(ys) / n
    sxx = sum((x - x_mean) ** 2 for x in xs)
    span = max(xs) - min(xs)
    if n >= 2 and span >= min_span_s and sxx > 0:
        rate = sum((x - x_mean) * (y - y_mean) for x, y in zip(xs, ys)) / sxx
    else:
        rate = 1.0
    # The line passes through the centroid (x_mean, y_mean); express it at x = 0 (ref_us).
    return ClockFit(
        ref_device_us=ref_us,
        ref_host_s=y_mean - rate * x_mean,
        rate=rate,
        samples_used=n,
        min_delay_s=min(s.delay_s for s in kept),
    )
