"""Can this machine hold a rig's rate? What decides it, a short pacing test, a verdict.

The facts that decide real-time quality on Linux are read from /proc and /sys (common
practice for tuning a real-time host): whether SCHED_FIFO is permitted, the kernel's
real-time throttling, the CPU frequency governor, isolated cores and SMT siblings, the
timer slack, whether memory can be locked, and what else runs on the loop's core. Then
the loop's own pacing (sleep, then spin) runs for a moment at the rig's tick with busy
work standing in for the rig's measured per-tick cost, under the same real-time
settings a run uses. The verdict is plain: the rate holds when no deadline is missed and
p99 lateness stays under a tenth of the tick; the largest rate that would hold is
estimated from the measured work and wake-up jitter.
"""

from __future__ import annotations

import math
import os
import resource
import time
from dataclasses import dataclass, field
from pathlib import Path

from plantrig.sim.engine._clock import WallClock
from plantrig.sim.engine._realtime import c_library, realtime_process
from plantrig.sim.engine._timing import DurationHistogram

PR_GET_TIMERSLACK = 30
MCL_CURRENT = 1
LATE_SHARE_OK = 0.1      # p99 lateness under a tenth of the tick
HEADROOM = 0.7           # a rate holds when work + jitter fill at most 70 % of the tick


@dataclass
class Fact:
    """One thing that decides real-time quality: what it is, whether it helps, advice."""

    name: str
    value: str
    good: bool | None            # None: cannot tell on this machine
    advice: str = ""


@dataclass
class PacingResult:
    tick_s: float
    work_s: float
    ticks: int
    missed: int
    lateness: DurationHistogram = field(default_factory=DurationHistogram)
    scheduler: str = ""
    cpu: int | None = None

    @property
    def holds(self) -> bool:
        return self.missed == 0 and self.lateness.quantile_s(99) < LATE_SHARE_OK * self.tick_s

    def largest_rate_hz(self) -> float:
        """The fastest tick whose work and worst wake-up jitter fit HEADROOM of it."""
        need = self.work_s + self.lateness.quantile_s(99.9)
        return math.floor(HEADROOM / need) if need > 0 else math.inf


def _read(path: str) -> str | None:
    try:
        return Path(path).read_text().strip()
    except OSError:
        return None


def machine_facts(cpu: int) -> list[Fact]:
    """What decides real-time quality for a loop pinned to ``cpu``."""
    facts = [_fifo(), _throttling(), _governor(cpu), _isolated(cpu), _siblings(cpu),
             _timer_slack(), _memlock(), _core_load(cpu)]
    return facts


def _fifo() -> Fact:
    try:
        old = os.sched_getscheduler(0), os.sched_getparam(0)
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(1))
        os.sched_setscheduler(0, old[0], old[1])
        return Fact("SCHED_FIFO", "permitted", True)
    except (OSError, AttributeError) as exc:
        return Fact("SCHED_FIFO", f"not permitted ({getattr(exc, 'strerror', exc)})", False,
                    "run as a user with CAP_SYS_NICE or an rtprio limit (limits.conf)")


def _throttling() -> Fact:
    runtime = _read("/proc/sys/kernel/sched_rt_runtime_us")
    period = _read("/proc/sys/kernel/sched_rt_period_us")
    if runtime is None:
        return Fact("real-time throttling", "not exposed", None)
    if runtime == "-1":
        return Fact("real-time throttling", "off (sched_rt_runtime_us = -1)", True)
    share = int(runtime) / int(period or 1_000_000)
    return Fact("real-time throttling", f"a FIFO thread gets {share:.0%} of each "
                f"{int(period or 0) / 1e6:g} s", None,
                "a loop that spins more than that share is stalled; the engine spins only "
                "the last part of each tick")


def _governor(cpu: int) -> Fact:
    gov = _read(f"/sys/devices/system/cpu/cpu{cpu}/cpufreq/scaling_governor")
    if gov is None:
        return Fact("CPU frequency governor", "not exposed (a VM, or no cpufreq)", None)
    return Fact("CPU frequency governor", gov, gov == "performance",
                "" if gov == "performance" else "set the governor to 'performance' on the "
                "loop's core: frequency changes add wake-up jitter")


