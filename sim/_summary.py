"""Model summary: modes, stability, controllability, observability, tick adequacy.

The tick rule: warn when the tick exceeds one tenth of the fastest time constant,
dt > tau_min / 10 with tau_min = 1 / max|lambda| (continuous eigenvalues). Ten samples
per fastest time constant is common practice for digital control and for a readable
record; ZOH itself is exact at any tick, so the warning is about what the controller
and the record can see, not about integration error. For ODE plants the substep must
also stay inside the explicit method's stability region on the real axis
(h*|lambda| < 2 for Euler, about 2.78 for classical RK4; Hairer, Norsett & Wanner,
Solving ODEs I, section IV.2 — the RK4 bound from memory), checked on a linearisation
at the initial state.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from plantrig.sim._plant import DiscretePlant, LinearPlant, OdePlant, Plant

TICK_FRACTION = 0.1
STABILITY_LIMIT = {"rk4": 2.78, "euler": 2.0}


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
            "warnings": list(self.warnings),
        }

    def lines(self) -> list[str]:
        """Human-readable summary, one fact per line."""
        out = [f"model: {self.kind}, {self.n_states} states, {self.n_inputs} inputs, "
               f"{self.n_outputs} outputs"]
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


def _jacobians(plant: OdePlant, x0: NDArray[np.float64]) -> tuple[NDArray[np.float64],
                                                                    NDArray[np.float64]]:
    """Central-difference linearisation at (x0, u = 0), t = 0."""
    n, m, _ = plant.shape
    u0 = np.zeros(m)
    A = np.zeros((n, n))
    B = np.zeros((n, m))
    for j in range(n):
        step = 1e-6 * max(1.0, abs(x0[j]))
        dx = np.zeros(n)
        dx[j] = step
        A[:, j] = (plant.dynamics(0.0, x0 + dx, u0, plant.params)
                   - plant.dynamics(0.0, x0 - dx, u0, plant.params)) / (2 * step)
    for j in range(m):
        du = np.zeros(m)
        du[j] = 1e-6
        B[:, j] = (plant.dynamics(0.0, x0, du, plant.params)
                   - plant.dynamics(0.0, x0, -du, plant.params)) / 2e-6
    return A, B


def summarize(plant: Plant, dt: float, x0: NDArray[np.float64] | None = None,
              method: str = "rk4", substeps: int = 1) -> ModelSummary:
    """Summarise ``plant`` as it will run at tick ``dt``."""
    n, m, p = plant.shape
    warnings: list[str] = []
    ctrb = obsv = None
    if isinstance(plant, LinearPlant):
        kind, A, B, C = "continuous LTI", plant.A, plant.B, plant.C
        eig = np.linalg.eigvals(A) if n else np.zeros(0, complex)
        cont_eig = eig
        ctrb = _rank(controllability_matrix(A, B))
        obsv = _rank(controllability_matrix(A.T, C.T))
    elif isinstance(plant, DiscretePlant):
        kind, A, B, C = f"discrete LTI (dt {plant.dt:g} s)", plant.Ad, plant.Bd, plant.C
        eig = np.linalg.eigvals(A) if n else np.zeros(0, complex)
        with np.errstate(divide="ignore"):
            cont_eig = np.log(eig.astype(complex)) / plant.dt
        ctrb = _rank(controllability_matrix(A, B))
        obsv = _rank(controllability_matrix(A.T, C.T))
    else:
        kind = f"nonlinear ODE ({method}, {substeps} substeps per tick), linearised at x0"
        A, _ = _jacobians(plant, np.zeros(n) if x0 is None else np.asarray(x0, float))
        eig = np.linalg.eigvals(A) if n else np.zeros(0, complex)
        cont_eig = eig

    if isinstance(plant, DiscretePlant):
        radius = np.abs(eig)
        stability = ("asymptotically stable (all |z| < 1)" if np.all(radius < 1 - 1e-12)
                     else "not asymptotically stable (some |z| >= 1)")
    else:
        real = cont_eig.real
        if np.all(real < -1e-12):
            stability = "asymptotically stable (all Re < 0)"
        elif np.any(real > 1e-12):
            stability = "unstable (some Re > 0)"
        else:
            stability = "marginally stable (eigenvalues on the imaginary axis)"

    magnitudes = np.abs(cont_eig[np.isfinite(cont_eig)])
    nonzero = magnitudes[magnitudes > 1e-12]
    time_constants = tuple(sorted(float(1 / v) for v in nonzero))
    if nonzero.size:
        fastest = float(nonzero.max())
        if dt > TICK_FRACTION / fastest:
            warnings.append(
                f"tick {dt:g} s is coarser than 1/10 of the fastest time constant "
                f"{1 / fastest:.4g} s; the controller and the record will not resolve that mode")
        if isinstance(plant, OdePlant):
            limit = STABILITY_LIMIT[method]
            if dt / substeps * fastest > limit:
                warnings.append(
                    f"substep {dt / substeps:g} s times fastest |lambda| {fastest:.4g} exceeds "
                    f"{method}'s stability limit {limit}; raise plant.substeps")
    if ctrb is not None and ctrb < n:
        warnings.append(f"not controllable: rank {ctrb} of {n}")
    if obsv is not None and obsv < n:
        warnings.append(f"not observable: rank {obsv} of {n}")
    return ModelSummary(kind, n, m, p, eig, time_constants, stability, ctrb, obsv,
                        tuple(warnings))
