"""Random numbers for the emulator, drawn from one Generator in cached chunks.

Asking numpy for one number at a time costs about a microsecond per call; slicing a
pre-drawn Python list costs a tenth of that, which matters in virtual-time rehearsal.
"""

from __future__ import annotations

import math

import numpy as np

_CHUNK = 512


class Draws:
    """Uniform, normal, lognormal and exponential draws; deterministic for a seeded rng."""

    __slots__ = ("_rng", "_u", "_ui", "_z", "_zi")

    def __init__(self, rng: np.random.Generator) -> None:
        self._rng = rng
        self._u: list[float] = []
        self._ui = 0
        self._z: list[float] = []
        self._zi = 0

    def uniform(self) -> float:
        """Uniform on [0, 1)."""
        i = self._ui
        if i >= len(self._u):
            self._u = self._rng.random(_CHUNK).tolist()
            i = 0
        self._ui = i + 1
        return self._u[i]

    def normal(self) -> float:
        """Standard normal."""
        i = self._zi
        if i >= len(self._z):
            self._z = self._rng.standard_normal(_CHUNK).tolist()
            i = 0
        self._zi = i + 1
        return self._z[i]

    def between(self, low: float, high: float) -> float:
        return low + (high - low) * self.uniform()

    def lognormal(self, median: float, sigma: float) -> float:
        """Lognormal with the given median (= exp(mu)) and log-scale sigma."""
        return median * math.exp(sigma * self.normal())

    def exponential(self, mean: float) -> float:
        # Inverse-CDF draw; 1 - u lies in (0, 1], so the log is finite.
        return -mean * math.log(1.0 - self.uniform())
