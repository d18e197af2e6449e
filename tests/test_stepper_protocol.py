"""The Stepper protocol's run changes: disturbance inputs and parameter changes, for every
LTI stepper and the ODE stepper, so the faults never need to know the model's kind."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pytest
import scipy.signal

from plantrig.sim import DiscretePlant, LinearPlant, OdePlant, make_stepper
from plantrig.sim.model._plant import Stepper

TICK = 0.01
A = np.array([[0.0, 1.0], [-4.0, -0.8]])     # a lightly damped pair (sys221 with E)
B = np.array([[0.0], [1.0]])
C = np.array([[1.0, 0.0]])
E = np.array([[0.3], [1.0]])


@dataclass(frozen=True)
class Disturbance:
    column: tuple[float, ...] = ()
    param: str = ""


def run(stepper: Stepper, u: np.ndarray, d: np.ndarray | None = None) -> np.ndarray:
    """x_k for k = 1..len(u), with the disturbance input set before every step."""
    xs = []
    for k, uk in enumerate(u):
        if d is not None:
            stepper.set_disturbance(0, float(d[k]))
        stepper.u[:] = uk
        stepper.output_and_advance(k * TICK)
        xs.append(stepper.x.copy())
    return np.array(xs)


def test_a_disturbance_is_an_input_beside_b() -> None:
    # x' = A x + B u + E d under ZOH equals the model with input [u; d]
    # (scipy.signal.cont2discrete, method 'zoh', on the augmented B)
    rng = np.random.default_rng(4)
    u, d = rng.normal(size=(300, 1)), np.repeat(rng.normal(size=30), 10)
    ad, bd, *_ = scipy.signal.cont2discrete((A, np.hstack([B, E]), C, np.zeros((1, 2))), TICK)
    x, expected = np.zeros(2), []
    for k in range(300):
        x = ad @ x + bd @ np.array([u[k, 0], d[k]])
        expected.append(x)
    plant = LinearPlant.from_matrices(A, B, C)
    dist = [Disturbance(column=tuple(E[:, 0]))]
    for model in (plant, plant.with_dead_time(0.0, 0.025)):  # output delay: x is the plant's
        stepper = make_stepper(model, TICK, disturbances=dist)
        np.testing.assert_allclose(run(stepper, u, d), expected, rtol=1e-10, atol=1e-13)


@pytest.mark.parametrize("kind", ["continuous", "dead_time", "discrete", "held"])
def test_a_parameter_change_is_the_model_built_with_it_and_clears_back(kind: str) -> None:
    changed_a = A.copy()
    changed_a[1, 0] *= 1.5
    changed_b = B * 0.5

    def plant(a: np.ndarray, b: np.ndarray) -> LinearPlant | DiscretePlant:
        if kind in ("discrete", "held"):
            ad, bd = a * 0.1 + np.eye(2), b * 0.1    # some discrete model
            return DiscretePlant.from_matrices(ad, bd, C, None, TICK * (4 if kind == "held"
                                                                       else 1))
        model = LinearPlant.from_matrices(a, b, C)
        return model.with_dead_time(0.013, 0.025) if kind == "dead_time" else model

    u = np.random.default_rng(2).normal(size=(200, 1))
    stepper = make_stepper(plant(A, B), TICK)
    stepper.change_parameters([(("A", 1, 0), lambda v: v * 1.5), (("B", 1, 0), lambda v: v / 2)])
    np.testing.assert_allclose(run(stepper, u), run(make_stepper(plant(changed_a, changed_b),
                                                                 TICK), u), rtol=1e-12)
    stepper.reset()
    stepper.change_parameters([])
    np.testing.assert_array_equal(run(stepper, u), run(make_stepper(plant(A, B), TICK), u))


def test_changes_compose_in_order_on_the_given_model() -> None:
    stepper = make_stepper(LinearPlant.from_matrices(A, B, C), TICK)
    stepper.change_parameters([(("A", 1, 1), lambda v: v * 2), (("A", 1, 1), lambda v: v - 1)])
    changed = A.copy()
    changed[1, 1] = A[1, 1] * 2 - 1
    u = np.ones((50, 1))
    np.testing.assert_allclose(run(stepper, u), run(make_stepper(
        LinearPlant.from_matrices(changed, B, C), TICK), u), rtol=1e-12)


def test_ode_disturbance_adds_to_its_parameter_and_changes_act_on_the_sum() -> None:
    # x' = -k x, one forward Euler step: x1 = x0 - h k x0 (Hairer, Norsett & Wanner,
    # Solving ODEs I, section I.7); the disturbance makes k = k0 + d, a change acts on that
    plant = OdePlant(lambda t, x, u, p: np.array([-p["k"] * x[0]]), lambda t, x, u, p: x,
                     1, 1, 1, {"k": 2.0})
    stepper = make_stepper(plant, TICK, [1.0], "euler", 1,
                           disturbances=[Disturbance(param="k")])
    stepper.set_disturbance(0, 0.5)
    stepper.change_parameters([("k", lambda v: v * 3)])
    stepper.output_and_advance(0.0)
    assert stepper.x[0] == pytest.approx(1.0 - TICK * (2.0 + 0.5) * 3)
    stepper.change_parameters([])          # the change cleared, the disturbance stays
    x1 = stepper.x[0]
    stepper.output_and_advance(TICK)
    assert stepper.x[0] == pytest.approx(x1 - TICK * 2.5 * x1)
    assert plant.params == {"k": 2.0}      # the plant itself never changes


def test_a_parameter_of_the_wrong_form_is_refused() -> None:
    from plantrig.sim import ModelError
    with pytest.raises(ModelError, match="A\\[row, col\\]"):
        make_stepper(LinearPlant.from_matrices(A, B, C), TICK).change_parameters(
            [("k", lambda v: v)])
