"""Every run tells the truth: the outcome, exit code, console line, events, summary and
run.h5 agree, whatever stops the run.

Real processes and real signals: `plantrig run` in its own process group, SIGTERM to the
rig and SIGINT to the whole group (what Ctrl-C does); a pseudo-terminal nobody answers;
the recorder process killed mid-run; a real tmpfs filled mid-run (these tests run as
root, like tests/test_records_crash.py, whose helpers they share).
"""

from __future__ import annotations

import dataclasses
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from rig_text import rig_text
from test_records_crash import realtime_rig, same_as_fast_run, tmpfs

from plantrig.sim import load_rig, run_to_folder
from plantrig.sim.records._manifest import verify_folder
from plantrig.sim.records._reader import read_run
from plantrig.sim.records._tape import HEADER_WORDS, W_WRITTEN

REPO = Path(__file__).resolve().parents[1]
HIL = REPO / "configs" / "conveyor_hil.toml"
RECORDER_NOTICE_TICKS = 100           # 100 ms at the conveyor's 1 ms tick


def start_run(rig_path: Path, runs: Path, *extra: str) -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, "-m", "plantrig", "run", str(rig_path),
                             "--out", str(runs), *extra], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, start_new_session=True)


def wait_recording(proc: subprocess.Popen[str], runs: Path) -> Path:
    """The run folder, once its journal holds rows."""
    deadline = time.monotonic() + 60
    while True:
        assert proc.poll() is None, "the run ended before the test could act"
        assert time.monotonic() < deadline, "the run never started recording"
        journal = next(runs.glob("*/ticks.journal"), None) if runs.exists() else None
        if journal is not None and journal.stat().st_size > 0:
            return journal.parent
        time.sleep(0.01)


def finished(proc: subprocess.Popen[str]) -> tuple[int, str, str]:
    try:
        out, err = proc.communicate(timeout=120)
    except BaseException:
        os.killpg(proc.pid, signal.SIGKILL)
        raise
    return proc.returncode, out, err


def fill_up(disk: Path, name: str) -> None:
    """Take all the free space of ``disk`` but 64 KiB, as another writer would."""
    st = os.statvfs(disk)
    with open(disk / name, "wb") as f:
        f.write(bytes(max(0, st.f_bavail * st.f_frsize - 64 * 1024)))


def check_agrees(folder: Path, ended: str, reason: str) -> dict:
    """summary.json, events.jsonl, run.h5 and the manifest all say the same."""
    summary = json.loads((folder / "summary.json").read_text())
    assert (summary["ended"], summary["reason"]) == (ended, reason)
    record = read_run(folder)
    assert record.source == "run.h5"
    assert record.events[-1]["kind"] == "run_end"
    assert record.events[-1]["detail"] == f"{ended}: {reason}"
    jsonl = [json.loads(line) for line in (folder / "events.jsonl").read_text().splitlines()]
    assert [e["kind"] for e in jsonl] == [e["kind"] for e in record.events]
    assert summary["ticks_recorded"] == summary["ticks_run"] == len(record.rows)
    assert verify_folder(folder).ok
    assert not (folder / "ticks.journal").exists()
    return summary


@pytest.mark.parametrize("how", ["sigterm", "ctrl_c"])
def test_a_signal_stops_the_run_and_finishes_its_record(tmp_path: Path, how: str) -> None:
    rig_path = realtime_rig(tmp_path, duration=30.0)
    runs = tmp_path / "runs"
    proc = start_run(rig_path, runs)
    folder = wait_recording(proc, runs)
    time.sleep(1.0)
    if how == "sigterm":
        os.kill(proc.pid, signal.SIGTERM)             # the rig alone, as `kill` does
        name = "SIGTERM"
    else:
        os.killpg(proc.pid, signal.SIGINT)            # the whole group, as Ctrl-C does
        time.sleep(0.05)
        os.killpg(proc.pid, signal.SIGINT)            # an impatient second Ctrl-C
        name = "SIGINT"
    code, out, err = finished(proc)
    assert "Traceback" not in err and "Traceback" not in out
    assert code == 5, (out, err)
    assert f"outcome: STOPPED (signal {name})" in out
    assert "exit code 5: stopped" in out
    summary = check_agrees(folder, "stopped", f"signal {name}")
    assert 0 < summary["ticks_run"] < summary["ticks_planned"]
    assert summary["exit_code"] == 5
    assert summary["recorder"]["disk_error"] is None and not summary["recorder"]["orphaned"]
    same_as_fast_run(read_run(folder).rows, read_run(folder).columns, rig_path)
    # nothing is left for recover: the record is whole
    again = subprocess.run([sys.executable, "-m", "plantrig", "recover", str(folder)],
                           capture_output=True, text=True, timeout=60)
    assert again.returncode == 2 and "nothing to recover" in again.stderr


