"""Dead time on LTI and transfer-function plants: exact under ZOH for any delay, against
the first-order-plus-dead-time step response in closed form and a delayed scipy lsim."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.signal

from plantrig.sim import LinearPlant, RigFileError, load_rig, simulate_inputs, summarize
from plantrig.sim.model._plant import make_stepper


@pytest.mark.parametrize("delay", [0.0, 0.003, 0.01, 0.137, 0.2, 1.0049])
@pytest.mark.parametrize("side", ["input", "output", "both"])
def test_fopdt_step_response_in_closed_form(delay: float, side: str) -> None:
    # K e^(-L s) / (tau s + 1): y(t) = K (1 - exp(-(t - L) / tau)) for t >= L, else 0
    # (the first-order-plus-dead-time step response; common practice)
    K, tau, T, n = 2.0, 0.5, 0.01, 400
    split = {"input": (delay, 0.0), "output": (0.0, delay), "both": (delay / 3, delay * 2 / 3)}
    plant = LinearPlant.from_transfer_function([K], [tau, 1.0]).with_dead_time(*split[side])
    y, _ = simulate_inputs(plant, T, np.ones((n, 1)))
    t = np.arange(n) * T
    closed = np.where(t >= delay - 1e-12, K * (1 - np.exp(-(t - delay) / tau)), 0.0)
    np.testing.assert_allclose(y[:, 0], closed, rtol=0, atol=1e-13)


def delayed_lsim(plant: LinearPlant, T: float, u: np.ndarray, tau_in: list[float],
                 tau_out: list[float], h: float = 1e-4) -> np.ndarray:
    """The reference: scipy.signal.lsim (interp=False, input held between grid points) on
    a fine uniform grid of step h that holds every instant where a delayed input switches
    and every instant a delayed output is read (all delays are multiples of h)."""
    n = len(u)
    fine = int(round((n - 1) * T / h)) + 1
    grid = np.arange(fine) * h
    u_plant = np.zeros((fine, u.shape[1]))
    for j, d in enumerate(tau_in):
        index = np.floor((grid - d) / T + 1e-9).astype(int)     # tick whose u is seen
        u_plant[:, j] = np.where(index >= 0, u[np.clip(index, 0, n - 1), j], 0.0)
    _, y_fine, _ = scipy.signal.lsim((plant.A, plant.B, plant.C, plant.D), u_plant, grid,
                                     interp=False)
    y_fine = y_fine.reshape(fine, -1)
    y = np.zeros((n, plant.C.shape[0]))
    for i, d in enumerate(tau_out):
        at = np.round((np.arange(n) * T - d) / h).astype(int)
        y[:, i] = np.where(at >= 0, y_fine[np.clip(at, 0, fine - 1), i], 0.0)
    return y


def test_mimo_delays_match_a_delayed_lsim() -> None:
    rng = np.random.default_rng(17)
    a = rng.normal(size=(3, 3))
    a -= (np.max(np.linalg.eigvals(a).real) + 0.5) * np.eye(3)
    plant = LinearPlant.from_matrices(a, rng.normal(size=(3, 2)), rng.normal(size=(2, 3)),
                                      rng.normal(size=(2, 2)))
    tau_in, tau_out = [0.0237, 0.05], [0.013, 0.0]
    T, n = 0.01, 300
    t = np.arange(n) * T
    u = np.column_stack([np.sin(5 * t), (t > 0.4).astype(float) - 0.3 * np.cos(2 * t)])
    y, _ = simulate_inputs(plant.with_dead_time(tau_in, tau_out), T, u)
    ref = delayed_lsim(plant, T, u, tau_in, tau_out)
    np.testing.assert_allclose(y, ref, rtol=1e-9, atol=1e-11)


def test_step_is_pure_until_commit() -> None:
    """The engine may step a tick twice (a trip re-runs it with safe inputs)."""
    plant = LinearPlant.from_transfer_function([1.0], [0.2, 1.0]).with_dead_time(0.025, 0.013)
    once = make_stepper(plant, 0.01)
    twice = make_stepper(plant, 0.01)
    for k in range(50):
        for s in (once, twice):
            s.u[:] = 1.0 if k > 3 else 0.0
        twice.u[:] = 7.0
        twice.step(k * 0.01)
        twice.u[:] = once.u
        for s in (once, twice):
            s.step(k * 0.01)
            s.commit()
        assert once.y[0] == twice.y[0] and once.x[0] == twice.x[0]


RIG = """
[rig]
tick = 0.01
duration = 2.0

[plant]
kind = "transfer_function"
num = [2.0]
den = [0.5, 1.0]
{delays}
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


def test_rig_file_dead_time_runs_through_the_engine(tmp_path: Path) -> None:
    from plantrig.sim import simulate
    path = tmp_path / "rig.toml"
    path.write_text(RIG.format(delays="input_delay = 0.1234"))
    rig = load_rig(path)
    data = simulate(rig)
    t = data.t
    closed = np.where(t >= 0.1234, 2.0 * (1 - np.exp(-(t - 0.1234) / 0.5)), 0.0)
    np.testing.assert_allclose(data["y:y"], closed, atol=1e-13)
    assert "dead time" in summarize(rig.plant, rig.tick).kind


@pytest.mark.parametrize(("delays", "key", "said"), [
    ("input_delay = -0.1", "plant.input_delay", "expected delays >= 0 s"),
    ("output_delay = [0.1, 0.2]", "plant.output_delay", "expected one number or 1"),
    ("input_delay = \"long\"", "plant.input_delay", "expected a number or a list"),
])
def test_dead_time_mistakes(tmp_path: Path, delays: str, key: str, said: str) -> None:
    path = tmp_path / "rig.toml"
    path.write_text(RIG.format(delays=delays))
    with pytest.raises(RigFileError) as info:
        load_rig(path)
    assert f"{key}: {said}" in str(info.value), str(info.value)
