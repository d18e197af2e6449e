"""Plant models and their fixed-step discretisation.

Every plant meets the engine through one contract (after python-control's
``dynamics``/``output`` pair): a *stepper* that, for the input held over one tick
(zero-order hold), gives the output of this tick and the state of the next:

    y_k     = h(t_k, x_k, u_k)        (D feed-through: u_k reaches y_k in the same tick)
    x_{k+1} = F(t_k, x_k, u_k)        (exact ZOH for LTI, RK4 or Euler substeps for ODEs)

The engine knows nothing of the model's kind.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

from plantrig.sim._deadtime import DelayedLinearStepper

Vector = NDArray[np.float64]
Matrix = NDArray[np.float64]
OdeFunction = Callable[[float, Vector, Vector, Mapping[str, Any]], Any]


class ModelError(ValueError):
    """A plant description that cannot be a model; ``key`` names the offending part."""

    def __init__(self, key: str, message: str) -> None:
        super().__init__(f"{key}: {message}")
        self.key = key
        self.reason = message


def _as_matrix(name: str, value: Any) -> Matrix:
    try:
        array = np.array(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ModelError(name, f"expected a matrix of numbers, found {value!r}") from exc
    if array.ndim == 0:
        array = array.reshape(1, 1)
    elif array.ndim == 1:
        array = array.reshape(1, -1) if name in ("C", "D") else array.reshape(-1, 1)
    if array.ndim != 2:
        raise ModelError(name, f"expected a 2-D matrix, found {array.ndim} dimensions")
    if not np.all(np.isfinite(array)):
        raise ModelError(name, "contains NaN or infinite entries")
    return array


def normalize_abcd(A: Any, B: Any, C: Any, D: Any) -> tuple[Matrix, Matrix, Matrix, Matrix]:
    """Check shapes once and say exactly what is wrong (after scipy's abcd_normalize)."""
    a, b, c = _as_matrix("A", A), _as_matrix("B", B), _as_matrix("C", C)
    n = a.shape[0]
    if a.shape != (n, n):
        raise ModelError("A", f"has shape {a.shape}, expected a square matrix")
    if b.shape[0] != n:
        raise ModelError("B", f"has shape {b.shape}, expected ({n}, m) to match A")
    if c.shape[1] != n:
        raise ModelError("C", f"has shape {c.shape}, expected (p, {n}) to match A")
    m, p = b.shape[1], c.shape[0]
    d = np.zeros((p, m)) if D is None else _as_matrix("D", D)
    if d.shape != (p, m):
        raise ModelError("D", f"has shape {d.shape}, expected ({p}, {m}) from C and B")
    return a, b, c, d


@dataclass(frozen=True)
class LinearPlant:
    """Continuous LTI plant x' = A x + B u, y = C x + D u."""

    A: Matrix
    B: Matrix
    C: Matrix
    D: Matrix
    input_delay: tuple[float, ...] = ()    # dead time per input, s (sim/_deadtime.py)
    output_delay: tuple[float, ...] = ()   # dead time per output, s

    @classmethod
    def from_matrices(cls, A: Any, B: Any, C: Any, D: Any = None) -> LinearPlant:
        return cls(*normalize_abcd(A, B, C, D))

    def with_dead_time(self, input_delay: Any = 0.0, output_delay: Any = 0.0) -> LinearPlant:
        """This plant with transport delays (seconds; one number for every channel, or one
        per input / output)."""
        _, m, p = self.shape
        delays = []
        for key, value, count in (("input_delay", input_delay, m),
                                  ("output_delay", output_delay, p)):
            array = np.broadcast_to(np.asarray(value, dtype=np.float64), (count,)) \
                if np.ndim(value) == 0 else np.asarray(value, dtype=np.float64)
            if array.shape != (count,):
                raise ModelError(key, f"expected one number or {count} (one per "
                                      f"{key.split('_')[0]}), found {len(array)}")
            if not np.all(np.isfinite(array)) or np.any(array < 0):
                raise ModelError(key, f"expected delays >= 0 s, found {array.tolist()}")
            delays.append(tuple(float(v) for v in array) if np.any(array > 0) else ())
        return dataclasses.replace(self, input_delay=delays[0], output_delay=delays[1])

    @property
    def has_dead_time(self) -> bool:
        return bool(self.input_delay or self.output_delay)

    @classmethod
    def from_transfer_function(cls, num: Any, den: Any) -> LinearPlant:
        """Transfer function num(s)/den(s), highest power first, to a minimal state space.

        SISO: two coefficient lists (scipy.signal.tf2ss, controllable canonical form).
        MIMO: two p x m matrices of coefficient lists, realised minimally
        (sim/_realise.py). A non-proper entry cannot be simulated causally and is refused.
        """
        from plantrig.sim._realise import tf_matrix_to_ss
        if is_tf_matrix(num) or is_tf_matrix(den):
            if not (is_tf_matrix(num) and is_tf_matrix(den)):
                raise ModelError("den", "expected num and den both as matrices of "
                                        "coefficient lists (MIMO) or both as lists (SISO)")
            return cls.from_matrices(*tf_matrix_to_ss(num, den))
        return cls.from_matrices(*tf_matrix_to_ss([[num]], [[den]], siso=True))

    @classmethod
    def from_zpk(cls, zeros: Any, poles: Any, gain: float) -> LinearPlant:
        """SISO k prod(s - z_i) / prod(s - p_i); complex roots come with their conjugates."""
        from plantrig.sim._realise import zpk_to_num_den
        num, den = zpk_to_num_den(list(zeros), list(poles), gain)
        return cls.from_transfer_function(num, den)

    @property
    def shape(self) -> tuple[int, int, int]:
        """(states, inputs, outputs)."""
        return self.A.shape[0], self.B.shape[1], self.C.shape[0]

    def dynamics(self, t: float, x: Vector, u: Vector, params: Mapping[str, Any]) -> Vector:
        return self.A @ x + self.B @ u

    def output(self, t: float, x: Vector, u: Vector, params: Mapping[str, Any]) -> Vector:
        return self.C @ x + self.D @ u


@dataclass(frozen=True)
class DiscretePlant:
    """Discrete LTI plant x[k+1] = Ad x[k] + Bd u[k], y = C x + D u, with its sample time."""

    Ad: Matrix
    Bd: Matrix
    C: Matrix
    D: Matrix
    dt: float

    @classmethod
    def from_matrices(cls, A: Any, B: Any, C: Any, D: Any, dt: float) -> DiscretePlant:
        a, b, c, d = normalize_abcd(A, B, C, D)
        if not (isinstance(dt, int | float) and dt > 0 and np.isfinite(dt)):
            raise ModelError("dt", f"expected a positive sample time in seconds, found {dt!r}")
        return cls(a, b, c, d, float(dt))

    @property
    def shape(self) -> tuple[int, int, int]:
        return self.Ad.shape[0], self.Bd.shape[1], self.C.shape[0]


@dataclass(frozen=True)
class OdePlant:
    """Nonlinear plant x' = f(t, x, u, p), y = h(t, x, u, p) with parameters p."""

    f: OdeFunction
    h: OdeFunction
    n_states: int
    n_inputs: int
    n_outputs: int
    params: dict[str, Any] = field(default_factory=dict)
    jacobian: OdeFunction | None = None    # df/dx (n x n); finite differences when None

    @property
    def shape(self) -> tuple[int, int, int]:
        return self.n_states, self.n_inputs, self.n_outputs

    def dynamics(self, t: float, x: Vector, u: Vector, params: Mapping[str, Any]) -> Vector:
        return np.asarray(self.f(t, x, u, params), dtype=np.float64)

    def output(self, t: float, x: Vector, u: Vector, params: Mapping[str, Any]) -> Vector:
        return np.asarray(self.h(t, x, u, params), dtype=np.float64)


Plant = LinearPlant | DiscretePlant | OdePlant


def is_tf_matrix(value: Any) -> bool:
    """A p x m matrix of coefficient lists (MIMO), as opposed to one list (SISO)."""
    return (isinstance(value, list | tuple) and len(value) > 0
            and all(isinstance(row, list | tuple) and len(row) > 0
                    and all(isinstance(e, list | tuple | np.ndarray) for e in row)
                    for row in value))


def zoh(A: Matrix, B: Matrix, dt: float) -> tuple[Matrix, Matrix]:
    """Exact zero-order-hold discretisation by one matrix exponential.

    expm([[A, B], [0, 0]] * dt) = [[Ad, Bd], [0, I]]  (Van Loan's block form; the same
    construction scipy.signal.cont2discrete uses for method='zoh').
    """
    n, m = B.shape
    block = np.zeros((n + m, n + m))
    block[:n, :n] = A
    block[:n, n:] = B
    phi = scipy.linalg.expm(block * dt)
    return phi[:n, :n].copy(), phi[:n, n:].copy()


class LinearStepper:
    """One tick of a discrete LTI model as a single matrix product.

    [x_{k+1}; y_k] = [[Ad, Bd], [C, D]] @ [x_k; u_k]. The engine writes u into the
    ``u`` view and reads ``x`` and ``y``; nothing is allocated per tick.
    """

    def __init__(self, Ad: Matrix, Bd: Matrix, C: Matrix, D: Matrix, x0: Vector,
                 xu: Vector | None = None) -> None:
        n, m, p = Ad.shape[0], Bd.shape[1], C.shape[0]
        self.n_states, self.n_inputs, self.n_outputs = n, m, p
        self._block = np.ascontiguousarray(np.block([[Ad, Bd], [C, D]]))
        # ``xu`` lets the engine keep [x; u] inside its tick record, saving two copies
        self._xu = np.zeros(n + m) if xu is None else xu
        self._next = np.zeros(n + p)
        self.x = self._xu[:n]
        self.u = self._xu[n:]
        self.y = self._next[n:]
        self.x_next = self._next[:n]
        self.x0 = np.array(x0, dtype=np.float64)
        self.reset()

    def reset(self) -> None:
        self.x[:] = self.x0
        self.u[:] = 0.0
        self._next[:] = 0.0

    def output_only(self, t: float) -> None:
        """Compute y from the present (x, u) without advancing."""
        np.dot(self._block[self.n_states:], self._xu, out=self.y)

    def set_dynamics(self, Ad: Matrix, Bd: Matrix) -> None:
        """Replace Ad and Bd in place (a parameter fault), keeping C, D and the state."""
        n = self.n_states
        self._block[:n, :n] = Ad
        self._block[:n, n:] = Bd

    def step(self, t: float) -> None:
        """Compute y_k and x_{k+1} from (x_k, u_k); x keeps x_k until commit()."""
        np.dot(self._block, self._xu, out=self._next)

    def commit(self) -> None:
        """Move x to x_{k+1} (after the tick has been recorded)."""
        self.x[:] = self.x_next

    def output_and_advance(self, t: float) -> None:
        """step() then commit(), for loops that record nothing in between."""
        np.dot(self._block, self._xu, out=self._next)
        self.x[:] = self.x_next


ODE_METHODS = ("rk4", "euler", "ros2")
ROS2_GAMMA = 1.0 + 1.0 / np.sqrt(2.0)


def ros2_stability(z: Any) -> Any:
    """R(z) of ROS2 on x' = lambda x, z = h lambda: L-stable (R -> 0 as z -> -inf)."""
    a = 1.0 / (1.0 - ROS2_GAMMA * z)
    b = (1.0 + z * a - 2.0 * a) / (1.0 - ROS2_GAMMA * z)
    return 1.0 + z * (1.5 * a + 0.5 * b)


def finite_difference_jacobian(f: Callable[[Vector], Vector], x: Vector, fx: Vector) -> Matrix:
    """Forward differences, step sqrt(eps) max(1, |x_j|) (common practice)."""
    n = x.size
    jac = np.empty((n, n))
    for j in range(n):
        step = 1.49e-8 * max(1.0, abs(x[j]))
        xp = x.copy()
        xp[j] += step
        jac[:, j] = (f(xp) - fx) / step
    return jac


class OdeStepper:
    """RK4, forward Euler or ROS2 with an integer number of substeps per tick, u held (ZOH).

    ROS2 is for stiff plants: the two-stage Rosenbrock method of Verwer, Spee, Blom and
    Hundsdorfer (SIAM J. Sci. Comput. 20, 1999) with gamma = 1 + 1/sqrt(2), second order
    and L-stable (Hairer & Wanner, Solving ODEs II, section IV.7 for Rosenbrock methods).
    It is linearly implicit: each substep costs one Jacobian, one LU factorisation of
    W = I - gamma h J and two solves, with no Newton iteration, so a tick takes the same
    work every time (what a real-time loop needs), and L-stability damps stiff modes
    instead of letting them ring. Its second order holds for f with no explicit time
    dependence inside a tick (u is held over the tick).
    """

    def __init__(self, plant: OdePlant, dt: float, method: str, substeps: int,
                 x0: Vector, xu: Vector | None = None) -> None:
        if method not in ODE_METHODS:
            raise ModelError("method", f"expected one of {', '.join(ODE_METHODS)}, "
                                       f"found {method!r}")
        if not (isinstance(substeps, int) and substeps >= 1):
            raise ModelError("substeps", f"expected a whole number >= 1, found {substeps!r}")
        self.plant = plant
        self.n_states, self.n_inputs, self.n_outputs = plant.shape
        self.h_step = dt / substeps
        self.substeps = substeps
        self.method = method
        n = self.n_states
        xu = np.zeros(n + self.n_inputs) if xu is None else xu
        self.x = xu[:n]
        self.u = xu[n:]
        self.y = np.zeros(self.n_outputs)
        self.x_next = np.zeros(n)
        self.x0 = np.array(x0, dtype=np.float64)
        self.params = dict(plant.params)   # a run's parameter faults change only this copy
        self.reset()

    def reset(self) -> None:
        self.x[:] = self.x0
        self.u[:] = 0.0
        self.y[:] = 0.0

    def output_only(self, t: float) -> None:
        """Compute y from the present (x, u) without advancing."""
        self.y[:] = self.plant.output(t, self.x, self.u, self.params)

    def step(self, t: float) -> None:
        """Compute y_k and x_{k+1} from (x_k, u_k); x keeps x_k until commit()."""
        f, p, u, h = self.plant.dynamics, self.params, self.u, self.h_step
        self.y[:] = self.plant.output(t, self.x, u, p)
        x = self.x.copy()
        for i in range(self.substeps):
            ti = t + i * h
            if self.method == "rk4":
                # classical fourth-order Runge-Kutta (Butcher tableau 1/6, 1/3, 1/3, 1/6)
                k1 = f(ti, x, u, p)
                k2 = f(ti + h / 2, x + h / 2 * k1, u, p)
                k3 = f(ti + h / 2, x + h / 2 * k2, u, p)
                k4 = f(ti + h, x + h * k3, u, p)
                x = x + h / 6 * (k1 + 2 * k2 + 2 * k3 + k4)
            elif self.method == "ros2":
                x = self._ros2(ti, x, h)
            else:
                x = x + h * f(ti, x, u, p)
        self.x_next[:] = x

    def _ros2(self, t: float, x: Vector, h: float) -> Vector:
        """One ROS2 substep: W k1 = f(x), W k2 = f(x + h k1) - 2 k1,
        x+ = x + 3/2 h k1 + 1/2 h k2, with W = I - gamma h J."""
        f, p, u = self.plant.dynamics, self.params, self.u
        fx = f(t, x, u, p)
        if self.plant.jacobian is not None:
            jac = np.asarray(self.plant.jacobian(t, x, u, p), dtype=np.float64)
        else:
            jac = finite_difference_jacobian(lambda z: f(t, z, u, p), x, fx)
        lu = scipy.linalg.lu_factor(np.eye(x.size) - ROS2_GAMMA * h * jac)
        k1 = scipy.linalg.lu_solve(lu, fx)
        k2 = scipy.linalg.lu_solve(lu, f(t + h, x + h * k1, u, p) - 2.0 * k1)
        return x + 1.5 * h * k1 + 0.5 * h * k2

    def commit(self) -> None:
        """Move x to x_{k+1} (after the tick has been recorded)."""
        self.x[:] = self.x_next

    def output_and_advance(self, t: float) -> None:
        """step() then commit(), for loops that record nothing in between."""
        self.step(t)
        self.commit()


def ticks_per_sample(sample_time: float, tick: float) -> int | None:
    """The whole number of ticks in a discrete model's sample time, or None."""
    ratio = sample_time / tick
    every = round(ratio)
    return every if every >= 1 and abs(ratio - every) <= 1e-9 * ratio else None


class HeldLinearStepper(LinearStepper):
    """A discrete model whose sample time is ``every`` ticks (multi-rate).

    On the tick of each model sample it reads u, gives y = C x + D u and computes the
    next model state; on the ticks in between the input is not read and state and
    output are held (zero-order hold), and the next state shows on the tick of the next
    sample.
    """

    def __init__(self, Ad: Matrix, Bd: Matrix, C: Matrix, D: Matrix, x0: Vector, every: int,
                 xu: Vector | None = None) -> None:
        self.every = every
        self._phase = 0
        self._pending = np.zeros(Ad.shape[0])
        self._y_held = np.zeros(C.shape[0])
        super().__init__(Ad, Bd, C, D, x0, xu)

    def reset(self) -> None:
        super().reset()
        self._phase = 0
        self._pending[:] = 0.0
        self._y_held[:] = 0.0

    def output_only(self, t: float) -> None:
        if self._phase == 0:
            super().output_only(t)
        else:
            self.y[:] = self._y_held

    def step(self, t: float) -> None:
        if self._phase == 0:
            np.dot(self._block, self._xu, out=self._next)
            self._pending[:] = self.x_next
        else:
            self.y[:] = self._y_held
        self.x_next[:] = self._pending if self._phase == self.every - 1 else self.x

    def commit(self) -> None:
        if self._phase == 0:
            self._y_held[:] = self.y
        self.x[:] = self.x_next
        self._phase = (self._phase + 1) % self.every

    def output_and_advance(self, t: float) -> None:
        self.step(t)
        self.commit()


Stepper = Any   # LinearStepper | OdeStepper | DelayedLinearStepper | FmuSlaveStepper


def make_stepper(plant: Plant, dt: float, x0: Any = None, method: str = "rk4",
                 substeps: int = 1, xu: Vector | None = None) -> Stepper:
    """Build the per-tick stepper for any plant kind at tick ``dt`` seconds.

    ``xu``, if given, is a float64 view of n + m elements the stepper keeps x and u in.
    """
    n = plant.shape[0]
    x_init = np.zeros(n) if x0 is None else np.array(x0, dtype=np.float64).reshape(-1)
    from plantrig.sim._fmu import FmuSlavePlant, FmuSlaveStepper  # no cycle: imported late
    if isinstance(plant, FmuSlavePlant):
        return FmuSlaveStepper(plant, dt, x_init, xu)
    if x_init.shape != (n,):
        raise ModelError("x0", f"has {x_init.size} entries, expected {n} (one per state)")
    if isinstance(plant, LinearPlant) and plant.has_dead_time:
        return DelayedLinearStepper(plant.A, plant.B, plant.C, plant.D, dt, plant.input_delay,
                                    plant.output_delay, x_init, xu)
    if isinstance(plant, LinearPlant):
        ad, bd = zoh(plant.A, plant.B, dt)
        return LinearStepper(ad, bd, plant.C, plant.D, x_init, xu)
    if isinstance(plant, DiscretePlant):
        every = ticks_per_sample(plant.dt, dt)
        if every is None:
            raise ModelError("dt", f"sample time {plant.dt} s differs from the rig tick {dt} s;"
                             " a discrete model runs at the tick or a whole multiple of it")
        if every > 1:
            return HeldLinearStepper(plant.Ad, plant.Bd, plant.C, plant.D, x_init, every, xu)
        return LinearStepper(plant.Ad, plant.Bd, plant.C, plant.D, x_init, xu)
    return OdeStepper(plant, dt, method, substeps, x_init, xu)


def from_state_space_object(system: Any) -> LinearPlant | DiscretePlant:
    """Accept a scipy.signal or python-control system object.

    StateSpace objects keep their matrices; scipy TransferFunction / ZerosPolesGain and
    python-control TransferFunction objects (SISO or MIMO) are realised minimally.
    Continuous systems (dt None or 0) become LinearPlant; discrete ones DiscretePlant.
    """
    dt = getattr(system, "dt", None)
    if dt is True:
        raise ModelError("system", "discrete system with unspecified sample time (dt=True)")
    if all(hasattr(system, k) for k in ("A", "B", "C", "D")):
        linear = LinearPlant.from_matrices(system.A, system.B, system.C, system.D)
    elif all(hasattr(system, k) for k in ("zeros", "poles", "gain")):
        linear = LinearPlant.from_zpk(system.zeros, system.poles, float(system.gain))
    elif hasattr(system, "num") and hasattr(system, "den"):
        num, den = system.num, system.den
        if is_tf_matrix(num):     # python-control: num[i][j] arrays
            linear = LinearPlant.from_transfer_function(
                [[list(e) for e in row] for row in num], [[list(e) for e in row] for row in den])
        else:                     # scipy: 1-D num, or 2-D (one row per output) over one den
            rows = np.atleast_2d(np.asarray(num, dtype=np.float64))
            linear = LinearPlant.from_transfer_function(
                [[list(r)] for r in rows], [[list(np.ravel(den))] for _ in rows]) \
                if rows.shape[0] > 1 else LinearPlant.from_transfer_function(rows[0], den)
    else:
        raise ModelError("system", f"{type(system).__name__} is not a state-space, transfer "
                                   "function or zero-pole-gain object")
    if dt is None or dt is False or dt == 0:
        return linear
    return DiscretePlant.from_matrices(linear.A, linear.B, linear.C, linear.D, float(dt))
