"""Rig files made of parts: sections taken from other files, local overrides, cycles and
conflicts named with both files, and the run folder's record of what was resolved."""

from __future__ import annotations

import dataclasses
import json
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest

from plantrig.sim import RigFileError, load_rig, read_rig_document, simulate

CONFIGS = Path(__file__).resolve().parents[1] / "configs"
CONVEYOR = CONFIGS / "conveyor.toml"
RIG = """parts = ["{part}"]

[rig]
name = "fan"
tick = 0.001
duration = 0.5

[controller]
kind = "open_loop"
drive = {{ voltage = "v" }}

[[references]]
name = "v"
kind = "constant"
value = 2.0
"""
PLANT = """[plant]
kind = "lti"
A = [[-5.0]]
B = [[25.0]]
C = [[1.0]]
states = [{ name = "speed" }]
inputs = [{ name = "voltage", min = -10.0, max = 10.0 }]
outputs = [{ name = "speed" }]
"""


def write(folder: Path, files: dict[str, str]) -> Path:
    for name, text in files.items():
        (folder / name).parent.mkdir(parents=True, exist_ok=True)
        (folder / name).write_text(text)
    return folder / next(iter(files))


def test_every_conveyor_rig_shares_one_plant_file() -> None:
    part = CONFIGS / "parts" / "conveyor_plant.toml"
    rigs = [CONVEYOR, CONFIGS / "conveyor_hil.toml", CONFIGS / "conveyor_mqtt.toml",
            CONFIGS / "conveyor_modbus.toml", CONFIGS / "rehearsals" / "conveyor_guarded.toml",
            CONFIGS / "rehearsals" / "conveyor_guarded_hil.toml"]
    plant = tomllib.loads(part.read_text())["plant"]
    for path in rigs:
        assert "plant" not in tomllib.loads(path.read_text()), path
        rig = load_rig(path)
        assert rig.parts == (part.resolve(),)
        assert np.array_equal(rig.plant.A, plant["A"])   # type: ignore[union-attr]


def test_a_part_in_a_subfolder_runs_like_the_whole_file(tmp_path: Path) -> None:
    composed = load_rig(write(tmp_path / "a", {"fan.toml": RIG.format(part="plants/fan.toml"),
                                               "plants/fan.toml": PLANT}))
    whole = load_rig(write(tmp_path / "b", {"fan.toml": RIG.format(part="").split("\n", 2)[2]
                                            + PLANT}))
    assert composed == whole
    assert np.array_equal(simulate(composed).rows, simulate(whole).rows)


def test_local_keys_override_the_part_key_by_key(tmp_path: Path) -> None:
    text = RIG.format(part="fan_plant.toml") + '\n[plant]\nA = [[-2.0]]\n'
    rig = load_rig(write(tmp_path, {"fan.toml": text, "fan_plant.toml": PLANT}))
    assert rig.plant.A[0, 0] == -2.0 and rig.plant.B[0, 0] == 25.0   # type: ignore[union-attr]


def test_a_cycle_is_named_with_every_file(tmp_path: Path) -> None:
    rig = write(tmp_path, {"fan.toml": RIG.format(part="one.toml"),
                           "one.toml": 'parts = ["two.toml"]\n' + PLANT,
                           "two.toml": 'parts = ["one.toml"]\n[safety]\n'})
    with pytest.raises(RigFileError) as info:
        load_rig(rig)
    [issue] = info.value.issues
    assert issue.file == str(tmp_path / "two.toml") and issue.key == "parts[0]"
    assert f"a cycle: {tmp_path / 'one.toml'} -> {tmp_path / 'two.toml'} -> " \
           f"{tmp_path / 'one.toml'}" in issue.message


def test_two_parts_giving_one_section_is_a_conflict(tmp_path: Path) -> None:
    text = RIG.format(part="a.toml").replace('["a.toml"]', '["a.toml", "b.toml"]')
    rig = write(tmp_path, {"fan.toml": text, "a.toml": PLANT, "b.toml": PLANT})
    with pytest.raises(RigFileError) as info:
        load_rig(rig)
    [issue] = info.value.issues
    assert (issue.file, issue.key) == (str(rig), "parts[1]")
    assert issue.message == f"[plant] is given by both {tmp_path / 'a.toml'} and " \
                            f"{tmp_path / 'b.toml'}"


def test_a_mistake_in_a_part_names_the_part(tmp_path: Path) -> None:
    rig = write(tmp_path, {"fan.toml": RIG.format(part="fan_plant.toml"),
                           "fan_plant.toml": PLANT.replace("B = [[25.0]]", "B = [[25.0]]\nBB = 1")})
    with pytest.raises(RigFileError) as info:
        load_rig(rig)
    [issue] = info.value.issues
    assert (issue.file, issue.key) == (str(tmp_path / "fan_plant.toml"), "plant.BB")
    missing = write(tmp_path / "m", {"fan.toml": RIG.format(part="nowhere.toml")})
    with pytest.raises(RigFileError) as info:
        load_rig(missing)
    assert info.value.issues[0].key == "parts[0]" and "cannot read" in str(info.value)


def test_a_model_module_in_a_part_is_found_from_the_rig_file(tmp_path: Path) -> None:
    # the tank's ODE plant moved into a part two folders down: its module path is
    # relative to the part, and the resolved rig points at it from the rig file
    tank = tomllib.loads((CONFIGS / "tank.toml").read_text())
    part = (CONFIGS / "tank.toml").read_text().split("[plant]", 1)[1].split("\n[", 1)[0]
    (tmp_path / "models" / "tank").mkdir(parents=True)
    (tmp_path / "models" / "tank" / "tank_model.py").write_bytes(
        (CONFIGS / "tank_model.py").read_bytes())
    (tmp_path / "models" / "tank" / "plant.toml").write_text("[plant]" + part)
    rest = (CONFIGS / "tank.toml").read_text().replace("[plant]" + part, "")
    rig_path = tmp_path / "tank.toml"
    rig_path.write_text('parts = ["models/tank/plant.toml"]\n' + rest)
    assert tomllib.loads(read_rig_document(rig_path).text)["plant"]["module"] == \
        "models/tank/" + tank["plant"]["module"]
    assert load_rig(rig_path) == load_rig(CONFIGS / "tank.toml")


def test_the_run_folder_keeps_the_resolved_rig_and_its_sources(tmp_path: Path) -> None:
    proc = subprocess.run([sys.executable, "-m", "plantrig", "run", str(CONVEYOR), "--fast",
                           "--duration", "0.2", "--out", str(tmp_path)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    [folder] = [p for p in tmp_path.iterdir() if p.is_dir()]
    resolved = tomllib.loads((folder / "rig.toml").read_text())
    assert "parts" not in resolved and resolved["plant"]["kind"] == "lti"
    files = json.loads((folder / "sources.json").read_text())["files"]
    roles = {name: entry["role"] for name, entry in files.items()}
    assert roles["sources/00_conveyor.toml"] == "rig as written"
    assert roles["sources/01_conveyor_plant.toml"] == "part"
    assert (folder / "sources" / "01_conveyor_plant.toml").read_bytes() == \
        (CONFIGS / "parts" / "conveyor_plant.toml").read_bytes()
    # the folder alone reproduces the run's rig
    assert load_rig(folder / "rig.toml") == dataclasses.replace(load_rig(CONVEYOR),
                                                                duration=0.2)
