"""Reference signals r(t) for the built-in controllers and for scenarios.

One vocabulary for every kind, so a rig file reads the same whichever shape it asks
for: ``at`` is when the change begins, ``from`` / ``to`` are the values before and
after it, ``rate`` is how fast a ramp moves (units per second), ``low`` / ``high``
bound a sine, and ``between`` says what a table does between its points.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass

import numpy as np

TABLE_BETWEEN = ("linear", "hold")


@dataclass(frozen=True)
class Step:
    """``from_`` before ``at``, ``to`` from ``at`` on."""

    at: float = 0.0
    from_: float = 0.0
    to: float = 1.0

    def value(self, t: float) -> float:
        return self.to if t >= self.at else self.from_


@dataclass(frozen=True)
class Ramp:
    """``from_`` until ``at``, then moving at ``rate`` per second until it reaches ``to``.

    Without ``to`` (infinite) the ramp never stops. A ``rate`` that moves away from
    ``to`` never reaches it; the rig file refuses that combination.
    """

    at: float = 0.0
    from_: float = 0.0
    rate: float = 1.0
    to: float = math.inf

    def value(self, t: float) -> float:
        if t < self.at:
            return self.from_
        v = self.from_ + self.rate * (t - self.at)
        if math.isinf(self.to):
            return v
        return min(v, self.to) if self.rate >= 0 else max(v, self.to)


@dataclass(frozen=True)
class Sine:
    """Swings between ``low`` and ``high`` at ``hz``; at t = 0 it is at the middle,
    rising, shifted by ``phase_deg`` (90 starts at ``high``).

    r(t) = mid + half * sin(2 pi hz t + phase), mid = (low + high) / 2,
    half = (high - low) / 2.
    """

    low: float = -1.0
    high: float = 1.0
    hz: float = 1.0
    phase_deg: float = 0.0

    def value(self, t: float) -> float:
        mid, half = (self.low + self.high) / 2, (self.high - self.low) / 2
        return mid + half * math.sin(2 * math.pi * self.hz * t + math.radians(self.phase_deg))


class Table:
    """Piecewise table of (time, value) points; ``between`` them "linear" or "hold".

    Before the first point the first value holds, after the last the last value.
    """

    def __init__(self, points: list[tuple[float, float]], between: str = "linear") -> None:
        if between not in TABLE_BETWEEN:
            raise ValueError(f"between: expected 'linear' or 'hold', found {between!r}")
        if not points:
            raise ValueError("points: expected at least one [time, value] pair")
        times = np.array([p[0] for p in points], dtype=np.float64)
        if np.any(np.diff(times) < 0):
            raise ValueError("points: times must not decrease")
        self.times = times
        self.values = np.array([p[1] for p in points], dtype=np.float64)
        self.between = between
        # plain lists and bisect: evaluated every tick, where numpy's call cost dominates
        self._t = times.tolist()
        self._v = self.values.tolist()

    def value(self, t: float) -> float:
        ts, vs = self._t, self._v
        i = bisect.bisect_right(ts, t)         # points at or before t
        if i == 0:
            return vs[0]
        if i == len(ts) or self.between == "hold":
            return vs[i - 1]
        t0, t1 = ts[i - 1], ts[i]
        return vs[i - 1] + (vs[i] - vs[i - 1]) * (t - t0) / (t1 - t0)


Reference = Step | Ramp | Sine | Table
