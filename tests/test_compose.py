"""Sensor and actuator tables of a rig file reach the engine as signal chains."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
from rig_text import rig_text

from plantrig.sim import build_chains, load_rig, read_run, simulate

REPO = Path(__file__).resolve().parents[1]


def conveyor_with(tmp_path: Path, extra: str) -> Path:
    path = tmp_path / "conveyor.toml"
    path.write_text(rig_text(REPO / "configs" / "conveyor.toml") + extra)
    return path


def test_chains_follow_the_rig_tables(tmp_path: Path) -> None:
    # a 10-bit ADC over 0..2 m/s on the belt speed, and a 100 V/s slew limit on the drive
    path = conveyor_with(tmp_path, """
[[sensors]]
name = "belt_speed"
adc_bits = 10
adc_lo = 0.0
adc_hi = 2.0

[[actuators]]
name = "voltage"
rate = 100.0
lo = -24.0
hi = 24.0
""")
    rig = load_rig(path)
    actuator, sensor = build_chains(rig)
    data = simulate(rig, actuator_chain=actuator, sensor_chain=sensor)
    sent = data["sent:belt_speed"]
    lsb = 2.0 / (2**10 - 1)  # ADC step, counts = round(v / lsb) (common practice)
    np.testing.assert_allclose(sent / lsb, np.round(sent / lsb), atol=1e-9)
    assert np.max(np.abs(sent - np.clip(data["y:belt_speed"], 0, 2))) <= lsb / 2 + 1e-12
    # the motor current passes through unconditioned
    np.testing.assert_array_equal(data["sent:motor_current"], data["y:motor_current"])
    du = np.diff(data["u:voltage"])
    assert np.max(np.abs(du)) <= 100.0 * rig.tick + 1e-12
    assert np.isclose(np.max(np.abs(du)), 100.0 * rig.tick)  # the limit is reached


def test_chain_mistakes_are_rig_file_mistakes(tmp_path: Path) -> None:
    path = conveyor_with(tmp_path, """
[[sensors]]
name = "belt_sped"

[[actuators]]
name = "voltage"
rate = -3.0
""")
    proc = subprocess.run([sys.executable, "-m", "plantrig", "check", str(path)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    assert "sensors[0].name: expected one of the plant outputs (belt_speed, motor_current), " \
           "found string 'belt_sped'; did you mean 'belt_speed'?" in proc.stderr
    assert "actuators[0].rate" in proc.stderr


def test_the_python_api_and_the_cli_compose_the_same_run(tmp_path: Path) -> None:
    # a sensor that reads double: the PI loop then holds the true belt speed at half its
    # setpoint, through simulate() exactly as through `plantrig run`
    path = conveyor_with(tmp_path, '\n[[sensors]]\nname = "belt_speed"\ngain = 2.0\n')
    api = simulate(load_rig(path))
    proc = subprocess.run([sys.executable, "-m", "plantrig", "run", str(path), "--out",
                           str(tmp_path / "runs"), "--json"], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 0, proc.stderr
    cli = read_run(json.loads(proc.stdout)["folder"])
    assert cli.rows.tobytes() == api.rows.tobytes()
    setpoint = api["ref:speed_setpoint"][-1]
    np.testing.assert_allclose(api["y:belt_speed"][-1], setpoint / 2, rtol=1e-3)
    np.testing.assert_allclose(api["sent:belt_speed"][-1], setpoint, rtol=1e-3)
