"""compare, rerun and runs do not take a changed record's word for it.

A run folder whose files no longer match its manifest (summary.json rewritten to claim a
pass, a column of run.h5 edited with h5py) fails `plantrig verify`. rerun refuses it
(exit 1, as report and export), compare refuses it unless --draft (then it is marked),
and the runs catalogue shows it as failing verify instead of trusting its summary. A
rerun of a scenario run prints the verdict table as plantrig run does.
"""

from __future__ import annotations

import json
import shutil
import sqlite3
from pathlib import Path

import h5py
import pytest

from plantrig._catalogue import CATALOGUE
from plantrig.cli import main

ROOT = Path(__file__).resolve().parents[1]
CONVEYOR = ROOT / "configs" / "conveyor.toml"
GUARDED = ROOT / "configs" / "rehearsals" / "conveyor_guarded.toml"
STUCK = ROOT / "configs" / "rehearsals" / "belt_sensor_stuck.toml"
SLOW_BELT = "plant.A[2][2]=-30"     # a belt that never reaches its speed: verdicts fail


def run(out: Path, *args: str, code: int) -> Path:
    """One fast run into its own folder under ``out``; its exit code checked."""
    before = set(out.iterdir()) if out.exists() else set()
    assert main(["run", *args, "--fast", "--out", str(out)]) == code
    (folder,) = set(out.iterdir()) - before - {out / CATALOGUE}
    return folder


