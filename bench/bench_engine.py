"""Benchmark the plant step, the full fast-mode tick and real-time pacing.

Not a test: run `.venv/bin/python bench/bench_engine.py [--seconds 30]` and read the
markdown it prints. Every number sits beside a peer measured in the same run:

- plant step per tick (2, 10, 50 states) against scipy.signal.dlsim's and python-control
  forced_response's cost per sample on the same discrete model;
- the full fast-mode tick (reference, built-in PID, plant, tape record) at 10 states:
  today's engine with its plain ticks in C, the same engine with every tick in Python,
  and with `--engine-at REV` the engine module at git revision REV beside them,
  interleaved in the same run (before/after of a change to the loop);
- real-time pacing at 1, 5 and 10 kHz (--rates): lateness and missed deadlines of the engine
  beside a bare sleep-and-spin loop (the floor) on the same machine.
"""

from __future__ import annotations

import argparse
import queue
import re
import subprocess
import sys
import time
import types
from pathlib import Path

import control
import numpy as np
import scipy.signal

from plantrig.sim import (
    CommandInbox,
    Engine,
    LinearPlant,
    MemoryTape,
    WallClock,
    build_controller,
    build_rig,
    make_stepper,
    tick_columns,
)

TICK = 0.001
ROOT = Path(__file__).resolve().parents[1]


def random_plant(n: int, seed: int = 3) -> LinearPlant:
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(n, n))
    a -= (np.max(np.linalg.eigvals(a).real) + 2.0) * np.eye(n)
    return LinearPlant.from_matrices(a, rng.normal(size=(n, 1)), rng.normal(size=(1, n)))


def best_of(fn, repeats: int = 5) -> float:  # type: ignore[no-untyped-def]
    """Smallest wall time of ``repeats`` calls (least disturbed by the noisy VM)."""
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def plant_step_row(n: int, samples: int) -> str:
    """One table row: plantrig's step against dlsim and forced_response at n states."""
    plant = random_plant(n)
    stepper = make_stepper(plant, TICK)
    u = np.random.default_rng(1).normal(size=(samples, 1))

    def own() -> None:
        stepper.reset()
        su = stepper.u
        advance = stepper.output_and_advance
        for k in range(samples):
            su[0] = u[k, 0]
            advance(0.0)

    sysd = scipy.signal.cont2discrete((plant.A, plant.B, plant.C, plant.D), TICK)
    ctl = control.ss(*sysd[:4], TICK)
    t = np.arange(samples) * TICK
    t_own = best_of(own) / samples * 1e6
    t_dlsim = best_of(lambda: scipy.signal.dlsim(sysd, u), 3) / samples * 1e6
    t_fr = best_of(lambda: control.forced_response(ctl, T=t, U=u[:, 0]), 3) / samples * 1e6
    return (f"| {n} | {t_own:.2f} | {t_dlsim:.2f} | {t_fr:.2f} | "
            f"{t_own / t_dlsim:.2f}x | {t_own / t_fr:.2f}x |")


def plant_step_table(samples: int) -> list[str]:
    return ["| states | plantrig step (us) | dlsim per sample (us) | forced_response per "
            "sample (us) | step / dlsim | step / forced_response |",
            "|---|---|---|---|---|---|"] + [plant_step_row(n, samples) for n in (2, 10, 50)]


def pid_rig(n: int, duration: float, mode: str = "fast"):  # type: ignore[no-untyped-def]
    plant = random_plant(n)
    return build_rig({
        "rig": {"name": f"bench{n}", "tick": TICK, "duration": duration, "mode": mode},
        "plant": {"kind": "lti", "A": plant.A.tolist(), "B": plant.B.tolist(),
                  "C": plant.C.tolist(), "states": [{"name": f"x{i}"} for i in range(n)],
                  "inputs": [{"name": "u", "min": -10.0, "max": 10.0}],
                  "outputs": [{"name": "y"}]},
        "references": [{"name": "r", "kind": "sine", "low": -1.0, "high": 1.0, "hz": 2.0}],
        "controller": {"kind": "pid", "loops": [{"measure": "y", "drive": "u",
                                                  "reference": "r", "kp": 1.0, "ki": 5.0,
                                                  "kd": 0.01, "derivative_lag": 0.005}]},
    }, Path(f"bench{n}.toml"))


def engine_at(rev: str) -> type:
    """The Engine class of the engine module at git revision ``rev``, run against today's
    modules; its controller is built as today (the settings' types changed, not the law)."""
    path = next(p for p in ("sim/engine/_engine.py", "sim/_engine.py")   # before the split
                if subprocess.run(["git", "cat-file", "-e", f"{rev}:{p}"], cwd=ROOT,
                                  stderr=subprocess.DEVNULL).returncode == 0)
    source = subprocess.run(["git", "show", f"{rev}:{path}"], cwd=ROOT, check=True,
                            capture_output=True, text=True).stdout
    # a loop from before the concept folders imports plantrig.sim._x: point it at today's
    homes = {p.stem: f"plantrig.sim.{p.parent.name}.{p.stem}"
             for p in (ROOT / "sim").glob("*/_*.py")}
    source = re.sub(r"plantrig\.sim\.(_\w+)", lambda m: homes.get(m[1], m[0]), source)
    name = f"plantrig.sim._engine_at_{rev}"
    module = types.ModuleType(name)
    sys.modules[name] = module      # dataclasses look their module up by name
    exec(compile(source, f"{rev}:{path}", "exec"), module.__dict__)
    module.build_controller = build_controller  # type: ignore[attr-defined]
    return module.Engine  # type: ignore[attr-defined, no-any-return]


