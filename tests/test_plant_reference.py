"""Plant models and steppers against outside references (each source named)."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
import scipy.signal

from plantrig.sim import (
    DiscretePlant,
    LinearPlant,
    ModelError,
    OdePlant,
    make_stepper,
    simulate_inputs,
    summarize,
    zoh,
)

RNG = np.random.default_rng(20261201)


def random_system(n: int, m: int, p: int) -> LinearPlant:
    """A random stable system with a non-zero D (invented, for comparison only)."""
    a = RNG.normal(size=(n, n))
    a -= (np.max(np.linalg.eigvals(a).real) + 1.0) * np.eye(n)
    return LinearPlant.from_matrices(a, RNG.normal(size=(n, m)), RNG.normal(size=(p, n)),
                                     RNG.normal(size=(p, m)))


sys322 = random_system(3, 2, 2)
sys411 = random_system(4, 1, 1)
sys_sizes = pytest.mark.parametrize("plant", [sys322, sys411], ids=["sys322", "sys411"])


@sys_sizes
def test_zoh_matches_scipy_cont2discrete(plant: LinearPlant) -> None:
    # reference: scipy.signal.cont2discrete(method='zoh')
    ad, bd = zoh(plant.A, plant.B, 0.01)
    ref = scipy.signal.cont2discrete((plant.A, plant.B, plant.C, plant.D), 0.01, method="zoh")
    np.testing.assert_allclose(ad, ref[0], rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(bd, ref[1], rtol=1e-12, atol=1e-14)


@sys_sizes
def test_response_matches_scipy_lsim_and_python_control(plant: LinearPlant) -> None:
    dt, n_ticks = 0.005, 400
    t = np.arange(n_ticks) * dt
    u = np.column_stack([np.sin(3 * t + i) + (t > 0.3 * (i + 1)) for i in range(plant.shape[1])])
    x0 = RNG.normal(size=plant.shape[0])
    y, x = simulate_inputs(plant, dt, u, x0)
    # reference 1: scipy.signal.lsim with interp=False (input held over each step: ZOH)
    _, y_ref, x_ref = scipy.signal.lsim((plant.A, plant.B, plant.C, plant.D), u, t, X0=x0,
                                        interp=False)
    y_ref = y_ref.reshape(n_ticks, -1)
    scale = np.max(np.abs(y_ref))
    np.testing.assert_allclose(y, y_ref, rtol=1e-9, atol=1e-9 * scale)
    np.testing.assert_allclose(x, x_ref.reshape(n_ticks, -1), rtol=1e-9,
                               atol=1e-9 * np.max(np.abs(x_ref)))
    # reference 2: python-control forced_response of the ZOH-sampled system
    sysd = control.c2d(control.ss(plant.A, plant.B, plant.C, plant.D), dt, method="zoh")
    resp = control.forced_response(sysd, T=t, U=u.T, X0=x0)
    np.testing.assert_allclose(y, np.atleast_2d(resp.outputs).T, rtol=1e-9, atol=1e-9 * scale)


def test_state_space_objects_are_accepted() -> None:
    # python-control and scipy StateSpace objects go straight into the API
    ctl = control.ss(sys411.A, sys411.B, sys411.C, sys411.D)
    sp = scipy.signal.StateSpace(sys411.A, sys411.B, sys411.C, sys411.D)
    u = np.ones((50, 1))
    y_ctl, _ = simulate_inputs(ctl, 0.01, u)
    y_sp, _ = simulate_inputs(sp, 0.01, u)
    y_own, _ = simulate_inputs(sys411, 0.01, u)
    np.testing.assert_array_equal(y_ctl, y_own)
    np.testing.assert_array_equal(y_sp, y_own)
    sysd = control.c2d(ctl, 0.01)
    y_d, _ = simulate_inputs(sysd, 0.01, u)
    np.testing.assert_allclose(y_d, y_own, rtol=1e-12, atol=1e-12)


def test_transfer_function_matches_scipy_lsim() -> None:
    # G(s) = (2 s + 3) / (s^2 + 0.8 s + 4); reference: scipy.signal.lsim on the tf itself
    num, den = [2.0, 3.0], [1.0, 0.8, 4.0]
    plant = LinearPlant.from_transfer_function(num, den)
    dt, t = 0.01, np.arange(600) * 0.01
    u = (t > 0.5).astype(float)
    y, _ = simulate_inputs(plant, dt, u)
    _, y_ref, _ = scipy.signal.lsim((num, den), u, t, interp=False)
    np.testing.assert_allclose(y[:, 0], y_ref, rtol=1e-9, atol=1e-12)


def test_improper_transfer_function_is_refused() -> None:
    with pytest.raises(ModelError, match="improper"):
        LinearPlant.from_transfer_function([1.0, 0.0, 0.0], [1.0, 1.0])


def test_dimension_mismatch_is_named() -> None:
    with pytest.raises(ModelError, match=r"B: has shape \(2, 1\), expected \(3, m\)"):
        LinearPlant.from_matrices(np.eye(3), [[1.0], [0.0]], np.eye(3))
    with pytest.raises(ModelError, match=r"D: has shape \(1, 1\), expected \(3, 1\)"):
        LinearPlant.from_matrices(np.eye(3), np.ones((3, 1)), np.eye(3), [[0.0]])


def test_discrete_model_must_match_the_tick() -> None:
    plant = DiscretePlant.from_matrices([[0.9]], [[0.1]], [[1.0]], [[0.0]], dt=0.01)
    make_stepper(plant, 0.01)
    with pytest.raises(ModelError, match="differs from the rig tick"):
        make_stepper(plant, 0.02)


def test_first_order_reaches_63_percent_at_tau() -> None:
    # x' = (-x + K u) / tau: y(tau) = K (1 - e^-1) (first-order step response; any control
    # textbook, e.g. Ogata, Modern Control Engineering, 5th ed., section 5-2)
    tau, gain, dt = 0.25, 3.0, 0.001
    plant = LinearPlant.from_matrices([[-1 / tau]], [[gain / tau]], [[1.0]])
    n = int(round(tau / dt))
    y, _ = simulate_inputs(plant, dt, np.ones((n + 1, 1)))
    assert y[n, 0] == pytest.approx(gain * (1 - math.exp(-1)), rel=1e-9)


@pytest.mark.parametrize("zeta", [0.2, 0.5, 0.7])
def test_second_order_overshoot_and_peak_time(zeta: float) -> None:
    # G = wn^2 / (s^2 + 2 zeta wn s + wn^2): percent overshoot 100 exp(-zeta pi / sqrt(1-zeta^2)),
    # peak time pi / wd with wd = wn sqrt(1 - zeta^2) (Ogata, Modern Control Engineering,
    # 5th ed., section 5-3, transient-response specifications)
    wn, dt = 6.0, 1e-4
    plant = LinearPlant.from_transfer_function([wn**2], [1.0, 2 * zeta * wn, wn**2])
    n = int(3.0 / dt)
    y, _ = simulate_inputs(plant, dt, np.ones((n, 1)))
    y = y[:, 0]
    overshoot = (y.max() - 1.0) * 100
    wd = wn * math.sqrt(1 - zeta**2)
    assert overshoot == pytest.approx(100 * math.exp(-zeta * math.pi / math.sqrt(1 - zeta**2)),
                                      rel=1e-4)
    assert abs(np.argmax(y) * dt - math.pi / wd) <= dt


def torricelli_f(t, x, u, p):  # type: ignore[no-untyped-def]
    return np.array([-p["k"] * math.sqrt(max(x[0], 0.0))])


def torricelli_h(t, x, u, p):  # type: ignore[no-untyped-def]
    return np.array([x[0]])


def torricelli_exact(h0: float, k: float, t: float) -> float:
    # dh/dt = -k sqrt(h)  =>  sqrt(h) = sqrt(h0) - k t / 2 (Torricelli drain, closed form by
    # separation of variables)
    return (math.sqrt(h0) - k * t / 2) ** 2


@pytest.mark.parametrize(("method", "order"), [("rk4", 4.0), ("euler", 1.0)])
def test_observed_order_of_convergence(method: str, order: float) -> None:
    plant = OdePlant(torricelli_f, torricelli_h, 1, 1, 1, {"k": 0.4})
    h0, t_end, tick = 1.0, 2.0, 0.1
    errors = []
    for substeps in (4, 8, 16):
        stepper = make_stepper(plant, tick, [h0], method, substeps)
        for k in range(int(round(t_end / tick))):
            stepper.output_and_advance(k * tick)
        errors.append(abs(stepper.x[0] - torricelli_exact(h0, 0.4, t_end)))
    observed = [math.log2(errors[i] / errors[i + 1]) for i in range(2)]
    assert observed == pytest.approx([order, order], abs=0.15)


def test_feedthrough_moves_output_in_the_same_tick() -> None:
    # y = C x + D u: with D = 2, an input step at tick 5 shows in y at tick 5, not 6
    plant = LinearPlant.from_matrices([[-1.0]], [[1.0]], [[1.0]], [[2.0]])
    u = np.zeros((10, 1))
    u[5:] = 1.0
    y, x = simulate_inputs(plant, 0.01, u)
    assert y[4, 0] == 0.0
    assert y[5, 0] == pytest.approx(2.0 + x[5, 0])
    assert x[5, 0] == 0.0


def test_summary_against_numpy_and_python_control() -> None:
    plant = sys322
    s = summarize(plant, 0.001)
    np.testing.assert_allclose(np.sort_complex(s.eigenvalues),
                               np.sort_complex(np.linalg.eigvals(plant.A)))
    sysc = control.ss(plant.A, plant.B, plant.C, plant.D)
    assert s.controllability_rank == np.linalg.matrix_rank(control.ctrb(sysc.A, sysc.B))
    assert s.observability_rank == np.linalg.matrix_rank(control.obsv(sysc.A, sysc.C))
    assert s.stability.startswith("asymptotically stable")


def test_summary_warns_on_coarse_tick_and_uncontrollable_mode() -> None:
    # two decoupled modes, the second not reached by the input: rank 1 of 2
    plant = LinearPlant.from_matrices([[-100.0, 0.0], [0.0, -1.0]], [[1.0], [0.0]],
                                      [[1.0, 1.0]])
    s = summarize(plant, 0.01)  # tau_min = 10 ms; tick 10 ms > tau_min / 10
    assert s.controllability_rank == 1
    assert any("coarser than 1/10" in w for w in s.warnings)
    assert any("not controllable" in w for w in s.warnings)
    assert not any("coarser" in w for w in summarize(plant, 0.0005).warnings)
