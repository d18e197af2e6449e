"""`plantrig check RIG --bench`: will this machine hold the rig's rate?

Prints what decides real-time quality here, the rig's measured per-tick cost, a short
pacing test at the rig's tick, and a plain verdict with the largest rate that would
hold. Advice defers to the site: changing a bench machine's kernel settings is the IT
department's and the safety officer's call, not plantrig's.
"""

from __future__ import annotations

import dataclasses
import os
import time
from typing import Any

from plantrig._console import human_duration
from plantrig.sim import machine_facts, pacing_test, simulate

COST_TICKS = 2000
SITE_NOTE = ("advice only: change a bench machine's settings with your site's IT and "
             "safety rules (docs/performance.md, \"Preparing a bench machine\")")


def per_tick_cost(rig: Any) -> float:
    """Seconds a tick of ``rig`` takes in fast mode, every tick in Python as in real time
    (no plain ticks in C); its controller built in when the rig talks to one over a link:
    the link's own cost is not in this figure."""
    if rig.link is not None and rig.link.controller is not None:
        rig = dataclasses.replace(rig, controller=rig.link.controller, link=None)
    ticks = min(rig.n_ticks, COST_TICKS)
    short = dataclasses.replace(rig, duration=ticks * rig.tick, mode="fast")
    best = float("inf")
    for _ in range(3):   # the best of three: start-up and a busy neighbour inflate it
        began = time.perf_counter()
        simulate(short, stretches=False)
        best = min(best, (time.perf_counter() - began) / ticks)
    return best


def bench_report(rig: Any, seconds: float) -> int:
    """Print the readiness report; 0 when the rate holds here, 1 when it does not."""
    cpus = sorted(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else [0]
    cpu = cpus[-1]
    print(f"bench: can this machine hold {1 / rig.tick:g} Hz (tick {human_duration(rig.tick)})?")
    for fact in machine_facts(cpu):
        mark = {True: "good", False: "LIMITS", None: "info"}[fact.good]
        print(f"  {mark:<6} {fact.name}: {fact.value}")
        if fact.advice and fact.good is not True:
            print(f"         -> {fact.advice}")
    work = per_tick_cost(rig)
    print(f"  info   per-tick cost of this rig: {human_duration(work)} "
          f"(fast mode, {min(rig.n_ticks, COST_TICKS)} ticks, best of 3)")
    result = pacing_test(rig.tick, work, seconds)
    late = result.lateness
    print(f"  test   {result.ticks} ticks paced at {1 / rig.tick:g} Hz for {seconds:g} s "
          f"({result.scheduler}, core {result.cpu}): {result.missed} missed deadlines, "
          f"lateness p50 {human_duration(late.quantile_s(50))}, p99 "
          f"{human_duration(late.quantile_s(99))}, max {human_duration(late.max_s)}")
    largest = result.largest_rate_hz()
    if result.holds:
        print(f"bench: the rate HOLDS here; the largest rate that would: about {largest:g} Hz")
    else:
        print(f"bench: the rate does NOT hold here (missed deadlines, or p99 lateness over a "
              f"tenth of the tick); the largest rate that would: about {largest:g} Hz")
    print(f"bench: {SITE_NOTE}")
    return 0 if result.holds else 1