def full_tick_table(samples: int, rev: str | None) -> list[str]:
    rig = pid_rig(10, samples * TICK)
    columns = tick_columns(rig)[0]
    engines = {"today (plain ticks in C)": lambda r, t: Engine(r, t, realtime=False),
               "today, C, inbox looked at every 5 ms (as a recorded run)":
                   lambda r, t: Engine(r, t, realtime=False,
                                       commands=CommandInbox(queue.Queue())),
               "today, every tick in Python": lambda r, t: Engine(r, t, realtime=False,
                                                                  stretches=False)}
    if rev:
        old = engine_at(rev)
        engines[f"at {rev}"] = lambda r, t: old(r, t, realtime=False)
    best = dict.fromkeys(engines, float("inf"))
    for _ in range(3):                     # interleaved, so drift on the VM hits each
        for label, make in engines.items():
            tape = MemoryTape(columns, rig.n_ticks)
            engine = make(rig, tape)
            t0 = time.perf_counter()
            engine.run()
            best[label] = min(best[label], time.perf_counter() - t0)
    plant = random_plant(10)
    sysd = scipy.signal.cont2discrete((plant.A, plant.B, plant.C, plant.D), TICK)
    u = np.random.default_rng(1).normal(size=(samples, 1))
    t_dlsim = best_of(lambda: scipy.signal.dlsim(sysd, u), 3) / samples * 1e6
    lines = ["| 10 states, PID, tape record | plantrig tick (us) | dlsim per sample (us) | "
             "tick / dlsim |", "|---|---|---|---|"]
    for label, seconds in best.items():
        t_tick = seconds / samples * 1e6
        lines.append(f"| fast mode, engine {label} | {t_tick:.2f} | {t_dlsim:.2f} | "
                     f"{t_tick / t_dlsim:.2f}x |")
    return lines


def bare_loop(tick_s: float, seconds: float) -> np.ndarray:
    """The floor: sleep to 200 us before each deadline, then spin; nothing else."""
    clock = WallClock()
    n = int(seconds / tick_s)
    tick_ns = int(tick_s * 1e9)
    late = np.zeros(n, dtype=np.int64)
    start = clock.now_ns() + 5_000_000
    for k in range(n):
        deadline = start + k * tick_ns
        clock.sleep_until_ns(deadline)
        late[k] = clock.now_ns() - deadline
    return late


def pacing_table(seconds: float, rates: list[int]) -> list[str]:
    lines = ["| rate | loop | ticks | missed deadlines (late > 1 tick) | lateness p50 (us) | "
             "p99 (us) | max (us) |", "|---|---|---|---|---|---|---|"]
    for rate in rates:
        tick_s = 1.0 / rate
        floor = bare_loop(tick_s, seconds)
        rig = pid_rig(10, seconds, mode="realtime")
        rig = rig.__class__(**{**rig.__dict__, "tick": tick_s,
                               "duration": seconds})  # same model at this rate
        tape = MemoryTape(tick_columns(rig)[0], rig.n_ticks)
        outcome = Engine(rig, tape).run()
        recorded = tape.rows[:, tape.columns.index("lateness")] * 1e9   # every tick's lateness
        for name, late in (("bare sleep+spin", floor), ("plantrig engine", recorded)):
            us = late / 1e3
            missed = int(np.sum(late >= tick_s * 1e9))
            lines.append(f"| {rate} Hz | {name} | {len(late)} | {missed} | "
                         f"{np.percentile(us, 50):.1f} | {np.percentile(us, 99):.1f} | "
                         f"{us.max():.1f} |")
        if outcome.realtime is not None:
            lines.append(f"| {rate} Hz | (engine scheduler) | {outcome.realtime.scheduler} "
                         f"| skipped slots {outcome.skipped_slots} | | | |")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=30.0,
                        help="real-time pacing run length per rate (default 30)")
    parser.add_argument("--samples", type=int, default=20000,
                        help="ticks per throughput measurement (default 20000)")
    parser.add_argument("--engine-at", metavar="REV",
                        help="also time the engine module at this git revision")
    parser.add_argument("--rates", type=int, nargs="+", default=[1000, 5000, 10000],
                        help="real-time pacing rates in Hz (default 1000 5000 10000)")
    parser.add_argument("--only-tick", action="store_true",
                        help="only the full-tick table (no plant-step or pacing tables)")
    args = parser.parse_args()
    if not args.only_tick:
        print("### Plant step per tick\n")
        print("\n".join(plant_step_table(args.samples)))
    print("\n### Full fast-mode tick\n")
    print("\n".join(full_tick_table(args.samples, args.engine_at)))
    if not args.only_tick:
        print(f"\n### Real-time pacing ({args.seconds:g} s per rate)\n")
        print("\n".join(pacing_table(args.seconds, args.rates)))


if __name__ == "__main__":
    main()
