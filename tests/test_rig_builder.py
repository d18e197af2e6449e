"""Rigs built in Python and rigs written back to a file: same model, same checks."""

from __future__ import annotations

import dataclasses
import tomllib
from pathlib import Path

import control
import numpy as np
import pytest

from plantrig.sim import (
    ControllerSpec,
    NamedReference,
    PidLoopSpec,
    RigFileError,
    Step,
    load_rig,
    rig_from_python,
    simulate,
    write_rig,
)

CONFIGS = Path(__file__).resolve().parents[1] / "configs"
SHIPPED_RIGS = sorted(p for p in CONFIGS.rglob("*.toml")
                      if "rig" in tomllib.loads(p.read_text(encoding="utf-8")))
# a first-order fan speed loop of our own: J dw/dt = -b w + k u (J = 0.02, b = 0.1, k = 0.5)
FAN = control.ss([[-5.0]], [[25.0]], [[1.0]], [[0.0]])
PI = ControllerSpec("pid", loops=(PidLoopSpec(measure="speed", drive="voltage",
                                              reference="speed_setpoint", kp=0.08, ki=0.6),))
SETPOINT = NamedReference("speed_setpoint", "rad/s", Step(at=0.1, from_=0.0, to=40.0))


def fan(**changes: object) -> object:
    args: dict = dict(name="fan", plant=FAN, tick=0.001, duration=3.0,
                      inputs=["voltage"], outputs=["speed"], states=["speed"],
                      controller=PI, references=[SETPOINT])
    args.update(changes)
    return rig_from_python(**args)


@pytest.mark.parametrize("path", SHIPPED_RIGS, ids=lambda p: p.stem)
def test_every_shipped_rig_round_trips(path: Path, tmp_path: Path) -> None:
    rig = load_rig(path)
    copy = load_rig(write_rig(rig, tmp_path / path.name))
    assert copy == rig
    assert copy != dataclasses.replace(rig, duration=rig.duration * 2)


def test_a_rig_built_in_python_runs_like_its_written_file(tmp_path: Path) -> None:
    rig = fan()
    written = load_rig(write_rig(rig, tmp_path / "fan.toml"))
    assert written == rig and written.controller.kind == "pid"
    a, b = simulate(rig), simulate(written)
    assert np.array_equal(a.rows, b.rows)
    # the loop s^2 + 7 s + 15 (poles -3.5 +- 1.9j) settles on the set point within 3 s
    # (integral action removes the steady-state error: common practice for PI loops)
    speed = a.rows[:, a.columns.index("y:speed")]
    assert abs(speed[-1] - 40.0) < 0.5


def test_a_scipy_transfer_function_becomes_its_minimal_realisation() -> None:
    import scipy.signal

    rig = fan(plant=scipy.signal.TransferFunction([25.0], [1.0, 5.0]), states=())
    # the DC gain of 25 / (s + 5) is 5 (final value theorem)
    plant = rig.plant
    dc = plant.C @ np.linalg.solve(-plant.A, plant.B) + plant.D   # type: ignore[union-attr]
    assert dc[0, 0] == pytest.approx(5.0, rel=1e-12)
    assert [s.name for s in rig.states] == ["x1"]


def test_python_mistakes_get_the_rig_file_messages() -> None:
    bad = ControllerSpec("pid", loops=(PidLoopSpec(measure="speed", drive="voltag",
                                                   reference="speed_setpoint", kp=0.1),))
    with pytest.raises(RigFileError) as info:
        fan(controller=bad, tick=-1.0, sections={"limits": [{"name": "hot", "signal": "spede",
                                                              "trip_high": 1.0}]})
    text = {i.key: i.message for i in info.value.issues}
    assert all(i.file == "<python>" for i in info.value.issues)
    assert text["rig.tick"].startswith("expected a positive number")
    assert "did you mean 'voltage'?" in text["controller.loops[0].drive"]
    assert "did you mean 'speed'?" in text["limits[0].signal"]


def test_rigs_with_different_settings_are_not_equal() -> None:
    loops = (dataclasses.replace(PI.loops[0], kp=0.09),)
    assert fan() == fan()
    assert fan() != fan(controller=ControllerSpec("pid", loops=loops))
    assert fan() != fan(x0=[1.0])


def test_a_discrete_python_control_system_stays_discrete(tmp_path: Path) -> None:
    # the fan sampled with ZOH at 10 ms: python-control's c2d is the outside reference
    sampled = control.c2d(FAN, 0.01, method="zoh")
    rig = fan(plant=sampled, duration=0.5)
    assert np.allclose(rig.plant.Ad, sampled.A, rtol=0, atol=1e-15)   # type: ignore[union-attr]
    assert load_rig(write_rig(rig, tmp_path / "fan.toml")) == rig
