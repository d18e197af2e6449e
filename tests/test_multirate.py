"""A discrete_lti model whose sample time is a whole number of ticks runs at its own
rate, held in between (checked against scipy.signal.dlsim at the model's own rate)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import scipy.signal

from plantrig.sim import (
    DiscretePlant,
    RigFileError,
    load_rig,
    make_stepper,
    simulate,
    simulate_inputs,
    summarize,
)


def test_held_model_matches_dlsim_at_its_own_rate() -> None:
    # a second-order continuous model sampled at 50 ms (scipy.signal.cont2discrete, ZOH)
    a = np.array([[0.0, 1.0], [-40.0, -3.0]])
    sysd = scipy.signal.cont2discrete((a, np.array([[0.0], [40.0]]), np.array([[1.0, 0.0]]),
                                       np.array([[0.5]])), 0.05)
    plant = DiscretePlant.from_matrices(*sysd[:4], dt=0.05)
    tick, every, n = 0.01, 5, 400
    t = np.arange(n) * tick
    u = np.sin(3 * t) + (t > 1.0)
    x0 = np.array([0.2, -1.0])
    y, x = simulate_inputs(plant, tick, u, x0)
    # reference: scipy.signal.dlsim on the samples the model reads (every 5th tick)
    _, y_ref, x_ref = scipy.signal.dlsim((*sysd[:4], 0.05), u[::every], x0=x0)
    np.testing.assert_allclose(y[::every, 0], y_ref[:, 0], rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(x[::every], x_ref, rtol=1e-12, atol=1e-13)
    # held in between: every tick of a sample period shows that sample's x and y
    for phase in range(1, every):
        np.testing.assert_array_equal(y[phase::every, 0], y[::every, 0][:len(y[phase::every])])
        np.testing.assert_array_equal(x[phase::every], x[::every][:len(x[phase::every])])


def test_no_tick_warning_at_the_models_own_sample_time() -> None:
    # a deadbeat-like pole z = 0.05 is 0.33 samples "time constant": normal for a
    # discrete design, and the tick cannot be finer than the model anyway
    plant = DiscretePlant.from_matrices([[0.05]], [[1.0]], [[1.0]], None, dt=0.04)
    for tick in (0.04, 0.01):
        summary = summarize(plant, tick)
        assert not any("coarser" in w for w in summary.warnings), summary.warnings
    assert "4 ticks, held in between" in summarize(plant, 0.01).kind


RIG = """
[rig]
tick = 0.01
duration = 0.5

[plant]
kind = "discrete_lti"
A = [[0.8]]
B = [[0.2]]
C = [[1.0]]
dt = {dt}
states = [{{ name = "x" }}]
inputs = [{{ name = "u" }}]
outputs = [{{ name = "y" }}]

[[references]]
name = "r"
kind = "step"
at = 0.0
to = 1.0

[controller]
kind = "open_loop"
drive = {{ u = "r" }}
"""


def test_rig_file_multirate_runs_through_the_engine(tmp_path: Path) -> None:
    path = tmp_path / "rig.toml"
    path.write_text(RIG.format(dt=0.03))
    data = simulate(load_rig(path))
    y = data["y:y"]
    # y_j = 1 - 0.8^j at the model's samples j (x[j+1] = 0.8 x[j] + 0.2, x[0] = 0)
    j = np.arange(len(y)) // 3
    np.testing.assert_allclose(y, 1 - 0.8**j, rtol=0, atol=1e-15)
    path.write_text(RIG.format(dt=0.025))
    with pytest.raises(RigFileError, match="or a whole multiple of it, found 0.025 s"):
        load_rig(path)


@dataclass(frozen=True)
class Load:
    """A disturbance input entering the discrete model through ``column`` (as given)."""

    column: tuple[float, ...]
    param: str = ""


def test_a_disturbance_enters_a_held_model_with_its_sample() -> None:
    # d enters like u: read on the sample's tick (x_{s+1} = Ad x_s + Bd u_s + Ed d_s);
    # reference: scipy.signal.dlsim of the model with [B E] at its own rate
    sysd = scipy.signal.cont2discrete((np.array([[0.0, 1.0], [-40.0, -3.0]]),
                                       np.array([[0.0], [40.0]]), np.array([[1.0, 0.0]]),
                                       np.array([[0.5]])), 0.05)
    ad, bd, c, d = sysd[:4]
    plant = DiscretePlant.from_matrices(ad, bd, c, d, dt=0.05)
    tick, every, n, step_at = 0.01, 5, 200, 37          # the load steps between samples
    x0 = np.array([0.1, 0.0])
    stepper = make_stepper(plant, tick, x0, disturbances=[Load((0.0, 0.3))])
    u = np.cos(2 * np.arange(n) * tick)
    xs, ys = np.zeros((n, 2)), np.zeros(n)
    for k in range(n):
        if k == step_at:
            stepper.set_disturbance(0, 2.0)
        stepper.u[0] = u[k]
        stepper.step(k * tick)
        xs[k], ys[k] = stepper.x, stepper.y[0]
        stepper.commit()
    loads = np.where(np.arange(n) >= step_at, 2.0, 0.0)[::every]
    inputs = np.column_stack([u[::every], loads])
    _, y_ref, x_ref = scipy.signal.dlsim(
        (ad, np.column_stack([bd, [0.0, 0.3]]), c, np.column_stack([d, [0.0]]), 0.05),
        inputs, x0=x0)
    np.testing.assert_allclose(xs[::every], x_ref, rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(ys[::every], y_ref[:, 0], rtol=1e-12, atol=1e-13)
    for phase in range(1, every):                        # held ticks change nothing
        np.testing.assert_array_equal(xs[phase::every], xs[::every])
