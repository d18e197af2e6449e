"""Clocks and pacing: the one place that knows about wall time.

The tick loop paces itself through a Clock, so tests can swap in a virtual clock and a
real-time loop can be checked deterministically (after trio's injectable Clock).
Pacing is hybrid: sleep until ``spin`` before the deadline, then spin on the
monotonic counter (docs/platform.md: p99 lateness 2.3 us against 140 us with sleep only).
The spin window is chosen from this machine's measured wake-up jitter (spin_window_ns),
so a quiet bench spins a few tens of microseconds and a loaded one spins longer.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from typing import Protocol

SPIN_NS = 200_000            # the window when nothing was measured, and its floor
SPIN_MAX_NS = 1_000_000
NAP_NS = 200_000             # each calibration sleep


def spin_window_ns(oversleeps_ns: Sequence[int], tick_ns: int | None = None) -> int:
    """The spin window for measured wake-up delays (how late each sleep returned): 1.5
    times their 99th percentile, a margin over the regular worst case (common practice
    for hybrid sleep-spin waits), at least 200 us (a short calibration on a quiet moment
    underestimates what a loaded machine does later), at most 1 ms, and never more
    than a quarter of the tick: a loop that spins most of its tick starves the recorder
    and the link on a small machine, and is throttled under SCHED_FIFO. Rarer, longer
    stalls are not worth spinning for: they show as lateness and overruns."""
    ordered = sorted(oversleeps_ns) or [0]
    p99 = ordered[min(len(ordered) - 1, int(0.99 * len(ordered)))]
    ceiling = SPIN_MAX_NS if tick_ns is None else min(SPIN_MAX_NS, tick_ns // 4)
    return int(min(ceiling, max(SPIN_NS, 1.5 * p99)))


def measure_spin_window_ns(tick_ns: int | None = None, samples: int = 200) -> int:
    """Sleep ``samples`` short naps (about 50 ms in all) and size the spin window from
    how late they woke (spin_window_ns)."""
    late = []
    for _ in range(samples):
        began = time.perf_counter_ns()
        time.sleep(NAP_NS / 1e9)
        late.append(time.perf_counter_ns() - began - NAP_NS)
    return spin_window_ns(late, tick_ns)


class Clock(Protocol):
    def now_ns(self) -> int:
        """Monotonic time in nanoseconds."""
        ...

    def sleep_until_ns(self, deadline_ns: int) -> None:
        """Return at or just after ``deadline_ns``."""
        ...


class WallClock:
    """time.perf_counter_ns with sleep-then-spin waiting (monotonic: no clock jumps)."""

    def __init__(self, spin_ns: int = SPIN_NS) -> None:
        self.spin_ns = spin_ns

    def now_ns(self) -> int:
        return time.perf_counter_ns()

    def sleep_until_ns(self, deadline_ns: int) -> None:
        now = time.perf_counter_ns()
        coarse = deadline_ns - self.spin_ns - now
        if coarse > 0:
            time.sleep(coarse / 1e9)
        while time.perf_counter_ns() < deadline_ns:
            pass


class VirtualClock:
    """A clock that jumps to each deadline; ``delays_ns`` adds scripted lateness.

    ``work_ns`` is added on every now_ns() call so loops see their tick take time.
    """

    def __init__(self, delays_ns: dict[int, int] | None = None, work_ns: int = 0) -> None:
        self.t = 0
        self.delays_ns = delays_ns or {}
        self.work_ns = work_ns
        self.sleeps = 0

    def now_ns(self) -> int:
        self.t += self.work_ns
        return self.t

    def sleep_until_ns(self, deadline_ns: int) -> None:
        self.t = max(self.t, deadline_ns) + self.delays_ns.get(self.sleeps, 0)
        self.sleeps += 1