@pytest.fixture(scope="module")
def made(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A passing conveyor run and a rehearsal whose verdicts fail (exit 3)."""
    out = tmp_path_factory.mktemp("made")
    return {"good": run(out, str(CONVEYOR), "--duration", "0.5", code=0),
            "failed": run(out, str(GUARDED), "--scenario", str(STUCK), "--set", SLOW_BELT,
                          code=3),
            "scenario": run(out, str(GUARDED), "--scenario", str(STUCK), code=0)}


def copy(folder: Path, where: Path) -> Path:
    return Path(shutil.copytree(folder, where / folder.name))


def claim_a_pass(folder: Path) -> None:
    """Rewrite summary.json to say the run passed, leaving manifest.json as it was."""
    path = folder / "summary.json"
    summary = json.loads(path.read_text())
    summary.update(ended="completed", exit_code=0, reason="duration reached")
    for verdict in summary.get("verdicts") or []:
        verdict["passed"] = True
    path.write_text(json.dumps(summary, indent=2))


def halve(folder: Path, dataset: str) -> None:
    """Edit one column of run.h5 in place (h5py), as someone hiding a value would."""
    with h5py.File(folder / "run.h5", "r+") as f:
        column = f[f"ticks/{dataset}"]
        column[...] = 0.5 * column[()]


def test_runs_shows_a_rewritten_summary_as_failing_verify(
        made: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """The listing must not show a failed run as passed because its summary says so."""
    runs = tmp_path / "runs"
    runs.mkdir()
    good, failed = copy(made["good"], runs), copy(made["failed"], runs)
    capsys.readouterr()
    assert main(["runs", "--out", str(runs)]) == 0
    before = capsys.readouterr().out
    assert "verify" in before.splitlines()[0]
    claim_a_pass(failed)
    assert main(["runs", "--out", str(runs)]) == 0          # re-checked: summary changed
    rows = {line.split()[-1]: line.split() for line in capsys.readouterr().out.splitlines()}
    assert rows[good.name][6:8] == ["0", "ok"]
    assert rows[failed.name][6:8] == ["0", "FAILS"]            # exit as claimed, not trusted
    assert main(["runs", "--out", str(runs), "--failed"]) == 0
    listed = capsys.readouterr().out
    assert failed.name in listed and good.name not in listed
    with sqlite3.connect(runs / CATALOGUE) as con:
        assert dict(con.execute("SELECT folder, verify FROM folders")) == {
            good.name: "ok", failed.name: "FAILS"}


def test_runs_notices_an_edited_record_after_indexing(
        made: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """An edit of run.h5 alone (summary untouched) still changes the listing."""
    runs = tmp_path / "runs"
    runs.mkdir()
    folder = copy(made["good"], runs)
    assert main(["runs", "--out", str(runs)]) == 0
    assert " ok " in capsys.readouterr().out
    halve(folder, "link/cmd/voltage")
    assert main(["runs", "--out", str(runs)]) == 0
    assert " FAILS " in capsys.readouterr().out


def claimed_pass(made: dict[str, Path], tmp_path: Path,
                 capsys: pytest.CaptureFixture[str]) -> tuple[Path, Path]:
    """A copy of the failed run whose summary claims a pass, and a comparisons folder
    (the console captured so far dropped)."""
    tampered = copy(made["failed"], tmp_path / "b")
    claim_a_pass(tampered)
    capsys.readouterr()
    return tampered, tmp_path / "comparisons"


def test_compare_refuses_a_folder_that_fails_verify(
        made: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A rewritten summary (B) or an edited state column (A) stops the comparison."""
    tampered, out = claimed_pass(made, tmp_path, capsys)
    assert main(["compare", str(made["failed"]), str(tampered), "--out", str(out),
                 "--no-plots"]) == 1
    err = capsys.readouterr().err
    assert "B: fails verification: 1 changed (summary.json)" in err
    assert "nothing was compared" in err and not out.exists()

    edited = copy(made["good"], tmp_path / "a")
    halve(edited, "states/belt_speed")
    assert main(["compare", str(edited), str(made["good"]), "--out", str(out),
                 "--no-plots"]) == 1
    assert "A: fails verification: 1 changed (run.h5)" in capsys.readouterr().err
    assert not out.exists()


def test_compare_draft_says_which_folder_fails_verify(
        made: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """--draft compares anyway, but the console, comparison.json and index.html say so."""
    tampered, out = claimed_pass(made, tmp_path, capsys)
    assert main(["compare", str(made["failed"]), str(tampered), "--out", str(out),
                 "--draft"]) == 1                           # the outcomes differ
    first = capsys.readouterr().out.splitlines()[0]
    assert "B: fails verification: 1 changed (summary.json)" in first
    (folder,) = out.iterdir()
    assert folder.name.startswith("DRAFT-")
    doc = json.loads((folder / "comparison.json").read_text())
    assert len(doc["fails_verification"]) == 1
    assert "fails verification" in (folder / "index.html").read_text()


def test_rerun_refuses_an_edited_record(
        made: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Edited commands would be re-run as if recorded: refused, exit 1, nothing run."""
    folder = copy(made["good"], tmp_path)
    halve(folder, "link/cmd/voltage")
    out = tmp_path / "reruns"
    capsys.readouterr()
    assert main(["rerun", str(folder), "--out", str(out)]) == 1
    text = capsys.readouterr()
    assert "fails verification: 1 changed (run.h5)" in text.err
    assert "nothing was run" in text.err and "changes: none" not in text.out
    assert not out.exists()


def test_rerun_help_lists_the_refusal_and_no_scenario_option(
        capsys: pytest.CaptureFixture[str]) -> None:
    """The exit codes in --help must be true for rerun, which has no --scenario option
    (a rerun of a scenario run judges the recorded scenario's verdicts)."""
    with pytest.raises(SystemExit):
        main(["rerun", "--help"])
    text = capsys.readouterr().out
    assert "--scenario" not in text
    assert "1 also: the folder fails plantrig verify" in text


def test_rerun_of_a_scenario_run_prints_its_verdicts(
        made: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A rerun that fails verdicts shows which, with the same table plantrig run prints."""
    capsys.readouterr()
    assert main(["rerun", str(made["scenario"]), "--set", SLOW_BELT,
                 "--out", str(tmp_path)]) == 3
    text = capsys.readouterr().out
    (folder,) = tmp_path.iterdir()
    verdicts = json.loads((folder / "summary.json").read_text())["verdicts"]
    passed = sum(v["passed"] for v in verdicts)
    assert 0 < passed < len(verdicts) == 8
    assert "scenario: belt_sensor_stuck" in text
    assert text.splitlines()[-2] == f"{passed} of 8 criteria passed"
    for v in verdicts:
        assert any(line.startswith(v["name"]) and line.endswith("pass" if v["passed"] else
                                                                "FAIL")
                   for line in text.splitlines()), v["name"]