def test_a_controller_that_never_answers_is_a_fault(tmp_path: Path) -> None:
    rig_path = tmp_path / "hil.toml"
    rig_path.write_text(rig_text(HIL).replace("duration = 3.0", "duration = 1.0"))
    assert load_rig(rig_path).duration == 1.0
    master, slave = os.openpty()                      # nobody on the other end answers
    try:
        runs = tmp_path / "runs"
        proc = start_run(rig_path, runs, "--port", os.ttyname(slave))
        code, out, err = finished(proc)
    finally:
        os.close(master)
        os.close(slave)
    assert "Traceback" not in err
    assert code == 1, (out, err)
    assert "outcome: FAULT (acceptance rule 'link kept' not met: lost 1 time(s)" in out
    assert "FAILED  controller answered: 0 % of ticks had a fresh command" in out
    folder = next(p for p in runs.iterdir() if p.is_dir())
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["exit_code"] == 1 and summary["ticks_run"] == summary["ticks_planned"]
    rules = {r["rule"]: r["passed"] for r in summary["acceptance"]}
    assert rules == {"ran to the end": True, "link kept": False,
                     "controller answered": False, "commands usable": True,
                     "real time held": rules["real time held"], "no unexpected trip": True}
    kinds = [e["kind"] for e in read_run(folder).events]
    assert kinds.count("rule_failed") >= 2 and kinds[-1] == "run_end"


@pytest.mark.parametrize("realtime", [True, False], ids=["realtime", "fast"])
def test_a_dead_recorder_is_noticed_and_the_rig_keeps_every_tick(
        tmp_path: Path, realtime: bool) -> None:
    rig = load_rig(realtime_rig(tmp_path, duration=4.0 if realtime else 200.0))
    folder = tmp_path / "run"
    folder.mkdir()
    at_kill: dict[str, int] = {}

    def kill_recorder(tape_path: Path, _events: Path) -> None:
        def later() -> None:
            header = np.memmap(tape_path, dtype=np.int64, mode="r", shape=(HEADER_WORDS,))
            while header[W_WRITTEN] < 1000:      # a second into the run
                time.sleep(0.001)
            pid = json.loads((folder / "run_start.json").read_text())["recorder_process"]
            at_kill["written"] = int(header[W_WRITTEN])
            os.kill(pid["pid"], signal.SIGKILL)
        threading.Thread(target=later, daemon=True).start()

    _, outcome, summary = run_to_folder(rig, tmp_path, realtime=realtime, folder=folder,
                                        on_tapes_ready=kill_recorder)
    reason = "run record: the recorder process died"
    assert (outcome.ended, outcome.reason) == ("fault", reason)
    died = next(e for e in outcome.events if e.kind == "recorder_died")
    if realtime:   # noticed within 100 ms of plant time (the loop is paced: wall time too)
        assert died.tick - at_kill["written"] <= RECORDER_NOTICE_TICKS
    assert outcome.ticks < rig.n_ticks
    check_agrees(folder, "fault", reason)
    record = read_run(folder)
    assert "recorder_died" in [e["kind"] for e in record.events]
    same_as_fast_run(record.rows, record.columns, rig.path)


