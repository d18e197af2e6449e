"""The stiff fixed-step method (ROS2) on a classic stiff problem, against scipy's
solve_ivp(Radau) at tight tolerances, with its order of convergence shown."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.integrate

from plantrig.sim import OdePlant, make_stepper, summarize
from plantrig.sim.model._plant import ros2_stability


def robertson(t, x, u, p):  # type: ignore[no-untyped-def]
    """Robertson's chemical kinetics (Hairer & Wanner, Solving ODEs II, section IV.1;
    the rate constants 0.04, 1e4, 3e7 as there, from memory): eigenvalues near -1e4."""
    a, b, c = x
    return np.array([-0.04 * a + 1e4 * b * c,
                     0.04 * a - 1e4 * b * c - 3e7 * b * b,
                     3e7 * b * b])


def robertson_jacobian(t, x, u, p):  # type: ignore[no-untyped-def]
    a, b, c = x
    return np.array([[-0.04, 1e4 * c, 1e4 * b],
                     [0.04, -1e4 * c - 6e7 * b, -1e4 * b],
                     [0.0, 6e7 * b, 0.0]])


def plant(jacobian: bool) -> OdePlant:
    return OdePlant(robertson, lambda t, x, u, p: x.copy(), 3, 0, 3,
                    jacobian=robertson_jacobian if jacobian else None)


def reference(t0: float, t1: float, x0: np.ndarray) -> np.ndarray:
    sol = scipy.integrate.solve_ivp(lambda t, x: robertson(t, x, None, None), (t0, t1), x0,
                                    method="Radau", rtol=1e-12, atol=1e-16,
                                    jac=lambda t, x: robertson_jacobian(t, x, None, None))
    assert sol.success
    return sol.y[:, -1]


# start after the initial layer (t = 1), so the smooth stiff part shows the order
X1 = reference(0.0, 1.0, np.array([1.0, 0.0, 0.0]))
T_END = 11.0


def ros2_error(h: float, jacobian: bool) -> float:
    stepper = make_stepper(plant(jacobian), h, X1, "ros2", 1)
    steps = int(round((T_END - 1.0) / h))
    for k in range(steps):
        stepper.output_and_advance(1.0 + k * h)
    ref = reference(1.0, T_END, X1)
    return float(np.max(np.abs(stepper.x - ref) / np.maximum(np.abs(ref), 1e-6)))


@pytest.mark.parametrize("jacobian", [True, False], ids=["model_jacobian", "finite_differences"])
def test_ros2_converges_with_order_two_on_robertson(jacobian: bool) -> None:
    steps = [0.5, 0.25, 0.125, 0.0625]
    errors = [ros2_error(h, jacobian) for h in steps]
    orders = np.log2(np.array(errors[:-1]) / np.array(errors[1:]))
    print("ROS2 on Robertson, h:", steps, "relative error:", errors, "order:", orders)
    assert errors[-1] < 1e-4
    assert np.all(orders > 1.8) and np.all(orders < 2.3), orders


def test_rk4_at_the_same_tick_blows_up_and_the_summary_says_so() -> None:
    h = 0.0625
    summary_rk4 = summarize(plant(True), h, X1, "rk4", 1)
    summary_ros2 = summarize(plant(True), h, X1, "ros2", 1)
    assert any("rk4 makes the mode" in w for w in summary_rk4.warnings)
    assert not any("makes the mode" in w for w in summary_ros2.warnings)
    stepper = make_stepper(plant(True), h, X1, "rk4", 1)
    with np.errstate(all="ignore"):
        for k in range(40):
            stepper.output_and_advance(1.0 + k * h)
    assert not np.all(np.abs(stepper.x) < 10)          # RK4 left the bounded solution


def test_stability_function_is_l_stable() -> None:
    # A-stable: |R(iy)| <= 1 on the imaginary axis; L-stable: R(z) -> 0 as z -> -inf
    y = np.linspace(-1e4, 1e4, 20001)
    assert np.all(np.abs(ros2_stability(1j * y)) <= 1 + 1e-12)
    assert abs(ros2_stability(-1e9)) < 1e-8
    # the implementation is this R: one step on x' = lambda x
    lam, h = -37.0, 0.3
    linear = OdePlant(lambda t, x, u, p: lam * x, lambda t, x, u, p: x, 1, 0, 1,
                      jacobian=lambda t, x, u, p: np.array([[lam]]))
    stepper = make_stepper(linear, h, [1.0], "ros2", 1)
    stepper.output_and_advance(0.0)
    assert stepper.x[0] == pytest.approx(ros2_stability(lam * h), rel=1e-12)
