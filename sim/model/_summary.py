"""Model summary: modes, stability, controllability, observability, tick adequacy.

Stability follows the eigenvalue tests with the Jordan-block condition (Chen, Linear
System Theory and Design, 3rd ed., section 5.3, Thm 5.4 for x' = A x and Thm 5.D4 for
x[k+1] = A x[k]): asymptotically stable when every eigenvalue has Re < 0 (|z| < 1);
marginally stable when, in addition to those, eigenvalues on the imaginary axis (the
unit circle) are simple roots of the minimal polynomial, i.e. each sits in Jordan blocks
of size 1 (geometric multiplicity = algebraic multiplicity); otherwise unstable. The
double integrator 1/s^2 (a 2x2 Jordan block at 0) is therefore unstable, and so is its
discrete twin with a Jordan block at z = 1: its free response grows like t (like k).
Numerically, eigenvalues closer than 1e-4 * max(1, ||A||) count as one repeated
eigenvalue (a Jordan block of size b splits by about eps^(1/b) in floating point, so a
size-3 block at 0 shows as three eigenvalues about 6e-6 apart); their mean, accurate to
rounding, is on the boundary when within 1e-9 * max(1, ||A||) of it, and the Jordan
test uses the ranks of the powers of A - lambda I.

The tick rule: warn when the tick exceeds one tenth of the fastest time constant,
dt > tau_min / 10 with tau_min = 1 / max|lambda| (continuous eigenvalues). Ten samples
per fastest time constant is common practice for digital control and for a readable
record; ZOH itself is exact at any tick, so the warning is about what the controller
and the record can see, not about integration error. A discrete model is defined at its
own sample time, so it gets no such warning there.

The substep rule for ODE plants: a fixed-step method maps a mode x' = lambda x to
x+ = R(h lambda) x with its stability function R (Hairer & Wanner, Solving ODEs II,
section IV.2: R(z) = 1 + z for forward Euler, R(z) = 1 + z + z^2/2 + z^3/6 + z^4/24 for
classical RK4; ROS2's rational R is in sim/model/_plant.py, L-stable). A mode that does not
grow in the model (Re lambda <= 0) must not grow in the simulation: |R(h lambda)| <= 1
for every eigenvalue in the complex plane, not only on the real axis (a lightly damped
pair leaves forward Euler's disc long before h |lambda| reaches 2). The check uses a
linearisation at the initial state x0 and the input 0; at a state that is not an
equilibrium the summary says so and judges no stability.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.model._plant import Plant, make_stepper, ros2_stability

TICK_FRACTION = 0.1
BOUNDARY_TOL = 1e-9     # relative to max(1, ||A||): "on the imaginary axis / unit circle"
CLUSTER_TOL = 1e-4      # eigenvalues closer than this (relative) count as one repeated one
EQUILIBRIUM_TOL = 1e-9       # |f(x0, 0)| relative to max(1, ||J|| ||x0||)
MAX_SUGGESTED_SUBSTEPS = 100_000

Complex = NDArray[np.complex128]


def _r_euler(z: Complex) -> Complex:
    return 1 + z


def _r_rk4(z: Complex) -> Complex:
    return 1 + z + z**2 / 2 + z**3 / 6 + z**4 / 24


STABILITY_FUNCTIONS: dict[str, Callable[[Complex], Complex]] = {
    "euler": _r_euler, "rk4": _r_rk4, "ros2": ros2_stability}


def register_stability_function(method: str, r: Callable[[Complex], Complex]) -> None:
    """Let a fixed-step method defined elsewhere take part in the substep check."""
    STABILITY_FUNCTIONS[method] = r


@dataclass(frozen=True)
class ModelSummary:
    kind: str
    n_states: int
    n_inputs: int
    n_outputs: int
    eigenvalues: NDArray[np.complex128]
    time_constants: tuple[float, ...]
    stability: str
    controllability_rank: int | None
    observability_rank: int | None
    warnings: tuple[str, ...] = field(default=())
    x0_is_equilibrium: bool | None = None   # None: not asked (linear models)

    def as_dict(self) -> dict[str, object]:
        return {
            "kind": self.kind,
            "states": self.n_states,
            "inputs": self.n_inputs,
            "outputs": self.n_outputs,
            "eigenvalues": [[float(e.real), float(e.imag)] for e in self.eigenvalues],
            "time_constants_s": list(self.time_constants),
            "stability": self.stability,
            "controllability_rank": self.controllability_rank,
            "observability_rank": self.observability_rank,
            "x0_is_equilibrium": self.x0_is_equilibrium,
            "warnings": list(self.warnings),
        }

    def lines(self) -> list[str]:
        """Human-readable summary, one fact per line."""
        out = [f"model: {self.kind}, {_count(self.n_states, 'state')}, "
               f"{_count(self.n_inputs, 'input')}, {_count(self.n_outputs, 'output')}"]
        for e in self.eigenvalues:
            out.append(f"  eigenvalue {e.real:+.6g} {e.imag:+.6g}j")
        if self.time_constants:
            tcs = ", ".join(f"{tc:.6g}" for tc in self.time_constants)
            out.append(f"  time constants [s]: {tcs}")
        out.append(f"  stability: {self.stability}")
        if self.controllability_rank is not None:
            out.append(f"  controllability rank: {self.controllability_rank} of {self.n_states}")
            out.append(f"  observability rank: {self.observability_rank} of {self.n_states}")
        out.extend(f"  warning: {w}" for w in self.warnings)
        return out


def controllability_matrix(A: NDArray[np.float64], B: NDArray[np.float64]) -> NDArray[np.float64]:
    """[B, AB, A^2 B, ..., A^(n-1) B] (Kalman's rank test)."""
    n = A.shape[0]
    blocks, current = [], B
    for _ in range(n):
        blocks.append(current)
        current = A @ current
    return np.hstack(blocks) if blocks else np.zeros((0, B.shape[1]))


def _rank(matrix: NDArray[np.float64]) -> int:
    return int(np.linalg.matrix_rank(matrix)) if matrix.size else 0


def classify_stability(A: NDArray[np.float64], discrete: bool) -> str:
    """Lyapunov stability of x' = A x (or x[k+1] = A x[k]), Jordan blocks included."""
    n = A.shape[0]
    if n == 0:
        return "static (no states)"
    scale = max(1.0, float(np.linalg.norm(A, 1)))
    where = "on the unit circle" if discrete else "on the imaginary axis"
    inside = "|z| < 1" if discrete else "Re < 0"
    verdict = f"asymptotically stable (all {inside})"
    for lam, k in _eigenvalue_clusters(np.linalg.eigvals(A).astype(np.complex128),
                                       CLUSTER_TOL * scale):
        margin = abs(lam) - 1.0 if discrete else lam.real     # > 0: outside the region
        if margin > BOUNDARY_TOL * scale:
            return f"unstable ({'some |z| > 1' if discrete else 'some Re > 0'})"
        if margin < -BOUNDARY_TOL * scale:
            continue
        size = _largest_jordan_block(A, lam, k, CLUSTER_TOL * scale)
        if size > 1:
            growth = "k" if discrete else "t"
            grows = growth if size == 2 else f"{growth}^{size - 1}"
            return (f"unstable (eigenvalue {_complex_text(lam)} {where} sits in a Jordan block "
                    f"of size {size}: the free response grows like {grows})")
        verdict = (f"marginally stable (eigenvalues {where} are simple roots of the minimal "
                   f"polynomial, the rest {inside})")
    return verdict


def _eigenvalue_clusters(eig: NDArray[np.complex128],
                         tol: float) -> list[tuple[complex, int]]:
    """Eigenvalues closer than ``tol`` as one repeated eigenvalue: (mean, multiplicity).

    The mean of a split cluster is accurate to rounding (it is a trace), the members
    are not (a Jordan block of size b splits by about eps^(1/b)).
    """
    left = list(eig)
    out = []
    while left:
        cluster = [left.pop(0)]
        grew = True
        while grew:
            near = [e for e in left if min(abs(e - c) for c in cluster) <= tol]
            left = [e for e in left if min(abs(e - c) for c in cluster) > tol]
            cluster += near
            grew = bool(near)
        out.append((complex(np.mean(cluster)), len(cluster)))
    return out


def _largest_jordan_block(A: NDArray[np.float64], lam: complex, k: int, tol: float) -> int:
    """Smallest j with rank((A - lam I)^j) = n - k: the largest Jordan block at lam."""
    n = A.shape[0]
    shifted = A - lam * np.eye(n)
    power = np.eye(n, dtype=complex)
    scale = max(1.0, float(np.linalg.norm(A, 1)))
    for size in range(1, k + 1):
        power = power @ shifted
        if np.linalg.matrix_rank(power, tol=tol * scale ** (size - 1)) <= n - k:
            return size
    return k


def _complex_text(value: complex) -> str:
    re = 0.0 if abs(value.real) < 1e-12 else value.real
    im = 0.0 if abs(value.imag) < 1e-12 else value.imag
    return f"{re:g}" if im == 0 else f"{re:g}{im:+g}j"


def substep_warnings(eig: NDArray[np.complex128], h: float, method: str,
                     substeps: int) -> list[str]:
    """Modes that do not grow in the model but would grow under ``method`` at step h."""
    r = STABILITY_FUNCTIONS.get(method)
    if r is None or eig.size == 0:
        return []
    calm = eig[eig.real <= CLUSTER_TOL * max(1.0, float(np.max(np.abs(eig))))]
    if calm.size == 0:
        return []
    gain = np.abs(r(h * calm))
    worst = int(np.argmax(gain))
    if gain[worst] <= 1.0 + 1e-12:
        return []
    lam = complex(calm[worst])
    tick = h * substeps
    needed = _substeps_needed(calm, tick, r)
    advice = (f"raise plant.substeps to at least {needed}" if needed is not None else
              "no substep count makes it decay (forward Euler on an undamped oscillation); "
              "use method = \"rk4\"")
    return [f"substep {h:g} s: {method} makes the mode {_complex_text(lam)} grow by "
            f"|R(h lambda)| = {gain[worst]:.6g} per substep while the model's mode does not "
            f"grow ({int(np.sum(gain > 1.0 + 1e-12))} of {eig.size} eigenvalues outside the "
            f"method's stability region); {advice}"]


def _substeps_needed(calm: NDArray[np.complex128], tick: float,
                     r: Callable[[Complex], Complex]) -> int | None:
    """The fewest substeps per tick that keep every calm mode inside the region."""
    def ok(count: int) -> bool:
        return bool(np.all(np.abs(r(tick / count * calm)) <= 1.0 + 1e-12))

    high = 1
    while not ok(high):
        high *= 2
        if high > MAX_SUGGESTED_SUBSTEPS:
            return None
    low = max(1, high // 2)
    while low < high:
        mid = (low + high) // 2
        if ok(mid):
            high = mid
        else:
            low = mid + 1
    return high


def summarize(plant: Plant, dt: float, x0: NDArray[np.float64] | None = None,
              method: str = "rk4", substeps: int = 1) -> ModelSummary:
    """Summarise ``plant`` as it will run at tick ``dt``: the linear form of its stepper.

    Raises ModelError when an ODE's f raises or is not finite at x0 (a rig-file mistake).
    """
    stepper = make_stepper(plant, dt, x0, method, substeps)
    n, m, p = stepper.n_states, stepper.n_inputs, stepper.n_outputs
    form = stepper.linear_form()
    A = form.A
    if A is None:
        return ModelSummary(form.kind, n, m, p, np.zeros(0, complex), (),
                            f"not judged ({form.unjudged})", None, None, form.warnings, None)
    warnings: list[str] = []
    eig = np.linalg.eigvals(A).astype(np.complex128) if n else np.zeros(0, np.complex128)
    cont_eig = eig
    if form.sample_time is not None:
        with np.errstate(divide="ignore"):
            cont_eig = np.log(eig.astype(complex)) / form.sample_time
    ctrb = _rank(controllability_matrix(A, form.B)) if form.B is not None else None
    obsv = _rank(controllability_matrix(A.T, form.C.T)) if form.C is not None else None
    equilibrium: bool | None = None
    if form.drift is None:
        stability = classify_stability(A, discrete=form.sample_time is not None)
    else:
        x_lin = form.x0 if form.x0 is not None else np.zeros(n)
        residual = float(np.max(np.abs(form.drift))) if n else 0.0
        scale = max(1.0, float(np.linalg.norm(A, 1)) * float(np.max(np.abs(x_lin), initial=0)))
        equilibrium = residual <= EQUILIBRIUM_TOL * scale
        if equilibrium:
            stability = classify_stability(A, discrete=False) + " at the equilibrium x0"
        else:
            stability = (f"not judged: x0 is not an equilibrium for u = 0 (max |f(x0, 0)| = "
                         f"{residual:.4g}); the eigenvalues are the local linearisation's")

    magnitudes = np.abs(cont_eig[np.isfinite(cont_eig)])
    nonzero = magnitudes[magnitudes > 1e-12]
    time_constants = tuple(sorted(float(1 / v) for v in nonzero))
    if nonzero.size and form.sample_time is None:  # a discrete model is defined at its own
        fastest = float(nonzero.max())
        if dt > TICK_FRACTION / fastest:
            warnings.append(
                f"tick {dt:g} s is coarser than 1/10 of the fastest time constant "
                f"{1 / fastest:.4g} s; the controller and the record will not resolve that mode")
    if form.method:
        warnings.extend(substep_warnings(eig, form.substep, form.method, form.substeps))
    if ctrb is not None and ctrb < n:
        warnings.append(f"not controllable: rank {ctrb} of {n}")
    if obsv is not None and obsv < n:
        warnings.append(f"not observable: rank {obsv} of {n}")
    return ModelSummary(form.kind, n, m, p, eig, time_constants, stability, ctrb, obsv,
                        tuple(warnings), equilibrium)


def _count(n: int, noun: str) -> str:
    """'1 input', '2 inputs'."""
    return f"{n} {noun}{'' if n == 1 else 's'}"