def _isolated(cpu: int) -> Fact:
    isolated = _read("/sys/devices/system/cpu/isolated") or ""
    cpus = _cpu_list(isolated)
    return Fact("isolated cores", isolated or "none", cpu in cpus,
                "" if cpu in cpus else f"isolate core {cpu} (isolcpus= or a cpuset) so "
                "nothing else is scheduled there")


def _siblings(cpu: int) -> Fact:
    text = _read(f"/sys/devices/system/cpu/cpu{cpu}/topology/thread_siblings_list")
    if text is None:
        return Fact("SMT siblings", "not exposed", None)
    others = [c for c in _cpu_list(text) if c != cpu]
    return Fact("SMT siblings", f"core {cpu} shares its core with {others or 'none'}",
                not others, "" if not others else "keep the sibling idle, or turn SMT off "
                "for the bench")


def _timer_slack() -> Fact:
    libc = c_library()
    if libc is None:
        return Fact("timer slack", "unknown", None)
    slack = libc.prctl(PR_GET_TIMERSLACK, 0, 0, 0, 0)
    return Fact("timer slack", f"{slack / 1000:g} us (a run sets 1 ns)", None,
                "real-time runs lower it for the loop; nothing to change")


def _memlock() -> Fact:
    soft, _hard = resource.getrlimit(resource.RLIMIT_MEMLOCK)
    libc = c_library()
    if libc is None:
        return Fact("memory locking", "unknown", None)
    if libc.mlockall(MCL_CURRENT) == 0:
        libc.munlockall()
        return Fact("memory locking", "permitted (a run locks its pages)", True)
    limit = "unlimited" if soft == resource.RLIM_INFINITY else f"{soft // 1024} KiB"
    return Fact("memory locking", f"refused (RLIMIT_MEMLOCK {limit})", False,
                "raise the memlock limit so page faults cannot stall the loop")


def _core_load(cpu: int, seconds: float = 0.5) -> Fact:
    def sample() -> tuple[int, int] | None:
        for line in (_read("/proc/stat") or "").splitlines():
            if line.startswith(f"cpu{cpu} "):
                values = [int(v) for v in line.split()[1:]]
                return sum(values), values[3] + values[4]   # total, idle + iowait
        return None
    first = sample()
    time.sleep(seconds)
    second = sample()
    if first is None or second is None or second[0] == first[0]:
        return Fact(f"load on core {cpu}", "not exposed", None)
    busy = 1 - (second[1] - first[1]) / (second[0] - first[0])
    return Fact(f"load on core {cpu}", f"{busy:.0%} busy over {seconds:g} s", busy < 0.1,
                "" if busy < 0.1 else "move other work off the loop's core")


def _cpu_list(text: str) -> set[int]:
    """CPUs of a kernel cpu list such as '1,3-5'."""
    out: set[int] = set()
    for part in text.split(","):
        if "-" in part:
            a, b = part.split("-")
            out.update(range(int(a), int(b) + 1))
        elif part.strip():
            out.add(int(part))
    return out


def pacing_test(tick_s: float, work_s: float, seconds: float = 2.0,
                spin_ns: int | None = None) -> PacingResult:
    """Pace a loop at ``tick_s`` doing ``work_s`` of busy work a tick, as a run would
    (the spin window measured as a run measures it, unless given)."""
    tick_ns, work_ns = int(round(tick_s * 1e9)), int(round(work_s * 1e9))
    n = max(1, int(seconds / tick_s))
    result = PacingResult(tick_s, work_s, n, 0)
    with realtime_process(tick_ns, spin_ns) as report:
        clock = WallClock(report.spin_ns)
        result.scheduler, result.cpu = report.scheduler, report.cpu
        start = clock.now_ns() + 5_000_000
        for k in range(n):
            deadline = start + k * tick_ns
            clock.sleep_until_ns(deadline)
            began = clock.now_ns()
            late = began - deadline
            result.lateness.add(late)
            if late >= tick_ns:
                result.missed += 1
            end = began + work_ns
            while clock.now_ns() < end:
                pass
    return result
