"""What load on the other core costs the real-time loop, with no dashboard at all.

Not a test: run `.venv/bin/python bench/bench_interference.py [--seconds 10]`. The loop
(demo conveyor rig, 1 kHz, real time, pinned and SCHED_FIFO where permitted) runs
while a second process, pinned to cpu 0, does one of: nothing; a pure Python busy loop
(CPU only); numpy copies of 64 MB arrays (memory bandwidth, like a software renderer
filling frame buffers); a Python loop at 50 % duty. It tells whether a dashboard's cost
to the loop is its own or what any such neighbour costs on this machine.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from plantrig.sim import Engine, MemoryTape, load_rig, tick_columns

CONVEYOR = Path(__file__).resolve().parents[1] / "configs" / "conveyor.toml"
NEIGHBOURS = {
    "none": None,
    "Python busy loop": "while True: pass",
    "numpy 64 MB copies": "import numpy as np\na = np.ones(8_000_000); b = np.empty_like(a)\n"
                          "while True: np.copyto(b, a)",
    "Python loop, 50 % duty": "import time\nwhile True:\n    t = time.perf_counter()\n"
                              "    while time.perf_counter() - t < 0.05: pass\n"
                              "    time.sleep(0.05)",
}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=10.0, help="loop run per neighbour")
    args = parser.parse_args()
    rig = replace(load_rig(CONVEYOR), duration=args.seconds, mode="realtime")
    print("| neighbour on cpu 0 | loop p50 (us) | p99 (us) | max (us) | overruns |")
    print("|---|---|---|---|---|")
    for name, code in NEIGHBOURS.items():
        pinned = "import os; os.sched_setaffinity(0, {0})\n" + (code or "")
        proc = subprocess.Popen([sys.executable, "-c", pinned]) if code else None
        time.sleep(0.5)
        try:
            tape = MemoryTape(tick_columns(rig)[0], rig.n_ticks)
            out = Engine(rig, tape).run()
        finally:
            if proc is not None:
                proc.kill()
                proc.wait()
        late = tape.rows[:, tape.columns.index("lateness")] * 1e6
        print(f"| {name} | {np.percentile(late, 50):.1f} | {np.percentile(late, 99):.1f} | "
              f"{late.max():.0f} | {out.overruns} |")


if __name__ == "__main__":
    main()
