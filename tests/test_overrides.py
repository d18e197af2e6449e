"""``--set KEY=VALUE``, ``--duration`` and ``--seed``: checked like the file, recorded in
the run folder.

An override must give exactly the run an edited rig file gives (same rows), the run
folder's rig.toml must load to the effective values, and a rig without overrides keeps
its byte-identical copy. Mistakes name file, key and reason, exit 2, no traceback.
"""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
from rig_text import rig_text

from plantrig.cli import main
from plantrig.sim import (
    RigFileError,
    apply_overrides,
    build_rig,
    load_rig,
    load_rig_with_overrides,
    read_run,
    simulate,
)

ROOT = Path(__file__).resolve().parents[1]
CONVEYOR = ROOT / "configs" / "conveyor.toml"
TANK = ROOT / "configs" / "tank.toml"
PLANTRIG = str(Path(sys.executable).with_name("plantrig"))


def only_folder(out: Path) -> Path:
    (folder,) = [p for p in out.iterdir() if p.is_dir()]
    return folder


def test_override_equals_an_edited_rig_file() -> None:
    rig = load_rig_with_overrides(CONVEYOR, ["controller.loops[0].kp=30"], duration=0.4)
    doc = tomllib.loads(rig_text(CONVEYOR))
    doc["controller"]["loops"][0]["kp"] = 30.0
    doc["rig"]["duration"] = 0.4
    edited = build_rig(doc, CONVEYOR)
    assert rig.controller.loops[0].kp == 30
    assert rig.n_ticks == 400
    a, b = simulate(rig), simulate(edited)
    assert np.array_equal(a.rows, b.rows)
    plain = simulate(load_rig_with_overrides(CONVEYOR, duration=0.4))
    assert not np.array_equal(a["u:voltage"], plain["u:voltage"])   # the gain did act


def test_run_folder_records_effective_values(tmp_path: Path) -> None:
    code = main(["run", str(CONVEYOR), "--fast", "--out", str(tmp_path), "--set",
                 "controller.loops[0].kp=30", "--set", "references[0].points[1][1]=0.6",
                 "--duration", "0.3", "--seed", "5"])
    assert code == 0
    folder = only_folder(tmp_path)
    copy = load_rig(folder / "rig.toml")
    assert copy.controller.loops[0].kp == 30
    assert copy.duration == 0.3 and copy.seed == 5
    assert copy.references[0].waveform.value(0.5) == 0.6
    sources = json.loads((folder / "sources.json").read_text())
    assert sources["files"]["rig.toml"]["overrides"] == [
        "controller.loops[0].kp=30", "references[0].points[1][1]=0.6", "rig.duration=0.3",
        "rig.seed=5"]
    assert len(read_run(folder)["t"]) == 300


def test_no_override_keeps_the_copy_byte_identical(tmp_path: Path) -> None:
    rig = tmp_path / "conveyor.toml"     # a rig file of one piece (no parts)
    rig.write_text("# a comment the copy keeps\n" + rig_text(CONVEYOR))
    assert main(["run", str(rig), "--fast", "--out", str(tmp_path / "runs")]) == 0
    folder = only_folder(tmp_path / "runs")
    assert (folder / "rig.toml").read_bytes() == rig.read_bytes()
    assert "overrides" not in json.loads((folder / "sources.json").read_text())["files"][
        "rig.toml"]


def test_ode_override_points_the_copy_at_its_module(tmp_path: Path) -> None:
    assert main(["run", str(TANK), "--fast", "--out", str(tmp_path), "--duration", "1",
                 "--set", "plant.params.area=0.2"]) == 0
    folder = only_folder(tmp_path)
    copy = tomllib.loads((folder / "rig.toml").read_text())
    assert copy["plant"]["module"] == "tank_model.py"
    assert copy["plant"]["params"]["area"] == 0.2
    assert (folder / "tank_model.py").read_bytes() == (TANK.parent / "tank_model.py").read_bytes()
    assert load_rig(folder / "rig.toml").plant.params["area"] == 0.2  # type: ignore[attr-defined]


def issues_of(assignments: list[str], rig: Path = CONVEYOR) -> list[str]:
    with pytest.raises(RigFileError) as err:
        load_rig_with_overrides(rig, assignments)
    return [str(i) for i in err.value.issues]


def test_paths_that_do_not_exist_name_the_key() -> None:
    (msg,) = issues_of(["plant.params.aera=0.2"], TANK)
    assert msg.startswith(f"{TANK}: plant.params.aera: no key 'aera'")
    assert "did you mean 'area'?" in msg
    (msg,) = issues_of(["controller.loops[3].kp=1"])
    assert "controller.loops[3].kp: no entry [3] in controller.loops: it has 1" in msg
    (msg,) = issues_of(["plant.A.x=1"])
    assert "plant.A is a list of 3, not a table" in msg
    (msg,) = issues_of(["kp"])
    assert "write KEY=VALUE" in msg
    (msg,) = issues_of(["plant.x0=[0, 0,"])
    assert msg == f"{CONVEYOR}: plant.x0: expected a list of numbers, found string '[0, 0,'"


def test_values_are_checked_by_the_rig_checker() -> None:
    """The same message as the same mistake in the file."""
    doc = tomllib.loads(rig_text(CONVEYOR))
    doc["rig"]["tick"] = "fast"
    doc["controller"]["loops"][0]["kpp"] = 1.0
    with pytest.raises(RigFileError) as in_file:
        build_rig(doc, CONVEYOR)
    got = issues_of(["rig.tick=fast", "controller.loops[0].kpp=1.0"])
    assert sorted(got) == sorted(str(i) for i in in_file.value.issues)
    assert any("did you mean 'kp'?" in m for m in got)


def test_a_bare_word_is_a_string() -> None:
    rig = load_rig_with_overrides(CONVEYOR, ["rig.mode=realtime", "rig.name=\"belt 2\""])
    assert rig.mode == "realtime" and rig.name == "belt 2"
    (msg,) = issues_of(["rig.tick=fast"])
    assert msg == f"{CONVEYOR}: rig.tick: expected a number, found string 'fast'"


def test_a_table_left_out_of_the_file_can_be_set() -> None:
    rig = load_rig_with_overrides(CONVEYOR, ["acceptance.min_answered=0.5"])
    assert rig.acceptance.min_answered == 0.5


def test_apply_overrides_leaves_the_input_alone() -> None:
    doc = tomllib.loads(rig_text(CONVEYOR))
    out = apply_overrides(doc, ["rig.seed=9"], str(CONVEYOR))
    assert out["rig"]["seed"] == 9 and doc["rig"]["seed"] == 7


def test_cli_mistake_exits_2_without_traceback(tmp_path: Path) -> None:
    proc = subprocess.run([PLANTRIG, "run", str(CONVEYOR), "--fast", "--out", str(tmp_path),
                           "--set", "controller.loops[0].kpp=1"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert "controller.loops[0].kpp: unknown key; did you mean 'kp'?" in proc.stderr
    assert "nothing was run" in proc.stderr
    assert not any(tmp_path.iterdir())
