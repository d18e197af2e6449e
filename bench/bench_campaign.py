"""Campaign throughput: the same rehearsal cases run three ways, in one run of this script.

    (a) a shell loop of `plantrig run --fast` (one process, recorder and run folder per case)
    (b) the same cases one after the other in one process (run_case, as a worker runs
        them), timed as a whole process (interpreter start, imports, expanding the
        campaign, the cases, their rows written: the fair peer of (c)'s whole command)
        and over its cases alone
    (c) `plantrig campaign` with --workers 2 (a local Dask cluster of two processes),
        timed as a whole command and over its cases alone (cluster running)

(b) and (c) alternate --repeats times (default 3) and the medians are reported: on this
shared VM the speed of one process drifts by tens of per cent within minutes, so one
run of each says little.

Cases: the guarded conveyor's belt-sensor rehearsal cut to 3000 ticks, its belt damping
drawn uniformly within +-20 %, --cases of them (default 200). The shell loop is slow, so
it runs only the first --shell-cases (default 20): case-ticks per second is a rate, and
the cases are alike. Also reported: the overhead of a case beyond its ticks (run_case
against the engine alone on the same prebuilt rig), and each worker's resident memory
at its first, middle and last case.

    .venv/bin/python bench/bench_campaign.py [--cases 200] [--shell-cases 20] [--repeats 3]

Prints markdown for docs/performance.md.
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
BIN = Path(sys.executable).parent
REHEARSALS = ROOT / "configs" / "rehearsals"
CAMPAIGN = f"""
[campaign]
name = "bench"
seed = 1
draws = {{cases}}
keep = "nothing"

[[rigs]]
file = "{REHEARSALS / 'conveyor_guarded.toml'}"
scenarios = ["{REHEARSALS / 'belt_sensor_stuck.toml'}"]
set = ["rig.duration=3.0"]
[rigs.draw]
"plant.A[2][2]" = {{{{ dist = "uniform", spread_pct = 20 }}}}
"""


SEQUENTIAL = """
import json, sys, time
import plantrig._blas_threads
from pathlib import Path
from plantrig._campaign_case import run_case
from plantrig.sim.config._campaign_file import expand, load_campaign
cases = expand(load_campaign(Path(sys.argv[1])))
t0 = time.perf_counter()
with open(sys.argv[2], "w") as out:
    for case in cases:
        out.write(json.dumps(run_case(case)) + "\\n")
