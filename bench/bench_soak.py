"""Soak: a long real-time run (1 kHz unless --rate) against the serial reference controller over a
pty, with the recorder, as a bench engineer leaves a rig running.

The rig process (loop and link), its recorder and the controller are three processes;
this script starts the rig process and samples the resident memory of all three from
outside (/proc) every --every seconds, so the sampling costs the loop nothing. At the
end it reports missed deadlines (late ticks and skipped slots), lateness p50/p99/max,
ticks planned/run/recorded, and each process's RSS at the first sample (after
--settle seconds), at a quarter, half and
three quarters of the run, and the last, so a slow growth shows its shape. Samples taken
once the rig has begun to close its record (its summary.json exists, looked for every
0.2 s; sampled every 0.2 s from then on) are kept apart: the close has a fixed peak of
its own (h5py and run.h5's blocks, docs/performance.md), which is not growth in the loop.

    .venv/bin/python bench/bench_soak.py              # 1 hour
    .venv/bin/python bench/bench_soak.py --quick      # 5 minutes
    .venv/bin/python bench/bench_soak.py --rate 4000 --seconds 60   # a 4 kHz hold

A prepared core decides the outcome (docs/platform.md: SCHED_FIFO permitted and not
throttled, memory lockable, an otherwise idle core); `plantrig check RIG --bench` says
what this machine offers. Prints markdown for docs/performance.md.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
RIG = REPO / "configs" / "conveyor_hil.toml"
LAUNCHER = """
import sys
from pathlib import Path
from plantrig._hil import reference_controller_on_pty
from plantrig.io import build_link
from plantrig.sim import load_rig_with_overrides, run_to_folder
rig = load_rig_with_overrides(sys.argv[1], [f"rig.tick={1 / float(sys.argv[4])!r}"],
                              duration=float(sys.argv[2]))
with reference_controller_on_pty(rig) as (port, proc, ready):
    print(f"controller {proc.pid}", flush=True)
    folder, outcome, summary = run_to_folder(rig, Path(sys.argv[3]), realtime=True,
                                             link=build_link(rig, port=port))
print(f"folder {folder}", flush=True)
"""


def rss_mb(pid: int) -> float | None:
    """Resident memory of ``pid`` (VmRSS), or None once it has gone."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    except OSError:
        return None
    return None


def children(pid: int) -> list[int]:
    try:
        text = Path(f"/proc/{pid}/task/{pid}/children").read_text()
    except OSError:
        return []
    return [int(p) for p in text.split()]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=3600.0)
    parser.add_argument("--quick", action="store_true", help="5 minutes")
    parser.add_argument("--rate", type=float, default=1000.0, help="tick rate (Hz)")
    parser.add_argument("--every", type=float, default=5.0, help="memory sample period (s)")
    parser.add_argument("--settle", type=float, default=90.0,
                        help="first memory sample after this long (s); the default lets "
                             "the serial link's ring of 65536 round-trip samples fill at "
                             "1 kHz, which the first hour-long soak counted as growth")
    args = parser.parse_args()
    seconds = 300.0 if args.quick else args.seconds
    out = Path(tempfile.mkdtemp(prefix="bench-soak-"))
    rig_proc = subprocess.Popen([sys.executable, "-c", LAUNCHER, str(RIG), f"{seconds:g}",
                                 str(out), f"{args.rate:g}"], stdout=subprocess.PIPE,
                                text=True)
    assert rig_proc.stdout is not None
    line = rig_proc.stdout.readline()
    if not line.startswith("controller "):
        sys.exit(f"the controller did not start: {line!r}")
    named = {"rig (loop and link)": rig_proc.pid, "controller": int(line.split()[1])}
    samples: dict[str, list[float]] = {}
    closing: dict[str, list[float]] = {}
    time.sleep(args.settle)
    while rig_proc.poll() is None:
        recorder = [p for p in children(rig_proc.pid) if p != named["controller"]]
        pids = dict(named, **{"recorder": recorder[0]} if recorder else {})
        closed = any(out.glob("*/summary.json"))
        for name, pid in pids.items():
            mb = rss_mb(pid)
            if mb is not None and rig_proc.poll() is None:
                (closing if closed else samples).setdefault(name, []).append(mb)
        until = time.monotonic() + (0.2 if closed else args.every)
        while time.monotonic() < until and (closed or not any(out.glob("*/summary.json"))):
            time.sleep(0.2)   # a close that begins is sampled from its start
    rest = rig_proc.stdout.read()
    folder = Path(next(x for x in rest.splitlines() if x.startswith("folder ")).split(" ", 1)[1])
    summary = json.loads((folder / "summary.json").read_text())
    t = summary["timing"]
    print(f"## Soak: {seconds:g} s at {args.rate:g} Hz, serial reference controller over a "
          "pty\n")
    print(f"outcome {summary['ended']} (exit {summary['exit_code']}); ticks planned "
          f"{summary['ticks_planned']}, run {summary['ticks_run']}, recorded "
          f"{summary['ticks_recorded']}; late ticks {t['overruns']}, skipped slots "
          f"{t['skipped_slots']}; lateness p50 {t['lateness_p50_s'] * 1e6:.0f} us, p99 "
          f"{t['lateness_p99_s'] * 1e6:.0f} us, max {t['lateness_max_s'] * 1e6:.0f} us; "
          f"scheduler {t['scheduler']}, core {t.get('cpu')}\n")
    print("| process | RSS first sample (MB) | at 1/4 | 1/2 | 3/4 | last in the run | samples "
          "| peak while closing |")
    print("|---|---|---|---|---|---|---|---|")
    for name, mbs in samples.items():
        quarters = " | ".join(f"{mbs[len(mbs) * q // 4]:.1f}" for q in (1, 2, 3))
        close = f"{max(closing[name]):.1f}" if closing.get(name) else "not sampled"
        print(f"| {name} | {mbs[0]:.1f} | {quarters} | {mbs[-1]:.1f} | {len(mbs)} | {close} |")


if __name__ == "__main__":
    main()
