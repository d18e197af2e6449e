"""`plantrig campaign` on real Dask: a LocalCluster of process workers (1 and 2), and a
`dask scheduler` with two `dask worker` processes started here on 127.0.0.1, one of
them killed mid-campaign. The cases table is the same bit for bit in all three; a
campaign stopped by SIGTERM resumes with only its missing cases; a case that raises
is an error row and the campaign goes on.

Every campaign here is the same small one: 8 rehearsals of the guarded conveyor's
link-loss scenario (2 gains x 2 watchdog verdict limits x 2 draws of the belt's damping
and the fault time) and 2 short tank runs, one with an impossible tick (it raises).
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from plantrig._campaign import MAX_BATCH
from plantrig._campaign_out import NONDETERMINISTIC
from plantrig.sim.records._manifest import sha256_file

ROOT = Path(__file__).resolve().parents[1]
REHEARSALS = ROOT / "configs" / "rehearsals"
BIN = Path(sys.executable).parent
PLANTRIG, DASK = str(BIN / "plantrig"), str(BIN / "dask")
CASES = 10

CAMPAIGN = """
[campaign]
name = "dask_check"
seed = 11
draws = 2
keep = "{keep}"

[[rigs]]
file = "{rehearsals}/conveyor_guarded.toml"
scenarios = ["{rehearsals}/link_lost.toml"]
set = ["rig.duration=6.0"]
[rigs.grid]
"controller.loops[0].kp" = [50.0, 60.0]
"scenario:verdicts[0].max" = [51.0, 10.0]     # 10 ticks: the watchdog cannot trip in time
[rigs.draw]
"plant.A[2][2]" = {{ dist = "uniform", spread_pct = 20 }}
"scenario:steps[0].at" = {{ dist = "truncnormal", mean = 1.0, sd = 0.1, low = 0.8, high = 1.2 }}

[[rigs]]
file = "{rehearsals}/../tank.toml"
set = ["rig.duration=0.5"]
draws = 1
[rigs.grid]
"rig.tick" = [0.01, -1.0]
"""


def campaign_file(folder: Path, keep: str = "nothing") -> Path:
    """The test campaign; only the reference run keeps the failing cases' run folders
    (each is run again with the recorder, which is slow beside a case)."""
    path = folder / "campaign.toml"
    path.write_text(CAMPAIGN.format(keep=keep, rehearsals=REHEARSALS))
    return path


def only_folder(out: Path) -> Path:
    (folder,) = [p for p in out.iterdir() if p.is_dir()]
    return folder


def run_campaign(path: Path, out: Path, *extra: str) -> tuple[int, str, Path]:
    proc = subprocess.run([PLANTRIG, "campaign", str(path), "--out", str(out), "--quiet",
                           *extra], capture_output=True, text=True, timeout=600)
    assert "Traceback" not in proc.stderr, proc.stderr
    return proc.returncode, proc.stdout + proc.stderr, only_folder(out)


def table(folder: Path):  # type: ignore[no-untyped-def]
    return pq.read_table(folder / "cases.parquet").drop_columns(list(NONDETERMINISTIC))


def journal_rows(folder: Path) -> list[dict]:  # type: ignore[type-arg]
    path = folder / "cases.jsonl"
    if not path.exists():
        return []
    return [json.loads(line) for line in path.read_text().splitlines() if line.endswith("}")]


def check_folder(folder: Path, campaign_pid: int | None = None) -> dict:  # type: ignore[type-arg]
    """The outputs agree with each other and with the manifest; returns the summary."""
    summary = json.loads((folder / "summary.json").read_text())
    rows = journal_rows(folder)
    assert summary["complete"] and summary["cases"]["planned"] == CASES
    assert sorted(r["index"] for r in rows) == list(range(CASES))
    by_status = {s: [r for r in rows if r["status"] == s] for s in ("passed", "failed", "error")}
    (error,) = by_status["error"]
    assert "rig.tick: expected a positive number, found -1.0" in error["error"]
    assert by_status["failed"] and by_status["passed"]      # the 10-tick limit fails
    for r in by_status["failed"]:
        assert r["outcome"] != "completed" or not all(v["passed"] for v in r["verdicts"])
        kept = folder / "cases" / r["case_id"] / "summary.json"
        assert kept.is_file() == (summary["campaign"]["keep"] == "failing")
        if kept.is_file():     # the kept run is the case, run again with the recorder
            run = json.loads(kept.read_text())
            assert (run["ended"], run["exit_code"]) == (r["outcome"], r["exit_code"])
            assert [v["passed"] for v in run["verdicts"]] == [v["passed"] for v in r["verdicts"]]
    assert summary["exit_code"] == 1          # an error row: the campaign cannot vouch
    t = pq.read_table(folder / "cases.parquet")
    assert t.num_rows == CASES and t.column("index").to_pylist() == list(range(CASES))
    csv_lines = (folder / "cases.csv").read_text().splitlines()
    assert len(csv_lines) == CASES + 1 and csv_lines[0].split(",")[:2] == ["index", "case_id"]
    suites = ET.parse(folder / "junit.xml").getroot()
    assert suites.get("tests") == str(CASES) and suites.get("errors") == "1"
    assert suites.get("failures") == str(len(by_status["failed"]))
    failures = suites.findall(".//failure")
    assert all("verdict" in f.get("message", "") or "ended" in f.get("message", "")
               for f in failures)
    manifest = json.loads((folder / "campaign_manifest.json").read_text())["files"]
    for name in ("cases.parquet", "cases.csv", "summary.json", "junit.xml", "report.html",
                 "plan.json", "cases.jsonl"):
        assert manifest[name]["sha256"] == sha256_file(folder / name)
    assert all(manifest[rel]["sha256"] == sha256_file(folder / rel) for rel in manifest)
    if campaign_pid is not None:      # cases ran in worker processes, not the campaign's
        assert all(int(r["worker"].rsplit(":", 1)[1]) != campaign_pid for r in rows)
    return summary


@pytest.fixture(scope="module")
def one_worker(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The reference: the campaign on a local cluster of one worker process."""
    base = tmp_path_factory.mktemp("one")
    code, text, folder = run_campaign(campaign_file(base, keep="failing"), base / "runs",
                                      "--workers", "1")
    assert code == 1, text
    check_folder(folder)
    return folder


