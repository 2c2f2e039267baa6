"""Random durations and reinforcement schedules, drawn from the session's seeded generator."""

from __future__ import annotations

import math

import numpy as np

from server.protocol.model import Duration, Schedule


def fleshler_hoffman(mean: float, n: int) -> list[float]:
    """The VI interval list of Fleshler & Hoffman (1962), J. Exp. Anal. Behav. 5:529-530.

    t_k = T[1 + ln N + (N-k)ln(N-k) - (N-k+1)ln(N-k+1)], k = 1..N, with 0 ln 0 = 0. The
    list sums to N*T (the series telescopes), so its mean is exactly T.
    """

    def xlnx(x: int) -> float:
        return x * math.log(x) if x > 0 else 0.0

    return [mean * (1 + math.log(n) + xlnx(n - k) - xlnx(n - k + 1)) for k in range(1, n + 1)]


class DurationDraw:
    """Draws one Duration spec repeatedly; list forms keep their own position."""

    __slots__ = ("spec", "rng", "_bag", "_next")

    def __init__(self, spec: Duration, rng: np.random.Generator):
        self.spec = spec
        self.rng = rng
        self._bag: list[float] = []
        self._next = 0

    def draw(self) -> float:
        spec = self.spec
        kind = spec.kind
        if kind == "fixed":
            return spec.value
        if kind == "uniform":
            return spec.low + (spec.high - spec.low) * self.rng.random()
        if kind == "exponential":
            return truncated_exponential(self.rng, spec.mean, spec.low, spec.high)
        # list
        if spec.shuffled:
            if not self._bag:
                self._bag = [spec.values[i] for i in self.rng.permutation(len(spec.values))]
            return self._bag.pop()
        value = spec.values[self._next % len(spec.values)]
        self._next += 1
        return value


def truncated_exponential(rng: np.random.Generator, mean: float, low: float, high: float) -> float:
    """Exponential(mean) shifted to start at `low` and truncated at `high`, by inversion.

    Shifting keeps the mean close to `low + mean` for a wide window, which is how ITIs of
    this shape are usually specified (common practice); inversion needs one draw, never loops.
    """
    span = high - low
    u = rng.random()
    # CDF of Exp(mean) on [0, span]: F(x) = (1 - e^{-x/mean}) / (1 - e^{-span/mean})
    x = -mean * math.log1p(-u * (1.0 - math.exp(-span / mean)))
    return low + min(x, span)


class ScheduleState:
    """Progress of one reinforcement schedule within one step (Ferster & Skinner 1957).

    FR n: the n-th response is reinforced. VR n: the requirement is drawn for each
    reinforcer with mean n (uniform on 1..2n-1). RR p: each response is reinforced with
    probability p. FI t: the first response at least t s after the step began. VI t: as FI with
    the interval drawn from the Fleshler-Hoffman list of mean t, sampled without replacement.
    """

    __slots__ = ("schedule", "rng", "required", "count", "armed_at", "_vi_bag")

    def __init__(self, schedule: Schedule, rng: np.random.Generator):
        self.schedule = schedule
        self.rng = rng
        self._vi_bag: list[float] = []
        self.count = 0
        self.required = 0
        self.armed_at = 0.0

    def begin(self, t: float) -> None:
        s = self.schedule
        self.count = 0
        if s.kind == "FR":
            self.required = int(s.value)
        elif s.kind == "VR":
            n = int(s.value)
            self.required = int(self.rng.integers(1, 2 * n)) if n > 1 else 1
        elif s.kind == "FI":
            self.armed_at = t + s.value
        elif s.kind == "VI":
            if not self._vi_bag:
                intervals = fleshler_hoffman(s.value, s.intervals)
                self._vi_bag = [intervals[i] for i in self.rng.permutation(len(intervals))]
            self.armed_at = t + self._vi_bag.pop()

    def respond(self, t: float) -> bool:
        """Count one response at time t; True when it earns the reinforcer."""
        kind = self.schedule.kind
        self.count += 1
        if kind == "FR" or kind == "VR":
            return self.count >= self.required
        if kind == "RR":
            return self.rng.random() < self.schedule.value
        return t >= self.armed_at
