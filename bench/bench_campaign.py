"""Campaign throughput: the same rehearsal cases run three ways, in one run of this script.

    (a) a shell loop of `plantrig run --fast` (one process, recorder and run folder per case)
    (b) the same cases one after the other in this process (run_case, as a worker runs them);
        also timed as a whole process (interpreter start, imports, expanding the campaign,
        the cases, their rows written), the fair peer of (c)'s whole command
    (c) `plantrig campaign` with --workers 2 (a local Dask cluster of two processes)

Cases: the guarded conveyor's belt-sensor rehearsal cut to 3000 ticks, its belt damping
drawn uniformly within +-20 %, --cases of them (default 200). The shell loop is slow, so
it runs only the first --shell-cases (default 20): case-ticks per second is a rate, and
the cases are alike. Also reported: the overhead of a case beyond its ticks (run_case
against the engine alone on the same prebuilt rig), and each worker's resident memory
at its first and last case.

    .venv/bin/python bench/bench_campaign.py [--cases 200] [--shell-cases 20]

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
import json, sys
from pathlib import Path
from plantrig._campaign_case import run_case
from plantrig.sim.config._campaign_file import expand, load_campaign
with open(sys.argv[2], "w") as out:
    for case in expand(load_campaign(Path(sys.argv[1]))):
        out.write(json.dumps(run_case(case)) + "\\n")
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", type=int, default=200)
    parser.add_argument("--shell-cases", type=int, default=20)
    args = parser.parse_args()

    from plantrig._campaign_case import build_case, run_case
    from plantrig.sim import simulate
    from plantrig.sim.config._campaign_file import expand, load_campaign

    work = Path(tempfile.mkdtemp(prefix="bench-campaign-"))
    path = work / "bench.toml"
    path.write_text(CAMPAIGN.format(cases=args.cases))
    cases = expand(load_campaign(path))
    ticks = 3000

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

    # (b) one process, sequentially
    t0 = time.perf_counter()
    walls = []
    for case in cases:
        row = run_case(case)
        assert row["ticks"] == ticks, row
        walls.append(row["wall_s"])
    b_wall = time.perf_counter() - t0
    b_rate = len(cases) * ticks / b_wall
    # the engine alone, on prebuilt parts, for the overhead of everything else
    engine = []
    for case in cases[:20]:
        rig, scenario, actuators, sensors = build_case(case)
        t1 = time.perf_counter()
        simulate(rig, scenario=scenario, actuator_chain=actuators, sensor_chain=sensors)
        engine.append(time.perf_counter() - t1)
    overhead_ms = (statistics.median(walls[:20]) - statistics.median(engine)) * 1e3
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", SEQUENTIAL, str(path), str(work / "b.jsonl")],
                   check=True)
    b_process_wall = time.perf_counter() - t0
    b_process_rate = len(cases) * ticks / b_process_wall

    # (c) plantrig campaign --workers 2
    t0 = time.perf_counter()
    subprocess.run([str(BIN / "plantrig"), "campaign", str(path), "--out", str(work / "c"),
                    "--workers", "2", "--quiet"], capture_output=True, check=False)
    c_wall = time.perf_counter() - t0
    (folder,) = [p for p in (work / "c").iterdir() if p.is_dir()]
    summary = json.loads((folder / "summary.json").read_text())
    session = summary["last_session"]
    rows = [json.loads(line) for line in (folder / "cases.jsonl").read_text().splitlines()]
    assert len(rows) == len(cases)
    c_rate = len(cases) * ticks / c_wall
    c_rate_running = len(cases) * ticks / session["wall_s"]
    task_ms = (session["wall_s"] * 2 / len(cases) - statistics.median(walls)) * 1e3
    per_worker: dict[str, list[float]] = {}
    for row in rows:                                   # journal order = finishing order
        per_worker.setdefault(row["worker"], []).append(row["worker_rss_mb"])

    print(f"## Campaign throughput ({len(cases)} cases x {ticks} ticks)\n")
    print("| way | cases | wall s | case-ticks/s | vs (a) | vs (b) |")
    print("|---|---|---|---|---|---|")
    print(f"| (a) shell loop of `plantrig run --fast` | {len(shell)} | {a_wall:.1f} | "
          f"{a_rate:,.0f} | 1.0x | {a_rate / b_rate:.2f}x |")
    print(f"| (b) one process, sequential | {len(cases)} | {b_wall:.1f} | {b_rate:,.0f} | "
          f"{b_rate / a_rate:.1f}x | 1.0x |")
    print(f"| (b) same, as a whole process | {len(cases)} | {b_process_wall:.1f} | "
          f"{b_process_rate:,.0f} | {b_process_rate / a_rate:.1f}x | "
          f"{b_process_rate / b_rate:.2f}x |")
    print(f"| (c) `plantrig campaign --workers 2`, whole command | {len(cases)} | {c_wall:.1f} "
          f"| {c_rate:,.0f} | {c_rate / a_rate:.1f}x | {c_rate / b_rate:.2f}x "
          f"({c_rate / b_process_rate:.2f}x the whole process) |")
    print(f"| (c) same, cases only (cluster running) | {len(cases)} | {session['wall_s']:.1f} "
          f"| {c_rate_running:,.0f} | {c_rate_running / a_rate:.1f}x | "
          f"{c_rate_running / b_rate:.2f}x |")
    print(f"\ncluster start {session['cluster_start_s']:.2f} s; "
          f"case wall median {statistics.median(walls) * 1e3:.1f} ms, engine alone "
          f"{statistics.median(engine) * 1e3:.1f} ms: overhead per case beyond its ticks "
          f"{overhead_ms:.1f} ms (rig with overrides, scenario, chains, verdicts); Dask and "
          f"journal cost per case {task_ms:.1f} ms (cases go in batches)")
    for worker, rss in per_worker.items():
        print(f"worker {worker}: {len(rss)} cases, RSS {rss[0]:.1f} MB at its first case, "
              f"{rss[-1]:.1f} MB at its last")


if __name__ == "__main__":
    main()
