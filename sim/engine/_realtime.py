"""Making the tick loop's process fit for real time, and undoing it afterwards.

docs/platform.md: a full garbage collection stalled the loop ~99 ms, so collect, freeze
and disable the collector for the run; a busy thread delays wake-ups by one GIL switch
interval, so lower it; SCHED_FIFO and a pinned core help where permitted, but a thread
spinning close to 100 % under SCHED_FIFO gets throttled (50 ms stalls), so FIFO is used
only when the spin window is under half the tick. The spin window is measured here (the
wake-up jitter of short sleeps, after the timer slack is cut and the core chosen) unless
one is given. Pages are locked (mlockall) so a page
fault cannot stall a tick, and the timer slack is cut to 1 ns so the sleeping part of
each wait wakes when asked (docs/performance.md, "Preparing a bench machine").
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import gc
import os
import sys
from collections.abc import Iterator
from dataclasses import dataclass, field

from plantrig.sim.engine._clock import measure_spin_window_ns

FIFO_PRIORITY = 10
SWITCH_INTERVAL_S = 1e-4
PR_SET_TIMERSLACK, PR_GET_TIMERSLACK = 29, 30
MCL_CURRENT, MCL_FUTURE = 1, 2


@dataclass
class RealtimeReport:
    gc_frozen: bool = False
    cpu: int | None = None
    scheduler: str = "SCHED_OTHER"
    memory_locked: bool = False
    spin_ns: int = 0               # the spin window the run used (measured or given)
    notes: list[str] = field(default_factory=list)


def c_library() -> ctypes.CDLL | None:
    """The C library (glibc on Linux; errno kept for ctypes.get_errno), or None where
    there is none to load: prctl, mlockall and malloc_trim come from it."""
    name = ctypes.util.find_library("c")
    try:
        return ctypes.CDLL(name, use_errno=True) if name else None
    except OSError:
        return None


@contextlib.contextmanager
def realtime_process(tick_ns: int, spin_ns: int | None = None) -> Iterator[RealtimeReport]:
    """Apply what the OS allows for the duration of a real-time run; say what it was.
    ``spin_ns`` None: measure the spin window on this machine (measure_spin_window_ns)."""
    report = RealtimeReport()
    old_switch = sys.getswitchinterval()
    old_affinity = os.sched_getaffinity(0) if hasattr(os, "sched_getaffinity") else None
    old_policy = os.sched_getscheduler(0) if hasattr(os, "sched_getscheduler") else None
    old_param = os.sched_getparam(0) if hasattr(os, "sched_getparam") else None
    gc_was_enabled = gc.isenabled()
    libc = c_library()
    old_slack = libc.prctl(PR_GET_TIMERSLACK, 0, 0, 0, 0) if libc else -1
    try:
        gc.collect()
        gc.freeze()
        gc.disable()
        report.gc_frozen = True
        sys.setswitchinterval(SWITCH_INTERVAL_S)
        if old_affinity and len(old_affinity) > 1:
            cpu = max(old_affinity)
            try:
                os.sched_setaffinity(0, {cpu})
                report.cpu = cpu
            except OSError as exc:
                report.notes.append(f"affinity not set: {exc.strerror}")
        if libc is not None:
            libc.prctl(PR_SET_TIMERSLACK, 1, 0, 0, 0)
        report.spin_ns = measure_spin_window_ns(tick_ns) if spin_ns is None else spin_ns
        if old_policy is not None and report.spin_ns * 2 < tick_ns:
            try:
                os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(FIFO_PRIORITY))
                report.scheduler = f"SCHED_FIFO {FIFO_PRIORITY}"
            except OSError as exc:
                report.notes.append(f"SCHED_FIFO not permitted ({exc.strerror}); "
                                    "running under SCHED_OTHER")
        elif old_policy is not None:
            report.notes.append("tick too short to spin under SCHED_FIFO; SCHED_OTHER")
        if libc is not None:
            report.memory_locked = libc.mlockall(MCL_CURRENT | MCL_FUTURE) == 0
            if not report.memory_locked:
                report.notes.append(f"memory not locked ({os.strerror(ctypes.get_errno())})")
        yield report
    finally:
        if libc is not None:
            if report.memory_locked:
                libc.munlockall()
            if old_slack > 0:
                libc.prctl(PR_SET_TIMERSLACK, old_slack, 0, 0, 0)
        if old_policy is not None and old_param is not None:
            with contextlib.suppress(OSError):
                os.sched_setscheduler(0, old_policy, old_param)
        if old_affinity:
            with contextlib.suppress(OSError):
                os.sched_setaffinity(0, old_affinity)
        sys.setswitchinterval(old_switch)
        gc.unfreeze()
        if gc_was_enabled:
            gc.enable()
