"""Benchmark the dashboard: drawing speed, and what it costs the real-time loop.

Not a test: run `.venv/bin/python bench/bench_gui.py [--seconds 10]` and read the markdown
it prints. It starts its own Xvfb when DISPLAY is not set. Every number sits beside a
peer measured in the same run:

- frames per second for 8 plots of 10,000 points each (updated every frame, as a live
  dashboard does), drawn raw against drawn after the dashboard's min-max decimation;
- the loop's lateness at 1 kHz (demo conveyor rig, real time) with no dashboard, with
  the dashboard at its default 30 Hz cap, and with a 1000 Hz cap (so only the pacer's
  idle ratio bounds it).
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
CONVEYOR = ROOT / "configs" / "conveyor.toml"
N_PLOTS, N_POINTS = 8, 10_000


def _off_the_loop_core() -> None:
    """Keep the display server off the core the real-time loop pins itself to (the
    highest), as a bench set up for real-time work would (docs/dashboard.md)."""
    cpus = os.sched_getaffinity(0)
    if len(cpus) > 1:
        os.sched_setaffinity(0, cpus - {max(cpus)})


def start_xvfb() -> subprocess.Popen[bytes] | None:
    """An X server for the run when there is none; None if DISPLAY is already set."""
    if os.environ.get("DISPLAY"):
        return None
    exe = shutil.which("Xvfb")
    if exe is None:
        raise SystemExit("Xvfb is needed for this benchmark (or set DISPLAY)")
    read_fd, write_fd = os.pipe()
    proc = subprocess.Popen([exe, "-displayfd", str(write_fd), "-screen", "0",
                             "1400x900x24", "-nolisten", "tcp"], pass_fds=(write_fd,),
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            preexec_fn=_off_the_loop_core)
    os.close(write_fd)
    with os.fdopen(read_fd) as f:
        os.environ["DISPLAY"] = f":{f.readline().strip()}"
    return proc


def fps_child(decimate: bool, seconds: float, out: mp.Queue) -> None:  # type: ignore[type-arg]
    """8 plots x 10k points, new data every frame, uncapped; frames per second."""
    os.environ["LP_NUM_THREADS"] = "1"
    import dearpygui.dearpygui as dpg

    from plantrig.gui._view import BUCKETS, HEIGHT, WIDTH
    from plantrig.sim import decimate_minmax

    t = np.arange(N_POINTS) * 1e-3
    rng = np.random.default_rng(5)
    data = [np.sin(2 * np.pi * (i + 1) * 0.2 * t) + 0.05 * rng.normal(size=N_POINTS)
            for i in range(N_PLOTS)]
    dpg.create_context()
    with dpg.window(tag="main"):
        for i in range(N_PLOTS):
            with dpg.plot(height=(HEIGHT - 40) // N_PLOTS, width=-1, no_title=True):
                dpg.add_plot_axis(dpg.mvXAxis, tag=f"x{i}")
                with dpg.plot_axis(dpg.mvYAxis, auto_fit=True):
                    dpg.add_line_series([], [], tag=f"s{i}")
    dpg.create_viewport(width=WIDTH, height=HEIGHT, vsync=False)
    dpg.setup_dearpygui()
    dpg.show_viewport()
    dpg.set_primary_window("main", True)
    frames, shift = 0, 0
    start = time.perf_counter()
    while time.perf_counter() - start < seconds:
        shift += 7
        for i in range(N_PLOTS):
            y = np.roll(data[i], shift)
            x, yy = decimate_minmax(t, y, BUCKETS) if decimate else (t, y)
            dpg.set_value(f"s{i}", [x, yy])
            dpg.set_axis_limits(f"x{i}", float(t[0]), float(t[-1]))
        dpg.render_dearpygui_frame()
        frames += 1
    out.put(frames / (time.perf_counter() - start))
    dpg.destroy_context()


def measure_fps(decimate: bool, seconds: float) -> float:
    ctx = mp.get_context("spawn")
    out = ctx.Queue()
    proc = ctx.Process(target=fps_child, args=(decimate, seconds, out))
    proc.start()
    fps = out.get(timeout=seconds + 60)
    proc.join(30)
    return float(fps)


def lateness_run(seconds: float, dashboard_cap: float | None,
                 out: Path) -> dict[str, float]:
    """One real-time conveyor run; the dashboard (if any) opens on its tapes."""
    from plantrig.gui import start_dashboard_process
    from plantrig.sim import load_rig, run_to_folder

    rig = replace(load_rig(CONVEYOR), duration=seconds)
    commands = mp.get_context("spawn").Queue() if dashboard_cap else None
    started: dict = {}

    def on_ready(tape: Path, events: Path) -> None:
        started["p"] = start_dashboard_process(tape, events, rig.path, commands,
                                               frame_cap_hz=dashboard_cap or 30.0)

    _, outcome, summary = run_to_folder(rig, out, realtime=True, commands=commands,
                                        on_tapes_ready=on_ready if dashboard_cap else None)
    frames = 0
    if "p" in started:
        frames = started["p"].frames
        started["p"].stop()
    timing = summary["timing"]
    return {"p50": timing["lateness_p50_s"], "p99": timing["lateness_p99_s"],
            "max": timing["lateness_max_s"], "overruns": timing["overruns"],
            "frames": frames, "ticks": summary["ticks_recorded"]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=10.0,
                        help="length of each real-time run (default 10)")
    parser.add_argument("--fps-seconds", type=float, default=5.0,
                        help="length of each drawing measurement (default 5)")
    parser.add_argument("--rounds", type=int, default=2,
                        help="runs of each configuration, interleaved (default 2)")
    args = parser.parse_args()
    xvfb = start_xvfb()
    try:
        raw = measure_fps(False, args.fps_seconds)
        thin = measure_fps(True, args.fps_seconds)
        configs = (("no dashboard", None), ("dashboard, 30 Hz cap", 30.0),
                   ("dashboard, 1000 Hz cap (idle-ratio bound only)", 1000.0))
        trials: dict[str, list[dict[str, float]]] = {label: [] for label, _ in configs}
        with tempfile.TemporaryDirectory() as tmp:
            for _ in range(args.rounds):          # interleaved, so drift hits all alike
                for label, cap in configs:
                    trials[label].append(lateness_run(args.seconds, cap, Path(tmp)))
        runs = {label: {key: float(np.median([t[key] for t in ts])) for key in ts[0]}
                for label, ts in trials.items()}
    finally:
        if xvfb is not None:
            xvfb.terminate()
            xvfb.wait(10)
    load = os.getloadavg()
    print("## Dashboard\n")
    print(f"Measured by `bench/bench_gui.py` on {os.cpu_count()} cores under Xvfb + Mesa "
          f"(LP_NUM_THREADS=1); load average at the end {load[0]:.2f} (other work shares "
          "the machine: trust the ratios more than the absolute numbers).\n")
    print(f"Drawing {N_PLOTS} plots x {N_POINTS:,} points, new data every frame, uncapped:\n")
    print("| series drawn | frames/s | vs raw |")
    print("|---|---|---|")
    print(f"| raw ({N_POINTS:,} points each) | {raw:.1f} | 1.00 |")
    print(f"| min-max decimated (dashboard) | {thin:.1f} | {thin / raw:.2f} |")
    print(f"\nLoop lateness, conveyor rig at 1 kHz in real time, {args.seconds:g} s per run, "
          f"median of {args.rounds} interleaved runs per configuration ({sys.platform}):\n")
    print("| configuration | p50 (us) | p99 (us) | max (us) | overruns | dashboard frames "
          "| p99 vs no dashboard |")
    print("|---|---|---|---|---|---|---|")
    base = runs["no dashboard"]["p99"]
    for label, r in runs.items():
        ratio = r["p99"] / base if base > 0 else float("nan")
        print(f"| {label} | {r['p50'] * 1e6:.1f} | {r['p99'] * 1e6:.1f} | "
              f"{r['max'] * 1e6:.0f} | {r['overruns']:.0f} | {r['frames']:.0f} | {ratio:.2f} |")


if __name__ == "__main__":
    main()
