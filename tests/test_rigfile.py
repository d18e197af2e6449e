"""Rig-file mistakes: each class gives its own message with file and key; exit 2."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from plantrig.sim import RigFileError, load_rig

REPO = Path(__file__).resolve().parents[1]

GOOD = """
[rig]
name = "lag"
tick = 0.01
duration = 1.0

[plant]
kind = "lti"
A = [[-2.0]]
B = [[2.0]]
C = [[1.0]]
states = [{ name = "x", unit = "V" }]
inputs = [{ name = "u", unit = "V", min = -10.0, max = 10.0 }]
outputs = [{ name = "y", unit = "V" }]

[[references]]
name = "r"
kind = "step"
time = 0.1
final = 1.0

[controller]
kind = "pid"

[[controller.loops]]
measure = "y"
drive = "u"
reference = "r"
kp = 1.0
ki = 2.0
"""

# (id, text replacement (old, new) applied to GOOD, expected key, expected words)
MISTAKES = [
    ("toml_syntax", ('name = "lag"', 'name = "lag'), "", "not valid TOML"),
    ("missing_tick", ("tick = 0.01\n", ""), "rig.tick", "missing (expected a number)"),
    ("negative_tick", ("tick = 0.01", "tick = -0.01"), "rig.tick", "expected a positive"),
    ("wrong_type", ("duration = 1.0", 'duration = "long"'), "rig.duration",
     "expected a number, found string 'long'"),
    ("unknown_key_typo", ("duration = 1.0", "duration = 1.0\nseeed = 3"), "rig.seeed",
     "did you mean 'seed'"),
    ("unknown_section", ("[controller]", "[contoller]\nkind = 'pid'\n[controller]"),
     "contoller", "did you mean 'controller'"),
    ("bad_plant_kind", ('kind = "lti"', 'kind = "linear"'), "plant.kind",
     "expected one of lti, transfer_function, discrete_lti, ode"),
    ("shape_mismatch", ("B = [[2.0]]", "B = [[2.0], [1.0]]"), "plant.B",
     "has shape (2, 1), expected (1, m) to match A"),
    ("ragged_matrix", ("A = [[-2.0]]", "A = [[-2.0, 1.0], [3.0]]"), "plant.A",
     "rows have different lengths"),
    ("signal_count", ('outputs = [{ name = "y", unit = "V" }]',
                      'outputs = [{ name = "y" }, { name = "z" }]'), "plant.outputs",
     "expected 1 entries to match the model, found 2"),
    ("range_inverted", ("min = -10.0, max = 10.0", "min = 10.0, max = -10.0"),
     "plant.inputs[0].max", "expected max > min"),
    ("unknown_reference", ('reference = "r"', 'reference = "rr"'),
     "controller.loops[0].reference", "did you mean 'r'"),
    ("unknown_output", ('measure = "y"', 'measure = "speed"'), "controller.loops[0].measure",
     "expected one of the plant outputs (y)"),
    ("missing_gain", ("kp = 1.0\n", ""), "controller.loops[0].kp", "missing"),
    ("x0_length", ('outputs = [{ name = "y", unit = "V" }]',
                   'outputs = [{ name = "y", unit = "V" }]\nx0 = [1.0, 2.0]'), "plant.x0",
     "expected 1 values (one per state), found 2"),
    ("discrete_dt", ('kind = "lti"', 'kind = "discrete_lti"\ndt = 0.02'), "plant.dt",
     "expected the rig tick (0.01 s) for a discrete model, found 0.02 s"),
    ("ode_missing_module", ('kind = "lti"\nA = [[-2.0]]\nB = [[2.0]]\nC = [[1.0]]',
                            'kind = "ode"\nmodule = "nowhere.py"\ndynamics = "f"\n'
                            'output = "h"'), "plant.module", "found no file"),
    ("external_without_link", ('kind = "pid"\n', 'kind = "external"\n'), "controller.kind",
     "needs a [link] table"),
    ("bad_reference_kind", ('kind = "step"', 'kind = "square"'), "references[0].kind",
     "expected one of step, ramp, sine, table, constant"),
    ("bad_overrun_policy", ("duration = 1.0", 'duration = 1.0\non_overrun = "burst"'),
     "rig.on_overrun", "expected one of skip, catch_up, stop"),
]


def write(tmp_path: Path, text: str, name: str = "rig.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def test_good_file_loads(tmp_path: Path) -> None:
    rig = load_rig(write(tmp_path, GOOD))
    assert rig.n_ticks == 100 and rig.controller.kind == "pid"


@pytest.mark.parametrize(("old", "new", "key", "words"),
                         [m[1] + m[2:] for m in MISTAKES], ids=[m[0] for m in MISTAKES])
def test_each_mistake_has_its_message(tmp_path: Path, old: str, new: str, key: str,
                                      words: str) -> None:
    assert old in GOOD, "the mutation must apply"
    path = write(tmp_path, GOOD.replace(old, new, 1))
    with pytest.raises(RigFileError) as info:
        load_rig(path)
    matching = [i for i in info.value.issues if i.key == key and words in i.message]
    assert matching, f"no issue {key!r} ~ {words!r} in {[str(i) for i in info.value.issues]}"
    assert all(i.file == str(path) for i in info.value.issues)


def test_duplicate_signal_name(tmp_path: Path) -> None:
    text = GOOD.replace('outputs = [{ name = "y", unit = "V" }]',
                        'outputs = [{ name = "y" }, { name = "y" }]')
    text = text.replace("C = [[1.0]]", "C = [[1.0], [1.0]]")
    with pytest.raises(RigFileError) as info:
        load_rig(write(tmp_path, text))
    assert any(i.key == "plant.outputs[1].name" and "duplicate signal name 'y'" in i.message
               for i in info.value.issues)


def test_all_mistakes_reported_at_once(tmp_path: Path) -> None:
    text = GOOD.replace("tick = 0.01", "tick = -1").replace("kp = 1.0", "kp = 'high'")
    text = text.replace("duration = 1.0", "duration = 1.0\nspeed = 2")
    with pytest.raises(RigFileError) as info:
        load_rig(write(tmp_path, text))
    keys = {i.key for i in info.value.issues}
    assert {"rig.tick", "controller.loops[0].kp", "rig.speed"} <= keys


def test_cli_check_exit_2_without_traceback(tmp_path: Path) -> None:
    path = write(tmp_path, GOOD.replace("B = [[2.0]]", "B = [[2.0], [1.0]]"))
    proc = subprocess.run([sys.executable, "-m", "plantrig", "check", str(path)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert f"{path}: plant.B: has shape (2, 1)" in proc.stderr


def test_cli_check_prints_summary() -> None:
    proc = subprocess.run([sys.executable, "-m", "plantrig", "check",
                           str(REPO / "configs" / "conveyor.toml")],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    assert "controllability rank: 3 of 3" in proc.stdout
    assert "stability: asymptotically stable" in proc.stdout


def test_unreadable_file(tmp_path: Path) -> None:
    proc = subprocess.run([sys.executable, "-m", "plantrig", "check",
                           str(tmp_path / "absent.toml")],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2 and "cannot read" in proc.stderr
    assert "Traceback" not in proc.stderr
