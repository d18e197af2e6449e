"""Benchmark the recording path: tape -> recorder -> journal, and what it costs the loop.

Not a test: run `.venv/bin/python bench/bench_recorder.py [--rows 400000] [--dir DIR]`
and read the markdown it prints. Every number sits beside a peer from the same run:

- recorder throughput at 40 columns: the recorder draining a full ring into a journal
  (its own loop, fdatasync every 100 ms), and live with a writer appending as fast as it
  can, against the floor of numpy ``tofile`` of the same rows to the same folder;
- the loop's lateness at 1 kHz in real time with the recorder process on (run_to_folder)
  and off (simulate into a MemoryTape), same rig, same machine, back to back.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np

from plantrig.sim import load_rig, run_to_folder, simulate
from plantrig.sim.records._recorder import drain_tape, start_recorder
from plantrig.sim.records._tape import W_WRITTEN, EventTape, Tape, tape_dir

COLUMNS = 40
REPO = Path(__file__).resolve().parents[1]


def tapes(tag: str, capacity: int) -> tuple[Tape, EventTape]:
    path = tape_dir() / f"plantrig-bench-{os.getpid()}-{tag}.tape"
    tape = Tape(path, [f"c{i}" for i in range(COLUMNS)], capacity)
    return tape, EventTape(path.with_suffix(".events"), capacity=64)


def drain_full_ring(rows: int, folder: Path) -> float:
    """Seconds for the recorder loop to drain a ring that already holds ``rows`` rows."""
    tape, events = tapes("drain", rows)
    block = np.random.default_rng(0).normal(size=(rows, COLUMNS))
    block[:, 0] = np.arange(rows)
    tape.rows[:] = block
    tape.written = rows
    tape.header[W_WRITTEN] = rows
    tape.end()
    events.end()
    journal = folder / "drain.journal"
    journal.unlink(missing_ok=True)
    try:
        t0 = time.perf_counter()
        drain_tape(str(tape.path), str(journal), str(folder / "drain.json"),
                   str(events.path), str(folder / "drain.jsonl"), os.getpid())
        elapsed = time.perf_counter() - t0
        assert journal.stat().st_size == rows * COLUMNS * 8
    finally:
        tape.close()
        events.close(unlink=True)
    return elapsed


def live(rows: int, folder: Path) -> tuple[float, float]:
    """(seconds end to end, seconds of the writer alone) for ``rows`` rows through a
    4096-row ring with the recorder in its own process, the writer waiting for room."""
    tape, events = tapes("live", 4096)
    recorder = start_recorder(tape.path, folder / "live.journal", folder / "live.json",
                              events.path, folder / "live.jsonl")
    row = np.zeros(COLUMNS)
    try:
        t0 = time.perf_counter()
        for k in range(rows):
            if tape.free() <= 0:
                tape.wait_for_room()
            row[1] = k
            tape.append(row)
        t_writer = time.perf_counter() - t0
        tape.end()
        events.end()
        recorder.join(timeout=300)
        elapsed = time.perf_counter() - t0
        assert (folder / "live.journal").stat().st_size == rows * COLUMNS * 8
    finally:
        if recorder.is_alive():
            recorder.kill()
        tape.close()
        events.close(unlink=True)
    return elapsed, t_writer


def tofile_floor(rows: int, folder: Path) -> float:
    """numpy tofile of the same rows in 4096-row blocks, one fdatasync at the end."""
    block = np.random.default_rng(0).normal(size=(rows, COLUMNS))
    t0 = time.perf_counter()
    with open(folder / "floor.raw", "wb", buffering=0) as f:
        for start in range(0, rows, 4096):
            block[start:start + 4096].tofile(f)
        os.fdatasync(f.fileno())
    return time.perf_counter() - t0


def lateness(seconds: float, rounds: int, folder: Path) -> list[str]:
    """Alternate runs with the recorder off and on, so machine noise hits both alike."""
    rig_path = folder / "conveyor_bench.toml"
    rig_path.write_text((REPO / "configs" / "conveyor.toml").read_text()
                        .replace("duration = 3.0", f"duration = {seconds}"))
    rig = load_rig(rig_path)
    lines = ["| 1 kHz real time, conveyor rig | round | p50 (us) | p99 (us) | max (us) | "
             "overruns |", "|---|---|---|---|---|---|"]
    p99: dict[str, list[float]] = {"off": [], "on": []}
    for r in range(rounds):
        off = simulate(rig, realtime=True).outcome.timing(rig.tick)
        _, outcome, _ = run_to_folder(rig, folder / "runs", realtime=True)
        on = outcome.timing(rig.tick)
        for label, key, t in (("recorder off (MemoryTape)", "off", off),
                              ("recorder on (run_to_folder)", "on", on)):
            p99[key].append(float(t["lateness_p99_s"]))
            lines.append(f"| {label} | {r + 1} | {t['lateness_p50_s'] * 1e6:.1f} | "
                         f"{t['lateness_p99_s'] * 1e6:.1f} | {t['lateness_max_s'] * 1e6:.1f} | "
                         f"{t['overruns']} |")
    on_med, off_med = float(np.median(p99["on"])), float(np.median(p99["off"]))
    lines.append(f"\nmedian p99 lateness: recorder on {on_med * 1e6:.1f} us, off "
                 f"{off_med * 1e6:.1f} us, on / off {on_med / off_med:.2f} ({rounds} rounds "
                 f"of {seconds:g} s, scheduler {on['scheduler']})")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=400_000)
    parser.add_argument("--seconds", type=float, default=3.0,
                        help="length of each real-time run")
    parser.add_argument("--rounds", type=int, default=3,
                        help="real-time runs with the recorder off and on, alternating")
    parser.add_argument("--dir", help="folder on the disk to measure (default: a temp dir)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(dir=args.dir) as tmp:
        folder = Path(tmp)
        mb = args.rows * COLUMNS * 8 / 1e6
        floor = min(tofile_floor(args.rows, folder) for _ in range(3))
        drain = min(drain_full_ring(args.rows, folder) for _ in range(3))
        end_to_end, writer = live(args.rows, folder)
        print(f"## Recorder throughput ({args.rows} rows x {COLUMNS} columns = {mb:.0f} MB, "
              f"folder {folder})\n")
        print("| path | rows/s | MB/s | / tofile floor |")
        print("|---|---|---|---|")
        for label, s in (("numpy tofile + one fdatasync (floor)", floor),
                         ("recorder loop draining a full ring", drain),
                         ("live: writer + recorder process, 4096-row ring", end_to_end),
                         ("live: writer alone (Tape.append + wait_for_room)", writer)):
            print(f"| {label} | {args.rows / s:,.0f} | {mb / s:,.0f} | {floor / s:.2f} |")
        print(f"\nA 1 kHz rig produces 1,000 rows/s; the recorder loop drains "
              f"{args.rows / drain / 1000:,.0f} times that.\n")
        print("## Loop lateness with and without the recorder\n")
        print("\n".join(lateness(args.seconds, args.rounds, folder)))


if __name__ == "__main__":
    main()
