"""Transfer functions: MIMO matrices realised minimally, zero-pole-gain form, unnamed
internal states, scipy and python-control objects; each against an outside reference."""

from __future__ import annotations

from pathlib import Path

import control
import numpy as np
import pytest
import scipy.signal

from plantrig.sim import LinearPlant, ModelError, RigFileError, load_rig, simulate_inputs

# G(s) = [[1/(s+1), (2s+1)/(s^2+3s+2)], [s/(s^2+2s+5), 3/(s+4)]] (invented for the test)
NUM = [[[1.0], [2.0, 1.0]], [[1.0, 0.0], [3.0]]]
DEN = [[[1.0, 1.0], [1.0, 3.0, 2.0]], [[1.0, 2.0, 5.0], [1.0, 4.0]]]


def frequency_response(plant: LinearPlant, s: complex) -> np.ndarray:
    n = plant.A.shape[0]
    return plant.C @ np.linalg.solve(s * np.eye(n) - plant.A, plant.B) + plant.D


def test_mimo_matches_python_control_frequency_response() -> None:
    plant = LinearPlant.from_transfer_function(NUM, DEN)
    reference = control.tf(NUM, DEN)            # python-control evaluates G(s) entrywise
    for s in (0.3j, 1.0 + 2.0j, 7.0j, -0.5 + 0.1j):
        np.testing.assert_allclose(frequency_response(plant, s), reference(s),
                                   rtol=1e-10, atol=1e-12)


def test_mimo_step_response_matches_scipy_lsim_by_superposition() -> None:
    plant = LinearPlant.from_transfer_function(NUM, DEN)
    dt, n = 0.01, 500
    t = np.arange(n) * dt
    u = np.column_stack([(t > 0.2).astype(float), np.sin(2 * t)])
    y, _ = simulate_inputs(plant, dt, u)
    # reference: scipy.signal.lsim (interp=False: input held over each step) per entry
    ref = np.zeros((n, 2))
    for i in range(2):
        for j in range(2):
            ref[:, i] += scipy.signal.lsim((NUM[i][j], DEN[i][j]), u[:, j], t,
                                           interp=False)[1]
    np.testing.assert_allclose(y, ref, rtol=1e-9, atol=1e-11)


@pytest.mark.parametrize(("num", "den", "degree"), [
    # the McMillan degree (the degree of the least common denominator of all minors of
    # G(s); Chen, Linear System Theory and Design, 3rd ed., section 7.6, from memory),
    # worked by hand beside each case
    ([[[1.0], [1.0]], [[1.0], [1.0]]], [[[1, 1.0], [1, 1.0]], [[1, 1.0], [1, 1.0]]], 1),
    # all four entries 1/(s+1): rank-one residue, one pole -> 1
    ([[[1.0], [1.0]]], [[[1, 1.0], [1, 2.0]]], 2),
    # [1/(s+1), 1/(s+2)]: two distinct poles -> 2
    ([[[1.0], [2.0]], [[1.0], [1.0]]], [[[1, 1.0], [1, 1.0]], [[1, 2.0], [1, 2.0]]], 2),
    # minors: the entries and det = -1/((s+1)(s+2)) -> lcd (s+1)(s+2) -> 2
    ([[[1.0], [0.0]], [[0.0], [1.0]]], [[[1, 1.0], [1.0]], [[1.0], [1, 1.0]]], 2),
    # diag(1/(s+1), 1/(s+1)): det 1/(s+1)^2 -> 2
    ([[[1.0, 1.0]]], [[[1.0, 3.0, 2.0]]], 1),
    # (s+1)/((s+1)(s+2)) = 1/(s+2): the common factor cancels -> 1
])
def test_realisation_is_minimal(num: list, den: list, degree: int) -> None:
    plant = LinearPlant.from_transfer_function(num, den)
    assert plant.shape[0] == degree
    reference = control.tf(num, den)
    for s in (0.5j, 2.0 + 1.0j):
        np.testing.assert_allclose(frequency_response(plant, s), reference(s), rtol=1e-10,
                                   atol=1e-12)
    ctrb = control.ctrb(plant.A, plant.B)
    obsv = control.obsv(plant.A, plant.C)
    assert np.linalg.matrix_rank(ctrb) == degree == np.linalg.matrix_rank(obsv)


def test_zero_pole_gain_matches_scipy() -> None:
    # G(s) = 4 (s + 1) / ((s + 2)(s^2 + 2 s + 10)); reference: scipy.signal.ZerosPolesGain
    zeros, poles, gain = [-1.0], [-2.0, -1.0 + 3.0j, -1.0 - 3.0j], 4.0
    plant = LinearPlant.from_zpk(zeros, poles, gain)
    dt, n = 0.01, 400
    t = np.arange(n) * dt
    u = (t > 0.1).astype(float)
    y, _ = simulate_inputs(plant, dt, u)
    ref = scipy.signal.lsim(scipy.signal.ZerosPolesGain(zeros, poles, gain), u, t,
                            interp=False)[1]
    np.testing.assert_allclose(y[:, 0], ref, rtol=1e-9, atol=1e-12)
    with pytest.raises(ModelError, match="conjugate"):
        LinearPlant.from_zpk([], [-1.0 + 1.0j], 1.0)


