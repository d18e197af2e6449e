"""Run records under stress, for real: a rig killed with SIGKILL mid-run, a stalled
recorder, a disk that fills during the run, and folders that cannot take a run at all.

The file systems are real tmpfs mounts (these tests run as root in the sandbox); the
killed rig is a real ``plantrig run`` process in real time.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
from rig_text import rig_text

from plantrig.cli import main
from plantrig.sim import load_rig, run_to_folder, simulate, tick_columns
from plantrig.sim.engine import _run as run_module
from plantrig.sim.records._manifest import verify_folder
from plantrig.sim.records._reader import read_run
from plantrig.sim.records._records import recover_run, salvage_rows
from plantrig.sim.records._tape import HEADER_WORDS, STATE_ENDED, W_STATE, Tape, TapeReader

REPO = Path(__file__).resolve().parents[1]
CONVEYOR = REPO / "configs" / "conveyor.toml"
TANK = REPO / "configs" / "tank.toml"
LOSS_LIMIT_S = 0.2
TIMING = ("lateness", "exec_time")     # the only columns a real-time run may differ in


@contextlib.contextmanager
def tmpfs(path: Path, size: str, readonly: bool = False) -> Iterator[Path]:
    """A real RAM file system of ``size`` mounted at ``path`` for the test."""
    path.mkdir(parents=True, exist_ok=True)
    options = f"size={size}" + (",ro" if readonly else "")
    subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(path)], check=True,
                   capture_output=True, timeout=30)
    try:
        yield path
    finally:
        subprocess.run(["umount", "-l", str(path)], check=False, timeout=30)


def realtime_rig(tmp_path: Path, duration: float = 30.0) -> Path:
    path = tmp_path / "conveyor_rt.toml"
    path.write_text(rig_text(CONVEYOR).replace('mode = "fast"', 'mode = "realtime"')
                    .replace("duration = 3.0", f"duration = {duration}"))
    return path


def same_as_fast_run(rows: np.ndarray, columns: list[str], rig_path: Path) -> None:
    """Every recorded row equals the fast in-memory run's, bit for bit (timing aside)."""
    fast = simulate(load_rig(rig_path), realtime=False)
    keep = [i for i, c in enumerate(columns) if c not in TIMING]
    assert fast.columns == columns
    assert rows[:, keep].tobytes() == fast.rows[:len(rows), keep].tobytes()


