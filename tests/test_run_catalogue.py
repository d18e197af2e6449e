"""`plantrig run --junit` writes the campaign's JUnit form for one rehearsal, and every
run is indexed in the runs folder's SQLite catalogue, which `plantrig runs` lists with
filters and rebuilds from the folders when it is missing, stale or damaged."""

from __future__ import annotations

import shutil
import sqlite3
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest

from plantrig._catalogue import CATALOGUE
from plantrig.cli import main

ROOT = Path(__file__).resolve().parents[1]
GUARDED = ROOT / "configs" / "rehearsals" / "conveyor_guarded.toml"
LINK_LOST = ROOT / "configs" / "rehearsals" / "link_lost.toml"
CONVEYOR = ROOT / "configs" / "conveyor.toml"


def run(out: Path, *extra: str) -> int:
    return main(["run", *extra, "--fast", "--out", str(out)])


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Three runs: a passing rehearsal, the same failing a verdict (JUnit for both), and
    the plain conveyor."""
    out = tmp_path_factory.mktemp("runs")
    assert run(out, str(GUARDED), "--scenario", str(LINK_LOST),
               "--junit", str(out.parent / "pass.xml")) == 0
    # the watchdog cannot trip within 10 ticks of the cut: that verdict fails
    failing = out.parent / "link_lost_tight.toml"
    failing.write_text(LINK_LOST.read_text().replace("max = 51.0", "max = 10.0"))
    assert run(out, str(GUARDED), "--scenario", str(failing),
               "--junit", str(out.parent / "fail.xml")) == 3
    assert run(out, str(CONVEYOR), "--duration", "0.5") == 0
    return out


def test_a_junit_file_that_cannot_be_written_stops_the_run_before_it_starts(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # found after the run, it turned a completed run into exit 1 while its summary said 0
    assert run(tmp_path / "runs", str(CONVEYOR), "--duration", "0.2",
               "--junit", str(tmp_path / "nowhere" / "x.xml")) == 2
    err = capsys.readouterr().err
    assert "error: --junit" in err and "no folder" in err and "nothing was run" in err
    assert not list((tmp_path / "runs").glob("*/summary.json"))


def test_run_junit(runs: Path) -> None:
    passed = ET.parse(runs.parent / "pass.xml").getroot()
    assert (passed.get("tests"), passed.get("failures"), passed.get("errors")) == ("1", "0", "0")
    (case,) = passed.iter("testcase")
    assert case.get("name") == "link_lost" and case.find("failure") is None
    failed = ET.parse(runs.parent / "fail.xml").getroot()
    assert (failed.get("tests"), failed.get("failures")) == ("1", "1")
    failure = failed.find(".//failure")
    assert failure is not None
    assert "1 of 5 verdicts failed: watchdog trip within timeout + 1 tick" in failure.get(
        "message", "")
    assert "FAIL" in (failure.text or "") and "10" in (failure.text or "")


def test_runs_lists_and_filters(runs: Path, capsys: pytest.CaptureFixture[str]) -> None:
    capsys.readouterr()
    assert main(["runs", "--out", str(runs)]) == 0
    text = capsys.readouterr().out
    assert "3 of 3 folders" in text
    assert sum(" link_lost " in line for line in text.splitlines()) == 2
    assert main(["runs", "--out", str(runs), "--failed"]) == 0
    text = capsys.readouterr().out
    assert "1 of 3 folders" in text and "completed  3" in text
    assert main(["runs", "--out", str(runs), "--rig", "conveyor"]) == 0
    assert "1 of 3 folders" in capsys.readouterr().out
    assert main(["runs", "--out", str(runs), "--since", "2999-01-01"]) == 0
    assert "0 of 3 folders" in capsys.readouterr().out
    assert main(["runs", "--out", str(runs), "--since", "yesterday"]) == 2
    assert "--since" in capsys.readouterr().err


def test_catalogue_rebuilds_from_folders(runs: Path, tmp_path: Path,
                                         capsys: pytest.CaptureFixture[str]) -> None:
    copy = tmp_path / "runs"
    shutil.copytree(runs, copy)
    with sqlite3.connect(copy / CATALOGUE) as con:
        assert con.execute("SELECT COUNT(*) FROM folders").fetchone()[0] == 3  # by run
    (copy / CATALOGUE).unlink()                                   # missing
    assert main(["runs", "--out", str(copy)]) == 0
    assert "3 of 3 folders" in capsys.readouterr().out
    shutil.rmtree(next(p for p in copy.iterdir() if p.name.startswith("conveyor-")))
    assert main(["runs", "--out", str(copy)]) == 0                # stale: a folder gone
    assert "2 of 2 folders" in capsys.readouterr().out
    (copy / CATALOGUE).write_bytes(b"not a database at all" * 100)  # damaged
    assert main(["runs", "--out", str(copy)]) == 0
    assert "2 of 2 folders" in capsys.readouterr().out
    with sqlite3.connect(copy / CATALOGUE) as con:
        kinds = con.execute("SELECT kind, outcome, passed, failed FROM folders "
                            "ORDER BY failed").fetchall()
    assert kinds == [("run", "completed", 5, 0), ("run", "completed", 4, 1)]
