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
at = 0.1
to = 1.0

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
    ("discrete_dt", ('kind = "lti"', 'kind = "discrete_lti"\ndt = 0.015'), "plant.dt",
     "expected the rig tick (0.01 s) or a whole multiple of it, found 0.015 s"),
    ("ode_missing_module", ('kind = "lti"\nA = [[-2.0]]\nB = [[2.0]]\nC = [[1.0]]',
                            'kind = "ode"\nmodule = "nowhere.py"\ndynamics = "f"\n'
                            'output = "h"'), "plant.module", "found no file"),
    ("external_without_link", ('kind = "pid"\n', 'kind = "external"\n'), "controller.kind",
     "needs a [link] table"),
    ("bad_reference_kind", ('kind = "step"', 'kind = "square"'), "references[0].kind",
     "expected one of step, ramp, sine, table, constant"),
    ("nan_in_matrix", ("A = [[-2.0]]", "A = [[nan]]"), "plant.A",
     "expected finite numbers, found nan at [0][0]"),
    ("inf_in_row", ("C = [[1.0]]", "C = [inf]"), "plant.C", "found inf at [0]"),
    ("nan_x0", ('outputs = [{ name = "y", unit = "V" }]',
                'outputs = [{ name = "y", unit = "V" }]\nx0 = [nan]'), "plant.x0",
     "expected finite numbers, found nan at [0]"),
    ("nan_table_point", ('kind = "step"\nat = 0.1\nto = 1.0',
                         'kind = "table"\npoints = [[0.0, 0.0], [0.5, nan]]'),
     "references[0].points", "found nan at [1][1]"),
    ("negative_seed", ("duration = 1.0", "duration = 1.0\nseed = -1"), "rig.seed",
     "expected a seed 0..9223372036854775807, found int -1"),
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


# Keys of earlier versions: each is a mistake whose message names the key to write now.
# (reference kind and its keys, old key, the new key(s) the message must name)
SINE_BOUNDS = "'low' and 'high' (low = offset - amplitude, high = offset + amplitude)"
OLD_REFERENCE_KEYS = [
    ("kind = \"step\"\ntime = 0.1", "time", "'at'"),
    ("kind = \"step\"\ninitial = 0.0", "initial", "'from'"),
    ("kind = \"step\"\nfinal = 1.0", "final", "'to'"),
    ("kind = \"ramp\"\nstart = 0.1", "start", "'at'"),
    ("kind = \"ramp\"\ninitial = 0.0", "initial", "'from'"),
    ("kind = \"ramp\"\nslope = 1.0", "slope", "'rate'"),
    ("kind = \"ramp\"\nlimit = 2.0", "limit", "'to'"),
    ("kind = \"sine\"\namplitude = 1.0", "amplitude", SINE_BOUNDS),
    ("kind = \"sine\"\noffset = 1.0", "offset", SINE_BOUNDS),
    ("kind = \"sine\"\nfrequency = 1.0", "frequency", "'hz'"),
    ("kind = \"sine\"\nphase = 90.0", "phase", "'phase_deg'"),
    ("kind = \"table\"\npoints = [[0.0, 1.0]]\ninterpolation = \"hold\"", "interpolation",
     "'between'"),
]
REFERENCE_BLOCK = 'kind = "step"\nat = 0.1\nto = 1.0'
OLD_PID_KEYS = [
    ("anti_windup = \"back_calculation\"", "anti_windup",
     "'windup' (back_calculation -> unwind, clamp -> freeze, none -> off)"),
    ("tracking_time = 0.5", "tracking_time", "'unwind_time'"),
    ("derivative_filter = 0.01", "derivative_filter", "'derivative_lag'"),
    ("u_min = -5.0", "u_min", "'drive_low'"),
    ("u_max = 5.0", "u_max", "'drive_high'"),
]


@pytest.mark.parametrize(("block", "old", "new"), OLD_REFERENCE_KEYS,
                         ids=[f"{b.split(chr(34))[1]}.{o}" for b, o, _ in OLD_REFERENCE_KEYS])
def test_old_reference_keys_name_their_new_key(tmp_path: Path, block: str, old: str,
                                               new: str) -> None:
    assert REFERENCE_BLOCK in GOOD
    path = write(tmp_path, GOOD.replace(REFERENCE_BLOCK, block))
    with pytest.raises(RigFileError) as info:
        load_rig(path)
    assert [(i.key, i.message) for i in info.value.issues] == [
        (f"references[0].{old}", f"old key name, no longer read; did you mean {new}?")]


@pytest.mark.parametrize(("line", "old", "new"), OLD_PID_KEYS,
                         ids=[o for _, o, _ in OLD_PID_KEYS])
def test_old_pid_keys_name_their_new_key(tmp_path: Path, line: str, old: str,
                                         new: str) -> None:
    path = write(tmp_path, GOOD.replace("ki = 2.0", f"ki = 2.0\n{line}"))
    with pytest.raises(RigFileError) as info:
        load_rig(path)
    assert [(i.key, i.message) for i in info.value.issues] == [
        (f"controller.loops[0].{old}", f"old key name, no longer read; did you mean {new}?")]


