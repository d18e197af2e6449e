"""compare and rerun at scale: two long 1 kHz runs compared, and rerun's per-tick cost.

Makes two fast runs of the guarded conveyor (1 kHz, 22 columns: 17 signals compared)
of --seconds plant time each, the second with a changed gain; then

- ``plantrig compare`` of the pair in a child process: wall time and the child's peak
  resident memory (ru_maxrss), with and without plots;
- ``plantrig rerun`` of the first run beside ``plantrig run --fast`` of the same rig:
  the engine's ticks per second from each summary (timing.ticks_per_s; the recorder
  and folder writing are outside it) and their ratio.

Prints markdown. Usage: .venv/bin/python bench/bench_compare.py --seconds 3600
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
RIG = ROOT / "configs" / "rehearsals" / "conveyor_guarded.toml"
PLANTRIG = str(Path(sys.executable).with_name("plantrig"))


def plantrig(*args: str) -> tuple[float, int, str]:
    """(wall s, peak RSS of this child in MiB, stdout) of one plantrig command."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    start = time.perf_counter()
    proc = subprocess.run([PLANTRIG, *args], capture_output=True, text=True)
    wall = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    if proc.returncode not in (0, 1):
        sys.exit(f"plantrig {' '.join(args)} failed ({proc.returncode}):\n{proc.stderr}")
    # ru_maxrss of RUSAGE_CHILDREN is the largest child so far (KiB on Linux): run the
    # compare first so the runs' recorder processes cannot hide it
    return wall, max(peak, before) // 1024, proc.stdout


def only(folder: Path) -> Path:
    (run,) = [p for p in folder.iterdir() if p.is_dir()]
    return run


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=3600.0)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="bench-compare-", dir=ROOT) as tmp:
        work = Path(tmp)
        d = str(args.seconds)
        plantrig("run", str(RIG), "--fast", "--duration", d, "--out", str(work / "a"))
        plantrig("run", str(RIG), "--fast", "--duration", d, "--out", str(work / "b"),
                 "--set", "controller.loops[0].kp=40")
        a, b = only(work / "a"), only(work / "b")
        ticks = json.loads((a / "summary.json").read_text())["ticks_recorded"]
        columns = len(json.loads((a / "summary.json").read_text())["columns"])
        size = (a / "run.h5").stat().st_size / 2**20
        rows = []
        compare_cmd = [PLANTRIG, "compare", str(a), str(b), "--out", str(work / "c")]
        for label, extra in (("numbers only (--no-plots)", ["--no-plots"]),
                             ("with plots and HTML", [])):
            best_wall, best_rss = float("inf"), 0
            for _ in range(2):
                # a fresh parent per measurement keeps ru_maxrss to the compare alone
                out = subprocess.run(
                    [sys.executable, "-c", (
                        "import resource,subprocess,sys,time;"
                        "s=time.perf_counter();"
                        f"p=subprocess.run({compare_cmd + extra!r},"
                        "capture_output=True);"
                        "w=time.perf_counter()-s;"
                        "r=resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss;"
                        "print(w, r, p.returncode)")],
                    capture_output=True, text=True, check=True).stdout.split()
                wall, rss, code = float(out[0]), int(out[1]) // 1024, int(out[2])
                assert code == 1, code            # the gains differ: the runs must differ
                best_wall, best_rss = min(best_wall, wall), max(best_rss, rss)
            rows.append((label, best_wall, best_rss))
        rerun_tps, run_tps = [], []
        for _ in range(2):
            for cmd, store in ((["rerun", str(a)], rerun_tps), (["run", str(RIG), "--fast",
                                                                  "--duration", d], run_tps)):
                out = Path(tempfile.mkdtemp(dir=work))
                _, _, text = plantrig(*cmd, "--out", str(out))
                if not (only(out) / "summary.json").exists():
                    sys.exit(f"plantrig {' '.join(cmd)} wrote no summary:\n{text}")
                store.append(json.loads((only(out) / "summary.json").read_text())[
                    "timing"]["ticks_per_s"])
    print(f"## compare and rerun ({args.seconds:g} s at 1 kHz: {ticks} ticks, {columns} "
          f"columns, run.h5 {size:.0f} MiB each)\n")
    print("| compare | wall s (best of 2) | peak RSS MiB |")
    print("|---|---:|---:|")
    for label, wall, rss in rows:
        print(f"| {label} | {wall:.2f} | {rss} |")
    print()
    print("| engine | ticks/s (best of 2) |")
    print("|---|---:|")
    print(f"| run --fast (built-in PI) | {max(run_tps):.0f} |")
    print(f"| rerun (recorded commands) | {max(rerun_tps):.0f} |")
    print(f"\nper-tick cost ratio rerun / run --fast: {max(run_tps) / max(rerun_tps):.2f}")


if __name__ == "__main__":
    main()