def start_and_kill(tmp_path: Path, whole_group: bool) -> tuple[Path, Path, float]:
    """Run a real-time rig in a ``plantrig run`` process and SIGKILL it ~1.5 s into the
    run; return (run folder, rig file, seconds from the journal's first row to the kill)."""
    rig_path = realtime_rig(tmp_path)
    runs = tmp_path / "runs"
    proc = subprocess.Popen([sys.executable, "-m", "plantrig", "run", str(rig_path),
                             "--out", str(runs)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        deadline = time.monotonic() + 60
        journal = None
        while journal is None or journal.stat().st_size == 0:
            assert proc.poll() is None, "the rig ended before it was killed"
            assert time.monotonic() < deadline, "the run never started recording"
            time.sleep(0.01)
            journal = next(runs.glob("*/ticks.journal"), None) if runs.exists() else None
        first = time.monotonic()
        time.sleep(1.5)
        if whole_group:
            os.killpg(proc.pid, signal.SIGKILL)       # rig and recorder die together
        else:
            os.kill(proc.pid, signal.SIGKILL)          # the rig alone; its recorder lives
        killed = time.monotonic()
    except BaseException:
        os.killpg(proc.pid, signal.SIGKILL)           # never leave a rig running
        raise
    finally:
        proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    return journal.parent, rig_path, killed - first


def check_recovered(folder: Path, rig_path: Path) -> dict:
    summary = json.loads((folder / "summary.json").read_text())
    start = json.loads((folder / "run_start.json").read_text())
    report = summary["recovery"]
    tick = summary["rig"]["tick_s"]
    assert report["tape_found"] and report["produced_rows"] > 0
    # the loss, counted in ticks: produced (the tape's counter) minus recovered
    assert report["lost_rows"] * tick <= LOSS_LIMIT_S
    assert report["journal_only_lost_rows"] * tick <= LOSS_LIMIT_S
    for path in (start["tape"], start["event_tape"], start["tape"][:-5] + ".json"):
        assert not Path(path).exists(), f"{path} left in shared memory"
    record = read_run(folder)
    assert record.source == "run.h5" and len(record.rows) == report["recovered_rows"]
    np.testing.assert_array_equal(record["seq"], np.arange(len(record.rows)))
    same_as_fast_run(record.rows, record.columns, rig_path)
    assert record.events[-1]["kind"] == "recovered"
    assert summary["ended"] == "interrupted" and verify_folder(folder).ok
    assert not (folder / "ticks.journal").exists() and not (folder / ".reserve").exists()
    return report


def test_sigkilled_rig_is_recovered_with_its_loss_measured(tmp_path: Path) -> None:
    folder, rig_path, alive_s = start_and_kill(tmp_path, whole_group=False)
    assert main(["recover", str(folder)]) == 0
    report = check_recovered(folder, rig_path)
    # the orphaned recorder drained the tape before it exited: nothing is lost
    assert report["journal_only_lost_rows"] == 0 and report["tape_rows"] == 0
    print(f"\nrig only: produced {report['produced_rows']} ticks in {alive_s:.2f} s of "
          f"recording, lost {report['lost_ms']:.1f} ms")
    assert main(["recover", str(folder)]) == 2            # nothing left to recover
    # its report says what the dead run never had: no exit code, nothing judged; the
    # overruns are counted from the recorded lateness
    assert main(["report", str(folder)]) == 0
    text = " ".join(subprocess.run(["pdftotext", "-layout", str(folder / "derived" /
                                                               "report.pdf"), "-"],
                                   check=True, capture_output=True, text=True,
                                   timeout=120).stdout.split())
    assert "INTERRUPTED" in text and "exit code none (the rig process ended without one)" \
        in text and "exit code ?" not in text
    assert "acceptance not judged: the run did not end" in text
    # tick 0's UTC time, noted in run_start.json as the loop started, survives the kill
    start = json.loads((folder / "run_start.json").read_text())
    assert datetime.fromisoformat(start["tick0_utc"]) > datetime.fromisoformat(
        start["started_utc"])
    assert json.loads((folder / "summary.json").read_text())["tick0_utc"] == start["tick0_utc"]
    assert f"tick 0 started (UTC) {start['tick0_utc']}" in text
    assert re.search(r"overruns \d+ \(counted from the recorded lateness of each tick\)",
                     text)


def test_rig_and_recorder_killed_together_lose_at_most_200_ms(tmp_path: Path) -> None:
    folder, rig_path, alive_s = start_and_kill(tmp_path, whole_group=True)
    report = recover_run(folder)
    check_recovered(folder, rig_path)
    # the tape outlived both processes in /dev/shm and filled the journal's gap
    assert report["lost_rows"] == 0
    assert report["recovered_rows"] == report["journal_rows"] + report["tape_rows"]
    print(f"\nrig and recorder: produced {report['produced_rows']} ticks in {alive_s:.2f} s "
          f"of recording; journal alone lost {report['journal_only_lost_ms']:.1f} ms, "
          f"after the tape {report['lost_ms']:.1f} ms")


def test_stalled_recorder_overflows_the_tape_into_a_clean_stop(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(run_module, "RING_MIN_ROWS", 256)       # a ring of 256 ticks
    monkeypatch.setattr(run_module, "RING_SECONDS", 0.0)
    rig_path = realtime_rig(tmp_path, duration=5.0)
    folder = tmp_path / "run"
    folder.mkdir()

    def resume_when_ended(tape_path: Path, pid: int) -> None:
        header = np.memmap(tape_path, dtype=np.int64, mode="r", shape=(HEADER_WORDS,))
        deadline = time.monotonic() + 30
        while header[W_STATE] != STATE_ENDED and time.monotonic() < deadline:
            time.sleep(0.005)
        os.kill(pid, signal.SIGCONT)

    def stall(tape_path: Path, _events: Path) -> None:
        pid = json.loads((folder / "run_start.json").read_text())["recorder_process"]["pid"]
        os.kill(pid, signal.SIGSTOP)
        threading.Thread(target=resume_when_ended, args=(tape_path, pid), daemon=True).start()

    _, outcome, summary = run_to_folder(load_rig(rig_path), tmp_path, realtime=True,
                                        folder=folder, on_tapes_ready=stall)
    assert (outcome.ended, outcome.reason) == (
        "fault", "tape overflow: the recorder fell a full ring behind")
    assert outcome.ticks == 256 and summary["ticks_recorded"] == 256
    assert summary["recorder"]["max_backlog_rows"] >= 200      # the lag is reported
    kinds = [e["kind"] for e in read_run(folder).events]
    assert "tape_overflow" in kinds and kinds[-1] == "run_end"
    record = read_run(folder)
    same_as_fast_run(record.rows, record.columns, rig_path)


def test_rows_the_recorder_copied_but_never_wrote_stay_in_the_ring(tmp_path: Path) -> None:
    # a recorder killed after copying rows out of the ring and before writing them to
    # the journal (seen in CI: 241 rows, then the rig lapped them and lost the salvage)
    columns = ["seq", "t", "v"]
    tape = Tape(tmp_path / "ring.tape", columns, capacity=8)
    recorder = TapeReader(tmp_path / "ring.tape", acknowledge=True)
    block = np.zeros((5, 3))
    block[:, 1] = np.arange(5) * 0.25
    tape.append_rows(block)
    assert len(recorder.read_new()) == 5           # copied, and then the recorder dies
    assert tape.free() == 3                        # the rig may not reuse those slots
    journal = tmp_path / "ticks.journal"
    journal.write_bytes(b"")
    assert salvage_rows(journal, tmp_path / "ring.tape", 3)["tape_rows"] == 5
    salvaged = np.frombuffer(journal.read_bytes()).reshape(-1, 3)
    np.testing.assert_array_equal(salvaged[:, 0], np.arange(5))
    np.testing.assert_array_equal(salvaged[:, 1], block[:, 1])
    recorder.release()                             # once written, the slots are free
    assert tape.free() == 8
    recorder.close()
    tape.close()


def test_disk_filling_mid_run_stops_safely_and_keeps_the_rows(tmp_path: Path) -> None:
    rig = load_rig(TANK)                                        # 12000 ticks, 17 columns
    with tmpfs(tmp_path / "disk", "10m") as disk:
        def fill(_tape: Path, _events: Path) -> None:           # another writer fills it
            st = os.statvfs(disk)
            with open(disk / "filler", "wb") as f:
                f.write(bytes(st.f_bavail * st.f_frsize - 96 * 1024))

        folder, outcome, summary = run_to_folder(rig, disk, realtime=False,
                                                 on_tapes_ready=fill)
        assert (outcome.ended, outcome.reason) == ("fault",
                                                   "run record cannot be written (disk full)")
        assert summary["recorder"]["disk_error"] == "disk full"
        record = read_run(folder)
        kept = len(record.rows)
        assert 0 < kept < outcome.ticks < rig.n_ticks
        assert summary["ticks_recorded"] == kept
        assert summary["recorder"]["rows_not_written"] == outcome.ticks - kept
        assert "the recorder stopped writing (disk full)" in summary["record"]["lost"][0]
        assert record.rows.tobytes() == simulate(rig).rows[:kept].tobytes()
        kinds = [e["kind"] for e in record.events]
        assert "record_failed" in kinds and kinds[-1] == "run_end"
        assert verify_folder(folder).ok


def test_preflight_refuses_unwritable_or_small_folders(tmp_path: Path,
                                                       capsys: pytest.CaptureFixture) -> None:
    with tmpfs(tmp_path / "ro", "1m", readonly=True) as ro:
        assert main(["run", str(CONVEYOR), "--out", str(ro)]) == 2
        err = capsys.readouterr().err
        assert "cannot write run records here (Read-only file system)" in err
        assert "Traceback" not in err
    with tmpfs(tmp_path / "small", "2m") as small:
        assert main(["run", str(CONVEYOR), "--out", str(small)]) == 2
        err = capsys.readouterr().err
        assert "not enough free space for this run's record" in err
        columns, _ = tick_columns(load_rig(CONVEYOR))
        assert f"3000 ticks x {len(columns)} columns" in err
        assert list(small.iterdir()) == []                      # nothing was started


def test_a_full_disk_at_tick_0_leaves_the_note_out_and_runs_on(tmp_path: Path) -> None:
    """Tick 0's note in run_start.json is written as the loop starts; on a disk with no
    room left it is left out (the summary still has tick0_utc), never a failed run."""
    from plantrig.sim.records._run_info import note_tick0

    with tmpfs(tmp_path / "disk", "64k") as disk:
        start = disk / "run_start.json"
        start.write_text(json.dumps({"started_utc": "2026-12-03T10:00:00+00:00"}))
        with contextlib.suppress(OSError), open(disk / "filler", "wb") as f:
            f.write(bytes(1 << 20))                           # more than the disk holds
        before = start.read_bytes()
        note_tick0(disk, time.time_ns())
        assert start.read_bytes() == before
        assert sorted(p.name for p in disk.iterdir()) == ["filler", "run_start.json"]