@pytest.mark.timeout(600)
def test_two_local_workers_equal_one(one_worker: Path, tmp_path: Path) -> None:
    proc = subprocess.Popen([PLANTRIG, "campaign", str(campaign_file(tmp_path)), "--out",
                             str(tmp_path / "runs"), "--workers", "2"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    out, err = proc.communicate(timeout=600)
    assert proc.returncode == 1, out + err
    assert "Traceback" not in err
    folder = only_folder(tmp_path / "runs")
    summary = check_folder(folder, campaign_pid=proc.pid)
    assert "local Dask cluster, 2 worker process(es)" in summary["last_session"]["where"]
    assert "case/s" in err                     # the progress bar (tqdm) on stderr
    assert table(folder).equals(table(one_worker), check_metadata=True)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@contextlib.contextmanager
def dask_cluster(workers: int) -> Iterator[tuple[str, list[subprocess.Popen[bytes]]]]:
    """A `dask scheduler` and ``workers`` `dask worker` processes (no nanny: killing
    one kills its worker) on 127.0.0.1; all reaped afterwards."""
    from dask.distributed import Client

    address = f"tcp://127.0.0.1:{free_port()}"
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    procs = [subprocess.Popen([DASK, "scheduler", "--host", "127.0.0.1", "--port",
                               address.rsplit(":", 1)[1], "--no-dashboard"],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)]
    try:
        for i in range(workers):
            procs.append(subprocess.Popen(
                [DASK, "worker", address, "--nthreads", "1", "--no-nanny", "--no-dashboard",
                 "--name", f"w{i}"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                env=env))
        deadline = time.monotonic() + 120
        while True:
            try:
                with Client(address, timeout="5s") as client:
                    client.wait_for_workers(workers, timeout=120)
                break
            except OSError:
                assert time.monotonic() < deadline, "the dask scheduler did not start"
                time.sleep(0.5)
        yield address, procs[1:]
    finally:
        for proc in reversed(procs):
            with contextlib.suppress(ProcessLookupError):
                proc.kill()
            proc.wait(timeout=30)


@pytest.mark.timeout(600)
def test_scheduler_with_a_worker_killed_mid_campaign(one_worker: Path, tmp_path: Path) -> None:
    out = tmp_path / "runs"
    with dask_cluster(2) as (address, workers):
        proc = subprocess.Popen([PLANTRIG, "campaign", str(campaign_file(tmp_path)), "--out",
                                 str(out), "--cluster", address, "--quiet"],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        deadline = time.monotonic() + 300
        while not (out.is_dir() and any(out.iterdir()) and journal_rows(only_folder(out))):
            assert proc.poll() is None and time.monotonic() < deadline, proc.communicate()
            time.sleep(0.02)
        done_before_kill = len(journal_rows(only_folder(out)))
        workers[0].kill()                     # mid-campaign: its case goes to the other
        workers[0].wait()
        out_text, err = proc.communicate(timeout=600)
    assert proc.returncode == 1, out_text + err
    assert "Traceback" not in err
    folder = only_folder(out)
    summary = check_folder(folder, campaign_pid=proc.pid)
    assert done_before_kill < CASES
    assert summary["last_session"]["cases_lost"] == []
    assert f"Dask scheduler {address}" in summary["last_session"]["where"]
    after = journal_rows(folder)[done_before_kill:]
    killed = [r for r in after if r["worker"].endswith(f":{workers[0].pid}")]
    # cases go in batches: a batch the killed worker finished just before the kill may be
    # journaled after the count; everything it had not finished ran on the other worker
    assert len(killed) <= MAX_BATCH and not after[-1]["worker"].endswith(f":{workers[0].pid}")
    assert len({r["worker"] for r in after if r not in killed}) == 1
    assert table(folder).equals(table(one_worker), check_metadata=True)


@pytest.mark.timeout(600)
def test_resume_after_sigterm(one_worker: Path, tmp_path: Path) -> None:
    path, out = campaign_file(tmp_path), tmp_path / "runs"
    proc = subprocess.Popen([PLANTRIG, "campaign", str(path), "--out", str(out), "--workers",
                             "1", "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    deadline = time.monotonic() + 300
    while not (out.is_dir() and any(out.iterdir()) and len(journal_rows(only_folder(out))) >= 2):
        assert proc.poll() is None and time.monotonic() < deadline, proc.communicate()
        time.sleep(0.02)
    proc.send_signal(signal.SIGTERM)
    text, err = proc.communicate(timeout=120)
    assert proc.returncode == 5, text + err
    assert "Traceback" not in err and "--resume" in text
    folder = only_folder(out)
    stopped = json.loads((folder / "summary.json").read_text())
    assert not stopped["complete"] and stopped["exit_code"] == 5
    assert 2 <= stopped["cases"]["done"] < CASES
    before = (folder / "cases.jsonl").read_text()

    code, text, again = run_campaign(path, out, "--workers", "1", "--resume")
    assert code == 1, text
    assert again == folder
    assert (folder / "cases.jsonl").read_text().startswith(before)   # kept, not rerun
    summary = check_folder(folder)
    assert summary["last_session"]["cases_run"] == CASES - stopped["cases"]["done"]
    assert table(folder).equals(table(one_worker), check_metadata=True)
    # nothing missing: a second resume runs nothing and says the same
    code, text, _ = run_campaign(path, out, "--workers", "1", "--resume")
    assert code == 1 and "this session" not in text
    assert table(folder).equals(table(one_worker), check_metadata=True)


def test_resume_refuses_a_changed_campaign(one_worker: Path, tmp_path: Path) -> None:
    path = tmp_path / "campaign.toml"
    path.write_text(CAMPAIGN.format(keep="failing", rehearsals=REHEARSALS)
                    .replace("seed = 11", "seed = 12"))
    proc = subprocess.run([PLANTRIG, "campaign", str(path), "--out", str(one_worker.parent),
                           "--resume", str(one_worker)], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 2
    assert "the campaign file changed since this campaign started" in proc.stderr


def test_verify_checks_a_campaign_folder_against_its_manifest(one_worker: Path,
                                                             tmp_path: Path) -> None:
    folder = tmp_path / "copy"
    shutil.copytree(one_worker, folder)

    def verify() -> subprocess.CompletedProcess[str]:
        return subprocess.run([sys.executable, "-m", "plantrig", "verify", str(folder)],
                              capture_output=True, text=True, timeout=60)

    intact = verify()
    assert intact.returncode == 0, intact.stderr
    assert "every file of the campaign matches campaign_manifest.json" in intact.stdout
    kept = next(folder.glob("cases/*/summary.json")).relative_to(folder).as_posix()
    with open(folder / kept, "a") as f:       # a kept run folder is covered too
        f.write(" ")
    (folder / "cases.csv").unlink()
    (folder / "notes.txt").write_text("added later")
    tampered = verify()
    assert tampered.returncode == 1 and f"{folder}: FAILED" in tampered.stderr
    assert {f"changed: {kept}", "missing: cases.csv", "extra: notes.txt"} <= set(
        tampered.stdout.splitlines())
