"""The model summary says true things: Jordan blocks, step-size regions, equilibria,
mistakes at x0, and a quiet end on a closed pipe (each check's source named)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.integrate
import scipy.linalg

from plantrig.sim import DiscretePlant, LinearPlant, OdePlant, make_stepper, summarize
from plantrig.sim.model._summary import STABILITY_FUNCTIONS, classify_stability

REPO = Path(__file__).resolve().parents[1]

# Chen, Linear System Theory and Design, 3rd ed., section 5.3, Example 5.5 (from memory):
# the first is marginally stable, the second (a 2x2 Jordan block at 0) is not.
CHEN_MARGINAL = np.array([[0.0, 0, 0], [0, 0, 0], [0, 0, -1]])
CHEN_JORDAN = np.array([[0.0, 1, 0], [0, 0, 0], [0, 0, -1]])
DOUBLE_INTEGRATOR = np.array([[0.0, 1.0], [0.0, 0.0]])


def free_response_growth(A: np.ndarray, discrete: bool, horizon: int = 1000) -> float:
    """max ||Phi(t)|| over a long horizon relative to ||Phi|| at its start, by the
    definition (scipy.linalg.expm for continuous, matrix powers for discrete)."""
    if discrete:
        norms = [np.linalg.norm(np.linalg.matrix_power(A, k), 2) for k in (10, horizon)]
    else:
        norms = [np.linalg.norm(scipy.linalg.expm(A * t), 2) for t in (10.0, float(horizon))]
    return norms[1] / norms[0]


@pytest.mark.parametrize(("A", "discrete", "word"), [
    (CHEN_MARGINAL, False, "marginally stable"),
    (CHEN_JORDAN, False, "unstable"),
    (DOUBLE_INTEGRATOR, False, "unstable"),
    (np.array([[0.0, 1.0], [-4.0, 0.0]]), False, "marginally stable"),
    (np.array([[-1.0, 1.0], [0.0, -1.0]]), False, "asymptotically stable"),
    # discrete twins (Chen Thm 5.D4): the Jordan block now sits at z = 1
    (np.eye(3) + CHEN_MARGINAL * 0.5, True, "marginally stable"),
    (np.eye(3) + np.array([[0.0, 1, 0], [0, 0, 0], [0, 0, -0.5]]), True, "unstable"),
    (np.array([[1.0, 0.01], [0.0, 1.0]]), True, "unstable"),
    (np.array([[-1.0, 0.0], [0.0, 1.0]]), True, "marginally stable"),
    (np.array([[0.5, 1.0], [0.0, 0.5]]), True, "asymptotically stable"),
])
def test_stability_with_jordan_blocks_matches_the_definition(A: np.ndarray, discrete: bool,
                                                             word: str) -> None:
    said = classify_stability(A, discrete)
    assert said.startswith(word), said
    growth = free_response_growth(A, discrete)
    if word == "unstable":
        assert growth > 5.0         # the free response really grows
    elif word == "marginally stable":
        assert 0.5 < growth < 1.5   # bounded, does not die out
    else:
        assert growth < 1e-3


def test_jordan_block_found_after_a_similarity_transform() -> None:
    """Floating point splits a Jordan block's eigenvalue (by about sqrt(eps) for size 2);
    the test must still see the block and must not call simple modes unstable."""
    rng = np.random.default_rng(5)
    oscillator = np.array([[0.0, 1.0], [-1.0, 0.0]])
    repeated_jordan = np.block([[oscillator, np.eye(2)], [np.zeros((2, 2)), oscillator]])
    repeated_simple = scipy.linalg.block_diag(oscillator, oscillator)
    for _ in range(5):
        q, _ = np.linalg.qr(rng.normal(size=(4, 4)))
        assert "Jordan block of size 2" in classify_stability(q @ repeated_jordan @ q.T, False)
        assert classify_stability(q @ repeated_simple @ q.T, False).startswith("marginally")
        q3, _ = np.linalg.qr(rng.normal(size=(3, 3)))
        triple = np.diag([1.0, 1.0], 1)
        assert "size 3" in classify_stability(q3 @ triple @ q3.T, False)


def test_double_integrator_continuous_and_discrete_agree() -> None:
    """1/s^2 and its ZOH discretisation: the same word for the same physics."""
    plant = LinearPlant.from_transfer_function([1.0], [1.0, 0.0, 0.0])
    cont = summarize(plant, 0.01).stability
    ad = np.array([[1.0, 0.01], [0.0, 1.0]])
    disc = summarize(DiscretePlant.from_matrices(ad, [[5e-5], [0.01]], [[1.0, 0.0]], None,
                                                 0.01), 0.01).stability
    assert cont.startswith("unstable") and "grows like t" in cont
    assert disc.startswith("unstable") and "grows like k" in disc


def pendulum(g_over_l: float, damping: float, linear: bool = False) -> OdePlant:
    """theta'' = -(g/l) sin(theta) - c theta' + u (a textbook pendulum), or its
    linearisation (the damped oscillator) with ``linear``."""
    def f(t, x, u, p):  # type: ignore[no-untyped-def]
        spring = x[0] if linear else np.sin(x[0])
        return np.array([x[1], -g_over_l * spring - damping * x[1] + u[0]])

    def h(t, x, u, p):  # type: ignore[no-untyped-def]
        return x[:1].copy()
    return OdePlant(f, h, 2, 1, 1)


def grow_ratio(plant: OdePlant, tick: float, method: str, substeps: int, n: int) -> float:
    stepper = make_stepper(plant, tick, [0.05, 0.0], method, substeps)
    peak_first = peak_last = 0.0
    for k in range(n):
        stepper.output_and_advance(k * tick)
        if k < n // 10:
            peak_first = max(peak_first, abs(stepper.x[0]))
        if k >= n - n // 10:
            peak_last = max(peak_last, abs(stepper.x[0]))
    return peak_last / peak_first


def test_euler_on_a_lightly_damped_pendulum_is_warned() -> None:
    # omega_n = pi rad/s, zeta = 0.01: h = 0.05 s keeps h |lambda| = 0.16, far below the
    # real-axis bound 2, yet |1 + h lambda| = 1.0107 (outside forward Euler's disc)
    plant = pendulum(np.pi**2, 2 * 0.01 * np.pi)
    lam = np.linalg.eigvals([[0.0, 1.0], [-np.pi**2, -2 * 0.01 * np.pi]])
    assert abs(1 + 0.05 * lam[0]) > 1.01
    summary = summarize(plant, 0.05, np.zeros(2), "euler", 1)
    warning = [w for w in summary.warnings if "grow by |R(h lambda)|" in w]
    assert warning, summary.warnings
    assert f"{abs(1 + 0.05 * lam[0]):.6g}" in warning[0]
    assert grow_ratio(plant, 0.05, "euler", 1, 400) > 1.2        # the simulation grows ...
    ref = scipy.integrate.solve_ivp(lambda t, x: plant.dynamics(t, x, np.zeros(1), {}),
                                    (0, 20), [0.05, 0.0], rtol=1e-10, atol=1e-12)
    assert np.max(np.abs(ref.y[0][-50:])) < 0.05                # ... the plant decays
    needed = int(warning[0].split("at least ")[1].split()[0])
    assert not any("grow by" in w for w in summarize(plant, 0.05, np.zeros(2), "euler",
                                                     needed).warnings)
    assert any("grow by" in w for w in summarize(plant, 0.05, np.zeros(2), "euler",
                                                 needed - 1).warnings)


def test_rk4_outside_its_region_off_the_real_axis_is_warned() -> None:
    # zeta = 0.54, h omega_n = 2.7: h |lambda| = 2.7 < 2.78 (the real-axis bound), but
    # |R(h lambda)| > 1 for the complex pair
    wn, zeta, h = 27.0, 0.54, 0.1
    plant = pendulum(wn**2, 2 * zeta * wn, linear=True)
    summary = summarize(plant, h, np.zeros(2), "rk4", 1)
    assert any("rk4 makes the mode" in w for w in summary.warnings), summary.warnings
    assert grow_ratio(plant, h, "rk4", 1, 100) > 1e3
    assert not any("grow by" in w for w in summarize(plant, h, np.zeros(2), "rk4",
                                                     2).warnings)
    assert grow_ratio(plant, h, "rk4", 2, 100) < 1e-3


def test_stability_functions_are_the_textbook_polynomials() -> None:
    # Hairer & Wanner, Solving ODEs II, section IV.2: R(z) = sum z^j / j! up to the order
    # for explicit RK with s = p <= 4; checked here against one step on x' = lambda x
    plant = OdePlant(lambda t, x, u, p: -0.3 * x, lambda t, x, u, p: x, 1, 0, 1)
    for method in ("euler", "rk4"):
        stepper = make_stepper(plant, 0.7, [1.0], method, 1)
        stepper.output_and_advance(0.0)
        z = np.array([0.7 * -0.3 + 0j])
        assert stepper.x[0] == pytest.approx(STABILITY_FUNCTIONS[method](z)[0].real, rel=1e-14)


def van_der_pol(mu: float) -> OdePlant:
    def f(t, x, u, p):  # type: ignore[no-untyped-def]
        return np.array([x[1], mu * (1 - x[0] ** 2) * x[1] - x[0] + u[0]])
    return OdePlant(f, lambda t, x, u, p: x[:1].copy(), 2, 1, 1)


def test_non_equilibrium_x0_is_said_as_such() -> None:
    plant = van_der_pol(1.0)
    at_2 = summarize(plant, 0.01, np.array([2.0, 0.0]))
    assert at_2.stability.startswith("not judged: x0 is not an equilibrium")
    assert at_2.x0_is_equilibrium is False
    # the origin is an equilibrium; its linearisation [[0, 1], [-1, mu]] has Re = mu/2 > 0
    at_0 = summarize(plant, 0.01, np.zeros(2))
    assert at_0.x0_is_equilibrium is True
    assert at_0.stability.startswith("unstable") and "equilibrium x0" in at_0.stability


def test_one_sided_difference_where_f_has_no_left_side() -> None:
    # sqrt(x) at x0 = 0: NaN to the left, finite to the right; no crash, a finite result
    plant = OdePlant(lambda t, x, u, p: np.array([u[0] - np.sqrt(x[0])]),
                     lambda t, x, u, p: x.copy(), 1, 1, 1)
    with np.errstate(invalid="ignore"):
        summary = summarize(plant, 0.01, np.array([0.0]))
    assert np.all(np.isfinite(summary.eigenvalues))


NAN_RIG = """
[rig]
tick = 0.01
duration = 1.0

