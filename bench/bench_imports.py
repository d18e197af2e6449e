"""Start-up cost of light commands, against a bare interpreter and `import numpy`.

Each command is started as a new process several times and timed from spawn to exit
(the wall time a person waits); the table gives the median, the fastest run and the
ratios to the peers measured in the same run: `python -c pass` (the floor of any
Python command) and `python -c "import numpy"` (the floor of any command that touches
an array). Target: `plantrig --help` and `plantrig check` of an LTI rig at most 2x the
numpy peer. A last column names the heavy libraries each command loaded (from one more
run under -X importtime), so a regression shows what came back.
Run: .venv/bin/python bench/bench_imports.py [--repeats N]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
PY = sys.executable
CLI = [str(Path(PY).parent / "plantrig")] if (Path(PY).parent / "plantrig").exists() \
    else [PY, "-m", "plantrig"]
HEAVY = ("numpy", "scipy", "h5py", "matplotlib", "dask", "distributed", "pyarrow",
         "pymodbus", "aiomqtt", "paho", "serial", "tqdm", "cryptography", "dearpygui",
         "fmpy", "control")

CASES: list[tuple[str, list[str]]] = [
    ("peer: python -c pass", [PY, "-c", "pass"]),
    ("peer: python -c 'import numpy'", [PY, "-c", "import numpy"]),
    ("plantrig --help", [*CLI, "--help"]),
    ("plantrig check configs/conveyor.toml (LTI)", [*CLI, "check", "configs/conveyor.toml"]),
    ("plantrig check configs/tank.toml (ODE)", [*CLI, "check", "configs/tank.toml"]),
    ("python -c 'import plantrig.sim, plantrig.io'",
     [PY, "-c", "import plantrig.sim, plantrig.io"]),
]


def wall_times(cmd: list[str], repeats: int) -> list[float]:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        subprocess.run(cmd, cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                       check=True)
        times.append(time.perf_counter() - start)
    return times


def heavy_loaded(cmd: list[str]) -> list[str]:
    """Top-level heavy packages the command imported (python -X importtime)."""
    exe = cmd[1:] if cmd[0] == PY else cmd   # the console script is a Python file
    proc = subprocess.run([PY, "-X", "importtime", *exe], cwd=REPO, capture_output=True,
                          text=True, check=True)
    names = {line.split("|")[-1].strip() for line in proc.stderr.splitlines()
             if line.startswith("import time:")}
    return [name for name in HEAVY if name in names]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=15, help="runs per command (15)")
    args = parser.parse_args()
    # byte code as an installed package has it: where PYTHONDONTWRITEBYTECODE is set
    # (CI images often do) every start would otherwise compile every module again
    subprocess.run([PY, "-m", "compileall", "-q", "app", "sim", "io", "gui"], cwd=REPO,
                   check=True, stdout=subprocess.DEVNULL)
    for _, cmd in CASES:   # warm the page cache once
        wall_times(cmd, 1)
    # interleaved rounds, so a burst of load on the machine hits every command alike
    runs: dict[str, list[float]] = {name: [] for name, _ in CASES}
    for _ in range(args.repeats):
        for name, cmd in CASES:
            runs[name] += wall_times(cmd, 1)
    median = {name: statistics.median(t) for name, t in runs.items()}
    bare, numpy = median[CASES[0][0]], median[CASES[1][0]]
    print(f"start-up to exit, median of {args.repeats} interleaved runs ({PY})\n")
    print("| command | median s | fastest s | vs numpy | vs bare python | heavy imports |")
    print("|---|---|---|---|---|---|")
    for name, cmd in CASES:
        heavy = ", ".join(heavy_loaded(cmd)) or "none"
        print(f"| {name} | {median[name]:.3f} | {min(runs[name]):.3f} | "
              f"{median[name] / numpy:.2f}x | {median[name] / bare:.1f}x | {heavy} |")


if __name__ == "__main__":
    main()
