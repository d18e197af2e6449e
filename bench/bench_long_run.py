"""Runs of any length: peak memory of every process, bytes on disk per tick, ticks per
second, for fast runs of the conveyor rig at growing lengths.

Each length runs `plantrig run --fast` inside a small launcher process that reports its
own peak RSS (the rig: loop, finish, manifest) and its children's (the recorder), read
from getrusage after the run. Memory must stay flat as the run grows; disk must grow
by a fixed number of bytes a tick.

    .venv/bin/python bench/bench_long_run.py                    # 0.2M, 2M, 20M ticks
    .venv/bin/python bench/bench_long_run.py --ticks 200000 2000000
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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--ticks", type=int, nargs="+",
                        default=[200_000, 2_000_000, 20_000_000])
    args = parser.parse_args()
    print("| ticks | rig peak RSS (MB) | recorder peak RSS (MB) | bytes on disk / tick | "
          "run.h5 compression | loop ticks/s | wall (s) |")
    print("|---|---|---|---|---|---|---|")
    for ticks in args.ticks:
        with tempfile.TemporaryDirectory() as tmp:
            r = one_run(ticks, Path(tmp))
        print(f"| {r['ticks']} | {r['rig_mb']:.0f} | {r['recorder_mb']:.0f} | "
              f"{r['bytes_per_tick']:.1f} | {r['compression']:.2f}x | "
              f"{r['loop_ticks_per_s']:.0f} | {r['wall_s']:.1f} |", flush=True)


if __name__ == "__main__":
    main()
