"""Reference signals r(t) for the built-in controllers and for scenarios."""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Step:
    """``initial`` before ``time``, ``final`` from ``time`` on."""

    time: float = 0.0
    initial: float = 0.0
    final: float = 1.0

    def value(self, t: float) -> float:
        return self.final if t >= self.time else self.initial


@dataclass(frozen=True)
class Ramp:
    """``initial`` until ``start``, then rising at ``slope`` per second up to ``limit``."""

    start: float = 0.0
    slope: float = 1.0
    initial: float = 0.0
    limit: float = math.inf

    def value(self, t: float) -> float:
        if t < self.start:
            return self.initial
        v = self.initial + self.slope * (t - self.start)
        return min(v, self.limit) if self.slope >= 0 else max(v, -self.limit)


@dataclass(frozen=True)
class Sine:
    """offset + amplitude * sin(2 pi f t + phase), phase in degrees."""

    amplitude: float = 1.0
    frequency: float = 1.0
    offset: float = 0.0
    phase: float = 0.0

    def value(self, t: float) -> float:
        return self.offset + self.amplitude * math.sin(
            2 * math.pi * self.frequency * t + math.radians(self.phase))


class Table:
    """Piecewise table of (time, value) points: linear interpolation or hold.

    Before the first point the first value holds, after the last the last value.
    """

    def __init__(self, points: list[tuple[float, float]], interpolation: str = "linear") -> None:
        if interpolation not in ("linear", "hold"):
            raise ValueError(f"interpolation: expected 'linear' or 'hold', found {interpolation!r}")
        if not points:
            raise ValueError("points: expected at least one [time, value] pair")
        times = np.array([p[0] for p in points], dtype=np.float64)
        if np.any(np.diff(times) < 0):
            raise ValueError("points: times must not decrease")
        self.times = times
        self.values = np.array([p[1] for p in points], dtype=np.float64)
        self.interpolation = interpolation
        # plain lists and bisect: evaluated every tick, where numpy's call cost dominates
        self._t = times.tolist()
        self._v = self.values.tolist()

    def value(self, t: float) -> float:
        ts, vs = self._t, self._v
        i = bisect.bisect_right(ts, t)         # points at or before t
        if i == 0:
            return vs[0]
        if i == len(ts) or self.interpolation == "hold":
            return vs[i - 1]
        t0, t1 = ts[i - 1], ts[i]
        return vs[i - 1] + (vs[i] - vs[i - 1]) * (t - t0) / (t1 - t0)


Reference = Step | Ramp | Sine | Table