def test_old_windup_values_name_their_new_value(tmp_path: Path) -> None:
    for old, new in (("back_calculation", "unwind"), ("clamp", "freeze"), ("none", "off")):
        path = write(tmp_path, GOOD.replace("ki = 2.0", f"ki = 2.0\nwindup = \"{old}\""))
        with pytest.raises(RigFileError) as info:
            load_rig(path)
        assert [(i.key, i.message) for i in info.value.issues] == [
            ("controller.loops[0].windup", f"expected one of unwind, freeze, off, found "
                                           f"'{old}' (an old value); did you mean '{new}'?")]


def test_new_reference_and_pid_keys_load(tmp_path: Path) -> None:
    text = GOOD.replace(REFERENCE_BLOCK, 'kind = "ramp"\nat = 0.2\nfrom = 1.0\nrate = -0.5\n'
                                         'to = 0.5')
    text = text.replace("ki = 2.0", "ki = 2.0\nkd = 0.1\nderivative_lag = 0.02\n"
                                    'windup = "freeze"\nunwind_time = 0.3\n'
                                    "drive_low = -4.0\ndrive_high = 6.0")
    rig = load_rig(write(tmp_path, text))
    ramp = rig.references[0].waveform
    assert [ramp.value(t) for t in (0.0, 0.2, 1.2, 5.0)] == [1.0, 1.0, 0.5, 0.5]
    loop = rig.controller.loops[0]
    assert (loop.derivative_lag, loop.windup, loop.unwind_time, loop.drive_low,
            loop.drive_high) == (0.02, "freeze", 0.3, -4.0, 6.0)
    sine = load_rig(write(tmp_path, GOOD.replace(
        REFERENCE_BLOCK, 'kind = "sine"\nlow = 0.2\nhigh = 0.6\nhz = 2.0\nphase_deg = 90.0')))
    assert sine.references[0].waveform.value(0.0) == pytest.approx(0.6, abs=1e-12)


@pytest.mark.parametrize(("block", "key", "words"), [
    ('kind = "ramp"\nfrom = 1.0\nrate = 0.5\nto = 0.0', "references[0].rate",
     "a rate of 0.5 per s never takes the ramp from 1 to 0; give the rate the other sign"),
    ('kind = "sine"\nlow = 1.0\nhigh = 0.5', "references[0].high",
     "expected high >= low (1), found 0.5"),
    ('kind = "sine"\nhz = -2.0', "references[0].hz", "expected a frequency >= 0 Hz"),
    ('kind = "table"\npoints = [[0.0, 1.0]]\nbetween = "step"', "references[0].between",
     "expected one of linear, hold, found string 'step'"),
], ids=["ramp_away_from_to", "sine_high_below_low", "sine_negative_hz", "table_between"])
def test_reference_values_that_cannot_work(tmp_path: Path, block: str, key: str,
                                           words: str) -> None:
    with pytest.raises(RigFileError) as info:
        load_rig(write(tmp_path, GOOD.replace(REFERENCE_BLOCK, block)))
    assert any(i.key == key and words in i.message for i in info.value.issues), \
        [str(i) for i in info.value.issues]


def test_cli_check_names_the_new_key_for_an_old_one(tmp_path: Path) -> None:
    text = GOOD.replace(REFERENCE_BLOCK, 'kind = "step"\ntime = 0.1\nfinal = 1.0')
    text = text.replace("ki = 2.0", 'ki = 2.0\nanti_windup = "clamp"')
    path = write(tmp_path, text)
    proc = subprocess.run([sys.executable, "-m", "plantrig", "check", str(path)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2 and proc.stdout == ""
    assert "Traceback" not in proc.stderr
    for line in (f"{path}: references[0].time: old key name, no longer read; did you mean "
                 "'at'?",
                 f"{path}: references[0].final: old key name, no longer read; did you mean "
                 "'to'?",
                 f"{path}: controller.loops[0].anti_windup: old key name, no longer read; "
                 "did you mean 'windup' (back_calculation -> unwind, clamp -> freeze, "
                 "none -> off)?"):
        assert any(said.endswith(line) for said in proc.stderr.splitlines()), proc.stderr


def test_every_shipped_rig_file_checks_clean() -> None:
    rigs = sorted((REPO / "configs").glob("*.toml")) + [
        p for p in sorted((REPO / "configs" / "rehearsals").glob("*.toml"))
        if "[rig]" in p.read_text()]
    assert len(rigs) >= 7
    for path in rigs:
        proc = subprocess.run([sys.executable, "-m", "plantrig", "check", str(path)],
                              capture_output=True, text=True, timeout=60)
        assert proc.returncode == 0, f"{path}: {proc.stderr}"


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


def test_a_broken_reference_is_one_mistake_not_two(tmp_path: Path) -> None:
    # its name still counts, so the loop that uses it is not reported as well
    for old, new in (('kind = "step"\nat = 0.1\nto = 1.0', 'kind = "table"\npoints = [[0.0, nan]]'),
                     ('kind = "step"', 'kind = "square"')):
        path = write(tmp_path, GOOD.replace(old, new, 1))
        with pytest.raises(RigFileError) as info:
            load_rig(path)
        assert [i.key for i in info.value.issues] == ["references[0].points" if "nan" in new
                                                     else "references[0].kind"]
