"""Timing statistics whose memory does not grow with the run.

Every tick's lateness and work time stay in the tick record itself (the `lateness` and
`exec_time` columns); the loop also counts them into two fixed-bin histograms, so that
p50, p99 and max come out at the end of a weekend run without keeping 16 bytes a tick.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

FINE_NS = 1_000                  # 1 us bins ...
FINE_BINS = 10_000               # ... up to 10 ms
COARSE_NS = 1_000_000            # then 1 ms bins ...
COARSE_BINS = 10_000             # ... up to 10 s; one more bin holds anything longer
FINE_LIMIT_NS = FINE_NS * FINE_BINS
COARSE_LIMIT_NS = COARSE_NS * COARSE_BINS


class DurationHistogram:
    """Durations (ns) in fixed bins: 1 us wide below 10 ms, 1 ms wide below 10 s.

    A quantile is reported as the upper edge of the bin that holds it (never below the
    exact value, at most one bin above it: 1 us below 10 ms), capped at the largest
    duration seen, which is kept exactly. Quantiles use the nearest-rank definition.
    """

    def __init__(self) -> None:
        self.fine = [0] * FINE_BINS
        self.coarse = [0] * COARSE_BINS
        self.beyond = 0
        self.count = 0
        self.max_ns = 0

    def add(self, ns: int) -> None:
        ns = max(0, ns)
        if ns < FINE_LIMIT_NS:
            self.fine[ns // FINE_NS] += 1
        elif ns < COARSE_LIMIT_NS:
            self.coarse[ns // COARSE_NS] += 1
        else:
            self.beyond += 1
        if ns > self.max_ns:
            self.max_ns = ns
        self.count += 1

    def add_many(self, ns: NDArray[np.int64]) -> None:
        """Count many durations at once (reading a record back)."""
        ns = np.maximum(np.asarray(ns, dtype=np.int64), 0)
        if not ns.size:
            return
        fine = ns[ns < FINE_LIMIT_NS] // FINE_NS
        coarse = ns[(ns >= FINE_LIMIT_NS) & (ns < COARSE_LIMIT_NS)] // COARSE_NS
        self.fine = (np.asarray(self.fine) + np.bincount(fine, minlength=FINE_BINS)).tolist()
        self.coarse = (np.asarray(self.coarse)
                       + np.bincount(coarse, minlength=COARSE_BINS)).tolist()
        self.beyond += int(np.count_nonzero(ns >= COARSE_LIMIT_NS))
        self.max_ns = max(self.max_ns, int(ns.max()))
        self.count += int(ns.size)

    def quantile_s(self, q: float) -> float:
        """The ``q`` percentile (0-100) in seconds; 0.0 when nothing was counted."""
        if not self.count:
            return 0.0
        rank = max(1, math.ceil(q * self.count / 100))
        seen = 0
        for i, n in enumerate(self.fine):
            seen += n
            if seen >= rank:
                return min((i + 1) * FINE_NS, self.max_ns) / 1e9
        for i, n in enumerate(self.coarse):
            seen += n
            if seen >= rank:
                return min((i + 1) * COARSE_NS, self.max_ns) / 1e9
        return self.max_ns / 1e9

    @property
    def max_s(self) -> float:
        return self.max_ns / 1e9
