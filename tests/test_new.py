"""`plantrig new`: every starter rig file passes `plantrig check` and its loop works."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
from fmu_build import build_fmu

from plantrig.sim import load_rig, simulate


def plantrig(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "plantrig", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=120)


@pytest.mark.parametrize(("kind", "output", "setpoint"), [
    ("lti", "position", 0.1), ("transfer_function", "temperature_rise", 15.0),
    ("ode", "angle", 0.5)])
def test_starter_passes_check_and_its_loop_settles(tmp_path: Path, kind: str, output: str,
                                                   setpoint: float) -> None:
    made = plantrig("new", kind, "starter.toml", cwd=tmp_path)
    assert made.returncode == 0, made.stderr
    checked = plantrig("check", "starter.toml", cwd=tmp_path)
    assert checked.returncode == 0, checked.stderr
    assert "warning" not in checked.stdout.lower()
    data = simulate(load_rig(tmp_path / "starter.toml"))
    # each starter's PID loop has integral action, so it ends at its set point
    assert data[f"y:{output}"][-1] == pytest.approx(setpoint, rel=0.02)


def test_an_existing_file_is_kept_unless_forced(tmp_path: Path) -> None:
    assert plantrig("new", "ode", "pendulum", cwd=tmp_path).returncode == 0
    assert (tmp_path / "pendulum_model.py").is_file()
    again = plantrig("new", "ode", "pendulum", cwd=tmp_path)
    assert again.returncode == 2 and "already exist" in again.stderr
    assert plantrig("new", "ode", "pendulum", "--force", cwd=tmp_path).returncode == 0


def test_an_fmu_starter_names_the_fmus_signals(tmp_path: Path) -> None:
    build_fmu(tmp_path)     # tests/fmu_build.py: the conveyor FMU of our own
    made = plantrig("new", "fmu", "belt.toml", "--fmu", "conveyor.fmu", cwd=tmp_path)
    assert made.returncode == 0, made.stderr
    checked = plantrig("check", "belt.toml", cwd=tmp_path)
    assert checked.returncode == 0, checked.stderr
    rig = load_rig(tmp_path / "belt.toml")
    assert [s.name for s in rig.inputs] == ["voltage"]
    assert [s.name for s in rig.outputs] == ["belt_speed", "motor_current"]
    assert [s.name for s in rig.states] == ["current", "motor_speed", "belt_speed"]
    missing = plantrig("new", "fmu", "x.toml", cwd=tmp_path)
    assert missing.returncode == 2 and "--fmu" in missing.stderr
    # a starter in another folder names the FMU relative to itself: it moves with it
    (tmp_path / "rigs").mkdir()
    assert plantrig("new", "fmu", "rigs/belt.toml", "--fmu", "conveyor.fmu",
                    cwd=tmp_path).returncode == 0
    assert 'file = "../conveyor.fmu"' in (tmp_path / "rigs" / "belt.toml").read_text()
    assert plantrig("check", "belt.toml", cwd=tmp_path / "rigs").returncode == 0


def test_a_starter_that_cannot_be_written_leaves_nothing_behind(tmp_path: Path) -> None:
    (tmp_path / "arm_model.py").mkdir()          # where the ODE module would go
    made = plantrig("new", "ode", "arm.toml", "--force", cwd=tmp_path)
    assert made.returncode == 2 and "Traceback" not in made.stderr
    assert "cannot write" in made.stderr and "nothing was written" in made.stderr
    assert not (tmp_path / "arm.toml").exists()