print(time.perf_counter() - t0)
"""


def whole_process_b(path: Path, out: Path) -> tuple[float, float]:
    """(b) as a whole process: (wall of the process, wall of its case loop)."""
    t0 = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", SEQUENTIAL, str(path), str(out)],
                          check=True, capture_output=True, text=True)
    return time.perf_counter() - t0, float(done.stdout.split()[-1])


def whole_command_c(path: Path, out: Path) -> tuple[float, float, Path]:
    """(c) `plantrig campaign --workers 2`: (wall of the command, wall of its cases with
    the cluster running, the campaign folder)."""
    t0 = time.perf_counter()
    subprocess.run([str(BIN / "plantrig"), "campaign", str(path), "--out", str(out),
                    "--workers", "2", "--quiet"], capture_output=True, check=False)
    wall = time.perf_counter() - t0
    (folder,) = [p for p in out.iterdir() if p.is_dir()]
    summary = json.loads((folder / "summary.json").read_text())
    return wall, summary["last_session"]["wall_s"], folder


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", type=int, default=200)
    parser.add_argument("--shell-cases", type=int, default=20)
    parser.add_argument("--repeats", type=int, default=3,
                        help="(b) and (c) as whole processes, alternated this many times")
    args = parser.parse_args()

    from plantrig._campaign_case import build_case, run_case
    from plantrig.sim import simulate
    from plantrig.sim.config._campaign_file import expand, load_campaign

    work = Path(tempfile.mkdtemp(prefix="bench-campaign-"))
    path = work / "bench.toml"
    path.write_text(CAMPAIGN.format(cases=args.cases))
    cases = expand(load_campaign(path))
    ticks = 3000
    n = len(cases)

    # (a) a shell loop of plantrig run --fast
    shell = cases[:args.shell_cases]
    t0 = time.perf_counter()
    for case in shell:
        cmd = [str(BIN / "plantrig"), "run", case.rig_file, "--fast", "--scenario",
               case.scenario_file, "--out", str(work / "runs")]
        for assignment in case.rig_set:
            cmd += ["--set", assignment]
        subprocess.run(cmd, capture_output=True, check=False)
    a_wall = time.perf_counter() - t0
    a_done = len(list((work / "runs").glob("*/summary.json")))   # runs that finished
    assert a_done == len(shell), f"only {a_done} of {len(shell)} shell runs finished"
    a_rate = a_done * ticks / a_wall

    # (b) in this process: each case's wall, and the engine alone on prebuilt parts,
    # for the overhead of everything else
    walls = []
    for case in cases[:40]:
        row = run_case(case)
        assert row["ticks"] == ticks, row
        walls.append(row["wall_s"])
    engine = []
    for case in cases[:20]:
        rig, scenario, actuators, sensors = build_case(case)
        t1 = time.perf_counter()
        simulate(rig, scenario=scenario, actuator_chain=actuators, sensor_chain=sensors)
        engine.append(time.perf_counter() - t1)
    overhead_ms = (statistics.median(walls) - statistics.median(engine)) * 1e3

    # (b) and (c) as whole processes, alternated so both see the same machine
    b_runs: list[tuple[float, float]] = []
    c_runs: list[tuple[float, float]] = []
    folder = work
    for i in range(args.repeats):
        for way in ("bc" if i % 2 == 0 else "cb"):
            if way == "b":
                b_runs.append(whole_process_b(path, work / f"b{i}.jsonl"))
            else:
                wall, cases_s, folder = whole_command_c(path, work / f"c{i}")
                c_runs.append((wall, cases_s))
    b_whole = statistics.median(w for w, _ in b_runs)
    b_cases = statistics.median(c for _, c in b_runs)
    c_whole = statistics.median(w for w, _ in c_runs)
    c_cases = statistics.median(c for _, c in c_runs)
    rows = [json.loads(line) for line in (folder / "cases.jsonl").read_text().splitlines()]
    assert len(rows) == n
    per_worker: dict[str, list[float]] = {}
    for row in rows:                                   # journal order = finishing order
        per_worker.setdefault(row["worker"], []).append(row["worker_rss_mb"])

    def rate(wall: float) -> str:
        return f"{n * ticks / wall:,.0f}"

    print(f"## Campaign throughput ({n} cases x {ticks} ticks)\n")
    print(f"(b) and (c) are medians of {args.repeats} alternated runs each.\n")
    print("| way | cases | wall s | case-ticks/s | vs (a) | vs (b) |")
    print("|---|---|---|---|---|---|")
    print(f"| (a) shell loop of `plantrig run --fast` | {len(shell)} | {a_wall:.1f} | "
          f"{a_rate:,.0f} | 1.0x | {a_rate * b_whole / (n * ticks):.2f}x |")
    print(f"| (b) one process, sequential: whole process | {n} | {b_whole:.1f} | "
          f"{rate(b_whole)} | {n * ticks / b_whole / a_rate:.1f}x | 1.0x |")
    print(f"| (b) same, its cases only | {n} | {b_cases:.1f} | {rate(b_cases)} | "
          f"{n * ticks / b_cases / a_rate:.1f}x | 1.0x (cases) |")
    print(f"| (c) `plantrig campaign --workers 2`: whole command | {n} | {c_whole:.1f} | "
          f"{rate(c_whole)} | {n * ticks / c_whole / a_rate:.1f}x | "
          f"{b_whole / c_whole:.2f}x |")
    print(f"| (c) same, its cases only (cluster running) | {n} | {c_cases:.1f} | "
          f"{rate(c_cases)} | {n * ticks / c_cases / a_rate:.1f}x | "
          f"{b_cases / c_cases:.2f}x (cases) |")
    print("\nruns (wall s, whole / cases): (b) " +
          ", ".join(f"{w:.1f}/{c:.1f}" for w, c in b_runs) + "; (c) " +
          ", ".join(f"{w:.1f}/{c:.1f}" for w, c in c_runs))
    print(f"\ncase wall median {statistics.median(walls) * 1e3:.1f} ms, engine alone "
          f"{statistics.median(engine) * 1e3:.1f} ms: overhead per case beyond its ticks "
          f"{overhead_ms:.1f} ms (rig with overrides, scenario, chains, verdicts); "
          f"per case in (c) beyond (b)'s case: "
          f"{(c_cases * 2 - b_cases) / n * 1e3:.1f} ms of worker time (Dask, journal)")
    for worker, rss in per_worker.items():
        print(f"worker {worker}: {len(rss)} cases, RSS {rss[0]:.1f} MB at its first case, "
              f"{rss[len(rss) // 2]:.1f} MB at its middle one, {rss[-1]:.1f} MB at its last")


if __name__ == "__main__":
    main()
