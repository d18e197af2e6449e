"""Runs of any length: peak memory of every process, bytes on disk per tick, ticks per
second, for fast runs of the conveyor rig at growing lengths.

Each length runs `plantrig run --fast` inside a small launcher process that reports its
own peak RSS (the rig: loop, finish, manifest) and its children's (the recorder), read
from getrusage after the run. Memory must stay flat as the run grows; disk must grow
by a fixed number of bytes a tick.

    .venv/bin/python bench/bench_long_run.py                    # 0.2M, 2M, 20M ticks
    .venv/bin/python bench/bench_long_run.py --ticks 200000 2000000
    .venv/bin/python bench/bench_long_run.py --readers     # and report, compare, replay

With --readers, each run folder is then read back the ways a long run is opened, each
in its own process (peak RSS from getrusage): `plantrig report`, `plantrig export --csv
--mat`, `plantrig compare`
of the folder with itself (plots and HTML included), and replay's data path (the
dashboard's RecordStore over the whole run: a zoomed-out window and one instant; the
window itself needs a display and is not opened).
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
CONVEYOR = REPO / "configs" / "conveyor.toml"
LAUNCHER = """
import json, resource, sys
from plantrig.cli import main
code = main(sys.argv[1:])
print(json.dumps({"code": code,
                  "rig_kib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
                  "children_kib": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss}))
"""


def one_run(ticks: int, out: Path) -> dict[str, float]:
    duration = ticks * 0.001                       # the conveyor's tick is 1 ms
    start = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", LAUNCHER, "run", str(CONVEYOR), "--fast",
                           "--duration", f"{duration:g}", "--out", str(out)],
                          capture_output=True, text=True, check=False)
    wall = time.perf_counter() - start
    if proc.returncode != 0:
        sys.exit(f"run of {ticks} ticks failed ({proc.returncode}):\n{proc.stderr}")
    usage = json.loads(proc.stdout.strip().splitlines()[-1])
    folder = next(p for p in out.iterdir() if p.is_dir())
    summary = json.loads((folder / "summary.json").read_text())
    on_disk = sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())
    h5 = (folder / "run.h5").stat().st_size
    raw = summary["ticks_recorded"] * len(summary["columns"]) * 8
    return {"ticks": summary["ticks_recorded"], "rig_mb": usage["rig_kib"] / 1024,
            "recorder_mb": usage["children_kib"] / 1024,
            "bytes_per_tick": on_disk / summary["ticks_recorded"],
            "compression": raw / h5, "loop_ticks_per_s": summary["timing"]["ticks_per_s"],
            "wall_s": wall}


READER = """
import json, resource, sys
from pathlib import Path
kind, folder = sys.argv[1], Path(sys.argv[2])
if kind == "replay":
    from plantrig.gui._store import RecordStore
    from plantrig.sim import read_run
    head = read_run(folder, ticks=(0, 0))
    tick = head.summary["rig"]["tick_s"]
    store = RecordStore(folder, head.ticks_total, tick, head.columns.index("t"))
    store.window(store.t_last, store.t_last + tick)
    store.at(store.t_last / 2)
    code = 0
else:
    from plantrig.cli import main
    args = {"report": ["report", str(folder)],
            "export": ["export", str(folder), "--csv", "--mat"],
            "compare": ["compare", str(folder), str(folder), "--out",
                        str(folder.parent / "cmp")]}[kind]
    code = main(args)
print(json.dumps({"code": code,
                  "peak_kib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}))
"""


def reader_peaks(folder: Path) -> dict[str, tuple[float, float]]:
    """(peak RSS MB, wall s) of report, export, compare and replay's data path on
    ``folder``."""
    out = {}
    for kind in ("report", "export", "compare", "replay"):
        start = time.perf_counter()
        proc = subprocess.run([sys.executable, "-c", READER, kind, str(folder)],
                              capture_output=True, text=True, check=False)
        wall = time.perf_counter() - start
        if proc.returncode != 0:
            sys.exit(f"{kind} of {folder} failed ({proc.returncode}):\n{proc.stderr}")
        usage = json.loads(proc.stdout.strip().splitlines()[-1])
        out[kind] = (usage["peak_kib"] / 1024, wall)
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--ticks", type=int, nargs="+",
                        default=[200_000, 2_000_000, 20_000_000])
    parser.add_argument("--readers", action="store_true",
                        help="also read each folder back: report, export, compare, "
                             "replay's data path")
    args = parser.parse_args()
    readers = []
    print("| ticks | rig peak RSS (MB) | recorder peak RSS (MB) | bytes on disk / tick | "
          "run.h5 compression | loop ticks/s | wall (s) |")
    print("|---|---|---|---|---|---|---|")
    for ticks in args.ticks:
        with tempfile.TemporaryDirectory() as tmp:
            r = one_run(ticks, Path(tmp))
            if args.readers:
                folder = next(p for p in Path(tmp).iterdir() if p.is_dir())
                readers.append((r["ticks"], reader_peaks(folder)))
        print(f"| {r['ticks']} | {r['rig_mb']:.0f} | {r['recorder_mb']:.0f} | "
              f"{r['bytes_per_tick']:.1f} | {r['compression']:.2f}x | "
              f"{r['loop_ticks_per_s']:.0f} | {r['wall_s']:.1f} |", flush=True)
    if readers:
        print("\n| ticks | report: peak RSS MB, wall s | export CSV and MAT: MB, s | "
              "compare with itself: MB, s | replay data path: MB, s |")
        print("|---|---|---|---|---|")
        for ticks, peaks in readers:
            print(f"| {ticks} | " + " | ".join(f"{mb:.0f} MB, {s:.1f} s" for mb, s in (
                peaks["report"], peaks["export"], peaks["compare"], peaks["replay"]))
                  + " |")


if __name__ == "__main__":
    main()