def test_simulate_inputs_takes_system_objects() -> None:
    dt, n = 0.02, 200
    t = np.arange(n) * dt
    u = np.column_stack([np.cos(t), (t > 1).astype(float)])
    own, _ = simulate_inputs(LinearPlant.from_transfer_function(NUM, DEN), dt, u)
    y_ctl, _ = simulate_inputs(control.tf(NUM, DEN), dt, u)      # python-control MIMO
    np.testing.assert_allclose(y_ctl, own, rtol=1e-12, atol=1e-12)
    siso = simulate_inputs(scipy.signal.TransferFunction([2.0, 1.0], [1.0, 3.0, 2.0]), dt,
                           u[:, :1])[0]
    ref = scipy.signal.lsim(([2.0, 1.0], [1.0, 3.0, 2.0]), u[:, 0], t, interp=False)[1]
    np.testing.assert_allclose(siso[:, 0], ref, rtol=1e-9, atol=1e-12)
    zpk = simulate_inputs(scipy.signal.ZerosPolesGain([-0.5], [-1.0, -2.0], 2.0), dt,
                          u[:, :1])[0]
    np.testing.assert_allclose(zpk, siso, rtol=1e-9, atol=1e-12)   # the same G(s)
    ctl_siso = simulate_inputs(control.tf([2.0, 1.0], [1.0, 3.0, 2.0]), dt, u[:, :1])[0]
    np.testing.assert_allclose(ctl_siso, siso, rtol=1e-9, atol=1e-12)
    # discrete: G(z) = 0.1 / (z - 0.9) with dt 0.02; reference scipy.signal.dlsim
    gz = scipy.signal.TransferFunction([0.1], [1.0, -0.9], dt=dt)
    yd = simulate_inputs(gz, dt, u[:, :1])[0]
    ref_d = scipy.signal.dlsim(gz, u[:, 0])[1]
    np.testing.assert_allclose(yd[:, 0], ref_d[:, 0], rtol=1e-12, atol=1e-14)
    yd_ctl = simulate_inputs(control.tf([0.1], [1.0, -0.9], dt), dt, u[:, :1])[0]
    np.testing.assert_allclose(yd_ctl, yd, rtol=1e-12, atol=1e-14)


RIG = """
[rig]
tick = 0.01
duration = 1.0

[plant]
kind = "transfer_function"
{plant}
inputs = [{{ name = "u1" }}, {{ name = "u2" }}]
outputs = [{{ name = "y1" }}, {{ name = "y2" }}]

[controller]
kind = "external"

[link]
kind = "serial"
port = "/dev/ttyUSB0"
lockstep = true
"""


def write(tmp_path: Path, plant: str) -> Path:
    path = tmp_path / "rig.toml"
    path.write_text(RIG.format(plant=plant))
    return path


def test_rig_file_mimo_transfer_function_names_its_states(tmp_path: Path) -> None:
    rig = load_rig(write(tmp_path, f"num = {NUM}\nden = {DEN}"))
    n = rig.plant.shape[0]
    assert n == 5        # McMillan degree: poles -1, -2, -1+-2j, -4, each once
    assert [s.name for s in rig.states] == [f"internal_{i}" for i in range(1, n + 1)]


@pytest.mark.parametrize(("plant", "key", "said"), [
    ("zeros = [[-1.0, 2.0]]\npoles = [-1.0, -2.0, -3.0]\ngain = 1.0", "plant.zeros",
     "conjugate"),
    ("zeros = [\"a\"]\npoles = [-1.0]\ngain = 1.0", "plant.zeros[0]", "[re, im] pair"),
    ("num = [1.0]\nden = [1.0, 1.0]\npoles = [-1.0]\ngain = 1.0", "plant.num", "both forms"),
    (f"num = {NUM}\nden = [1.0, 2.0]", "plant.den", "both as matrices"),
    ("num = [[[1.0, 0.0, 0.0], [1.0]], [[1.0], [1.0]]]\n"
     "den = [[[1.0, 1.0], [1.0]], [[1.0], [1.0]]]", "plant.num[0][0]", "improper"),
])
def test_transfer_function_mistakes_name_the_key(tmp_path: Path, plant: str, key: str,
                                                 said: str) -> None:
    with pytest.raises(RigFileError) as info:
        load_rig(write(tmp_path, plant))
    text = str(info.value)
    assert f"{key}:" in text and said in text, text