[plant]
kind = "ode"
module = "model.py"
dynamics = "f"
output = "h"
x0 = [1.0]
states = [{ name = "x" }]
inputs = [{ name = "u" }]
outputs = [{ name = "y" }]

[controller]
kind = "open_loop"
"""


@pytest.mark.parametrize(("body", "key", "said"), [
    ("return np.array([np.log(x[0] - 1.0) * 0.0 + np.nan])", "plant.dynamics", "NaN"),
    ("raise ZeroDivisionError('division by zero')", "plant.dynamics", "ZeroDivisionError"),
])
def test_nan_or_exception_at_x0_is_a_rig_file_mistake(tmp_path: Path, body: str, key: str,
                                                      said: str) -> None:
    (tmp_path / "model.py").write_text(
        "import numpy as np\n\n\ndef f(t, x, u, p):\n    " + body
        + "\n\n\ndef h(t, x, u, p):\n    return x\n")
    rig = tmp_path / "rig.toml"
    rig.write_text(NAN_RIG)
    proc = subprocess.run([sys.executable, "-m", "plantrig", "check", str(rig)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr
    assert f"{rig}: {key}:" in proc.stderr and said in proc.stderr, proc.stderr


def test_check_into_a_closed_pipe_ends_quietly() -> None:
    """plantrig check RIG | head: no BrokenPipeError traceback, whenever the reader quits."""
    for rig in ("conveyor.toml", "tank.toml"):
        for _ in range(2):
            proc = subprocess.Popen([sys.executable, "-m", "plantrig", "check",
                                     str(REPO / "configs" / rig)],
                                    stdout=subprocess.PIPE, stderr=subprocess.PIPE)
            assert proc.stdout is not None and proc.stderr is not None
            proc.stdout.readline()
            proc.stdout.close()          # the reader quits after one line
            err = proc.stderr.read().decode()
            code = proc.wait(timeout=60)
            assert "Traceback" not in err and "BrokenPipe" not in err, err
            assert code in (0, 141), (code, err)
