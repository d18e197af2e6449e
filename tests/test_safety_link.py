"""Interlocks over a real serial link: a pty pair, the reference controller in its own
process (``plantrig controller``), the rig in real time.

The bench rig is configs/rehearsals/conveyor_guarded_hil.toml: link.watchdog_timeout
0.05 s at a 1 ms tick, an interlock ``link_watchdog`` on ``link_lost``.
"""

from __future__ import annotations

import dataclasses
import os
import signal
import threading
from pathlib import Path
from typing import Any

import numpy as np
from hil_helpers import pty_controller

from plantrig.io import FdPort, build_link, open_pty_pair
from plantrig.sim import evaluate, load_rig, load_scenario, simulate

REHEARSALS = Path(__file__).resolve().parents[1] / "configs" / "rehearsals"
BENCH = REHEARSALS / "conveyor_guarded_hil.toml"


def bench_run(duration: float, action: Any = None, at: float = 0.8,
              scenario: Any = None) -> Any:
    rig = dataclasses.replace(load_rig(BENCH), duration=duration)
    pair = open_pty_pair()
    with pty_controller(BENCH, pair) as proc:
        link = build_link(rig, port=FdPort(pair.master_fd, name="pty", owns_fd=False))
        timer = threading.Timer(at, action, (proc,)) if action else None
        if timer:
            timer.start()
        try:
            return rig, simulate(rig, realtime=True, link=link, scenario=scenario)
        finally:
            if timer:
                timer.cancel()


def test_watchdog_interlock_trips_within_timeout_plus_one_tick() -> None:
    # the controller process is stopped mid-run: no more commands, and a serial line
    # reports nothing (docs/platform.md); only the link's watchdog can notice
    rig, data = bench_run(2.0, action=lambda proc: os.kill(proc.pid, signal.SIGSTOP))
    timeout_ticks = round(0.05 / rig.tick)
    events = data.outcome.events
    lost = [e for e in events if e.kind == "link_lost"][-1]
    trip = next(e for e in events if e.kind == "trip" and e.tick >= lost.tick)
    assert trip.detail.startswith("link_watchdog: link lost (link_lost): ")
    fresh = data["fresh"]
    last_fresh = int(np.flatnonzero(fresh[:trip.tick] == 1)[-1])
    # the one watchdog rule (sim/engine/_watchdog.py): lost at the first tick whose silence
    # exceeds the timeout, exactly as a rehearsed link fault (test_watchdog.py)
    assert trip.tick - last_fresh == timeout_ticks + 1
    assert trip.tick == lost.tick                       # in the tick the cause appears
    tripped = data["trip:link_watchdog"]
    assert not tripped[:trip.tick].any() and tripped[trip.tick:].all()
    assert np.all(data["u:voltage"][trip.tick:] == 0.0)  # the safe value, held
    # every tick ran, but the link was lost: never "completed" (docs/records.md)
    assert data.outcome.ended == "fault" and data.rows.shape[0] == rig.n_ticks
    assert data.outcome.reason.startswith("acceptance rule 'link kept' not met")


def test_the_fast_rehearsal_runs_unchanged_on_the_bench() -> None:
    # link_lost.toml drops the controller's frames at the link boundary; on the bench the
    # decoded commands are dropped, so the same watchdog trip and recovery follow
    rig = load_rig(BENCH)
    sc = load_scenario(REHEARSALS / "link_lost.toml", rig)
    rig, data = bench_run(2.6, scenario=sc)
    verdicts = evaluate(sc, data.columns, data.units, data.rows, data.outcome.events,
                        rig.tick)
    failed = [v for v in verdicts if not v.passed]
    assert verdicts and not failed, failed
    kinds = [e.kind for e in data.outcome.events]
    assert "link_lost" in kinds and "link_restored" in kinds and "reset" in kinds