def test_a_disk_filling_mid_run_is_a_fault_that_recover_keeps(tmp_path: Path) -> None:
    rig_path = realtime_rig(tmp_path, duration=20.0)
    with tmpfs(tmp_path / "disk", "12m") as disk:
        runs = disk / "runs"
        proc = start_run(rig_path, runs)
        folder = wait_recording(proc, runs)
        time.sleep(0.5)
        fill_up(disk, "filler")                        # another writer fills the disk
        code, out, err = finished(proc)
        assert code == 1, (out, err)                   # never a crash (negative) or 0
        assert "Traceback" not in err and "Traceback" not in out
        assert "outcome: FAULT (run record cannot be written (disk full))" in out
        summary = json.loads((folder / "summary.json").read_text())
        assert summary["ended"] == "fault" and summary["exit_code"] == 1
        print(out)
        fill_up(disk, "filler2")   # whatever the finish freed: full again for recover
        # with the disk still full, recover explains itself and changes nothing
        stuck = subprocess.run([sys.executable, "-m", "plantrig", "recover", str(folder)],
                               capture_output=True, text=True, timeout=60)
        assert stuck.returncode > 0 and "Traceback" not in stuck.stderr, stuck
        assert json.loads((folder / "summary.json").read_text())["ended"] == "fault"
        (disk / "filler").unlink()                     # space freed: recover finishes it
        (disk / "filler2").unlink()
        fixed = subprocess.run([sys.executable, "-m", "plantrig", "recover", str(folder)],
                               capture_output=True, text=True, timeout=60)
        assert fixed.returncode == 0, fixed
        after = json.loads((folder / "summary.json").read_text())
        assert (after["ended"], after["reason"]) == (summary["ended"], summary["reason"])
        assert verify_folder(folder).ok
        record = read_run(folder)
        assert record.source == "run.h5" and len(record.rows) == after["ticks_recorded"]
        same_as_fast_run(record.rows, record.columns, rig_path)


def test_link_loss_with_a_trip_is_not_completed(tmp_path: Path) -> None:
    """The acceptance rules on a fast run: a rehearsed link fault the scenario expects
    is allowed; the same rig without the scenario's expectation fails its trip rule."""
    from plantrig.sim import load_scenario, simulate
    rehearsals = REPO / "configs" / "rehearsals"
    rig = load_rig(rehearsals / "conveyor_guarded.toml")
    scenario = load_scenario(rehearsals / "link_lost.toml", rig)
    expected = simulate(rig, scenario=scenario)
    assert expected.outcome.ended == "completed", expected.outcome.reason
    unexpected = dataclasses.replace(scenario, verdicts=())  # nothing expects the trip now
    data = simulate(rig, scenario=unexpected)
    assert data.outcome.ended == "tripped"
    assert data.outcome.reason.startswith("acceptance rule 'no unexpected trip' not met: "
                                          "link_watchdog at tick")


def test_acceptance_table_mistakes_are_rig_file_mistakes(tmp_path: Path) -> None:
    rig_path = tmp_path / "conveyor.toml"
    rig_path.write_text(rig_text(REPO / "configs" / "conveyor.toml") + """
[acceptance]
min_answerd = 0.95
max_late = 1.5
allowed_trips = ["overspeed"]
allow_link_loss = "yes"
""")
    checked = subprocess.run([sys.executable, "-m", "plantrig", "check", str(rig_path)],
                             capture_output=True, text=True, timeout=60)
    assert checked.returncode == 2 and "Traceback" not in checked.stderr
    for needle in ("acceptance.min_answerd: unknown key; did you mean 'min_answered'?",
                   "acceptance.max_late: expected a share from 0 to 1, found 1.5",
                   "acceptance.allowed_trips[0]: expected the name of an interlock (estop), "
                   "found 'overspeed'",
                   "acceptance.allow_link_loss: expected true or false, found"):
        assert needle in checked.stderr, (needle, checked.stderr)
    assert "4 mistakes; nothing was run" in checked.stderr


def test_a_signal_stops_a_run_with_the_dashboard_open(tmp_path: Path, xvfb: str) -> None:
    rig_path = realtime_rig(tmp_path, duration=30.0)
    runs = tmp_path / "runs"
    proc = start_run(rig_path, runs, "--gui")
    folder = wait_recording(proc, runs)
    time.sleep(1.0)
    os.kill(proc.pid, signal.SIGTERM)
    code, out, err = finished(proc)        # ends without waiting for the window
    assert "Traceback" not in err and "SystemExit" not in err, err
    assert code == 5 and "outcome: STOPPED (signal SIGTERM)" in out, (out, err)
    check_agrees(folder, "stopped", "signal SIGTERM")


def exiting_tank(tmp_path: Path, exit_line: str, where: str) -> Path:
    """The shipped tank rig with a model module that calls exit() ``where``: at import
    (module level) or inside its dynamics once the level passes 0.35 m."""
    source = (REPO / "configs" / "tank_model.py").read_text()
    if where == "import":
        source += f"\n{exit_line}\n"
    else:
        source = source.replace("def dynamics(t, x, u, p):\n",
                                f"def dynamics(t, x, u, p):\n    if x[0] > 0.35:\n"
                                f"        {exit_line}\n", 1)
        assert exit_line in source
    (tmp_path / "tank_model.py").write_text(source)
    rig = tmp_path / "tank.toml"
    rig.write_text((REPO / "configs" / "tank.toml").read_text())
    return rig


@pytest.mark.parametrize("exit_line", ["import sys; sys.exit(0)", "raise SystemExit(3)"])
def test_a_model_calling_exit_is_a_fault_never_success(tmp_path: Path, exit_line: str) -> None:
    # exit code 0 (or 3, "a verdict failed") from the user's module must not become the
    # run's: the run is a fault, its record finished
    rig = exiting_tank(tmp_path, exit_line, "dynamics")
    code, out, err = finished(start_run(rig, tmp_path / "runs", "--fast"))
    assert code == 1, (out, err)
    assert "outcome: FAULT (SystemExit" in out and "Traceback" not in err
    (summary_file,) = (tmp_path / "runs").glob("*/summary.json")
    folder = summary_file.parent
    summary = json.loads(summary_file.read_text())
    assert summary["ended"] == "fault" and summary["exit_code"] == 1
    assert 0 < summary["ticks_run"] < summary["ticks_planned"]
    assert verify_folder(folder).ok


@pytest.mark.parametrize("exit_line", ["import sys; sys.exit(0)", "raise SystemExit(3)"])
def test_a_model_calling_exit_at_import_is_a_rig_file_mistake(tmp_path: Path,
                                                             exit_line: str) -> None:
    rig = exiting_tank(tmp_path, exit_line, "import")
    for command in (["check", str(rig)], ["run", str(rig), "--out", str(tmp_path / "runs")]):
        done = subprocess.run([sys.executable, "-m", "plantrig", *command],
                              capture_output=True, text=True, timeout=120)
        assert done.returncode == 2, (command, done.stdout, done.stderr)
        assert "plant.module" in done.stderr and "SystemExit" in done.stderr
        assert "Traceback" not in done.stderr
    assert not (tmp_path / "runs").exists()


def test_a_run_of_unusable_commands_is_not_completed(tmp_path: Path) -> None:
    # a controller whose commands are NaN (here: the level sensor reads NaN after 5 s)
    # is held at its last good input; the run is a fault that says so, not a success
    rig = exiting_tank(tmp_path, "pass", "dynamics")
    model = tmp_path / "tank_model.py"
    model.write_text(model.read_text().replace(
        "def output(t, x, u, p):\n",
        "def output(t, x, u, p):\n    if t > 5.0:\n        return np.array([np.nan, x[1]])\n"))
    code, out, err = finished(start_run(rig, tmp_path / "runs", "--fast"))
    assert code == 1, (out, err)
    assert "outcome: FAULT (acceptance rule 'commands usable' not met:" in out
