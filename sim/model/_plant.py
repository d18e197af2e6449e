"""Plant models and their fixed-step discretisation.

Every plant meets the engine through one contract (after python-control's
``dynamics``/``output`` pair): a *stepper* that, for the input held over one tick
(zero-order hold), gives the output of this tick and the state of the next:

    y_k     = h(t_k, x_k, u_k)        (D feed-through: u_k reaches y_k in the same tick)
    x_{k+1} = F(t_k, x_k, u_k)        (exact ZOH for LTI, RK4 or Euler substeps for ODEs)

The engine knows nothing of the model's kind, and neither do the faults or the model
summary: every stepper meets the ``Stepper`` protocol below, which also covers what a
run changes in a model (parameters, disturbance inputs) and the linear form the summary
judges.
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

Vector = NDArray[np.float64]
Matrix = NDArray[np.float64]
OdeFunction = Callable[[float, Vector, Vector, Mapping[str, Any]], Any]

# A model parameter a run may change: ("A" or "B", row, col) of an LTI model's matrices as
# the model gives them (continuous for lti, discrete for discrete_lti), or the name of an
# ODE parameter. sim/faults/_faults.py's plant_target turns a rig file's target into one.
ParameterKey = tuple[str, int, int] | str
# One parameter change: the new value from the value before it (changes compose in order)
ParameterChange = tuple[ParameterKey, Callable[[float], float]]


class DisturbanceInput(Protocol):
    """How one disturbance input d_j enters the model (a ``[[disturbances]]`` entry).

    LTI models read ``column`` (how d enters dx/dt, beside B; used as given by a discrete
    model); ODE models read ``param`` (the parameter of ``[plant.params]`` d is added to).
    """

    @property
    def column(self) -> tuple[float, ...]: ...

    @property
    def param(self) -> str: ...


@dataclass(frozen=True)
class LinearForm:
    """A model as the model summary judges it: its kind in words and, where it has one, a
    linear form x' = A x + B u, y = C x (continuous), or x[k+1] = A x[k] + B u[k]
    (discrete, ``sample_time`` set).

    An LTI model gives its own matrices. A nonlinear model gives its Jacobian A at ``x0``
    (u = 0), no B or C (no rank tests), ``drift`` = f(x0, 0) (zero at an equilibrium) and
    the fixed-step ``method`` with its ``substep`` h, whose stability region the modes must
    stay in. A model with no linear form (A None) says why in ``unjudged``.
    """

    kind: str
    A: Matrix | None = None
    B: Matrix | None = None
    C: Matrix | None = None
    sample_time: float | None = None
    x0: Vector | None = None
    drift: Vector | None = None
    method: str = ""
    substep: float = 0.0
    substeps: int = 1
    unjudged: str = ""
    warnings: tuple[str, ...] = ()


class Stepper(Protocol):
    """One tick of a plant model, whatever its kind: all that the engine, the faults and
    the model summary may ask of it.

    ``x`` and ``u`` are views the caller may place (``xu`` of make_stepper): the engine
    writes u_k into ``u``; ``step`` computes ``y`` = y_k and ``x_next`` = x_{k+1} and
    changes nothing else, so a tick can be stepped again (a trip re-steps it with the
    safe inputs); ``commit`` then moves x to x_{k+1}.
    """

    n_states: int
    n_inputs: int
    n_outputs: int
    x: Vector
    u: Vector
    y: Vector
    x_next: Vector

    def reset(self) -> None:
        """Back to x0 with u = 0."""

    def output_only(self, t: float) -> None:
        """y from the present (x, u), without advancing (the values before tick 0)."""

    def step(self, t: float) -> None:
        """y_k and x_{k+1} from (x_k, u_k), the disturbance inputs included; x keeps x_k."""

    def commit(self) -> None:
        """Move x to x_{k+1} (after the tick has been recorded)."""

    def output_and_advance(self, t: float) -> None:
        """step() then commit(), for loops that record nothing in between."""

    def change_parameters(self, changes: Sequence[ParameterChange]) -> None:
        """The model as given (with its present disturbance inputs), then each change
        applied in order to the parameter it names; no changes: the model as given.
        Raises ModelError for a parameter this model cannot change."""

    def set_disturbance(self, j: int, value: float) -> None:
        """Disturbance input j (in the order given to make_stepper) holds ``value`` from
        the next step on. Raises ModelError when the model takes no disturbance input."""

    def linear_form(self) -> LinearForm:
        """The model as the summary judges it (sim/model/_summary.py)."""


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
    input_delay: tuple[float, ...] = ()    # dead time per input, s (sim/model/_deadtime.py)
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
        (sim/model/_realise.py). A non-proper entry cannot be simulated causally and is refused.
        """
        from plantrig.sim.model._realise import tf_matrix_to_ss
        if is_tf_matrix(num) or is_tf_matrix(den):
            if not (is_tf_matrix(num) and is_tf_matrix(den)):
                raise ModelError("den", "expected num and den both as matrices of "
                                        "coefficient lists (MIMO) or both as lists (SISO)")
            return cls.from_matrices(*tf_matrix_to_ss(num, den))
        return cls.from_matrices(*tf_matrix_to_ss([[num]], [[den]], siso=True))

    @classmethod
    def from_zpk(cls, zeros: Any, poles: Any, gain: float) -> LinearPlant:
        """SISO k prod(s - z_i) / prod(s - p_i); complex roots come with their conjugates."""
        from plantrig.sim.model._realise import zpk_to_num_den
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

    def dynamics(self, t: float, x: Vector, u: Vector, params: Mapping[str, Any]) -> Vector:
        """The next state x[k+1] (a discrete model's dynamics is its update)."""
        return self.Ad @ x + self.Bd @ u

    def output(self, t: float, x: Vector, u: Vector, params: Mapping[str, Any]) -> Vector:
        return self.C @ x + self.D @ u


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
    import scipy.linalg  # here: loading or checking a rig needs no scipy

    n, m = B.shape
    block = np.zeros((n + m, n + m))
    block[:n, :n] = A
    block[:n, n:] = B
    phi = scipy.linalg.expm(block * dt)
    return phi[:n, :n].copy(), phi[:n, n:].copy()


class LtiModel:
    """An LTI model as given and as a run changed it (what the LTI steppers share).

    The model as given (``A``, ``B``: continuous, discretised by exact ZOH over ``dt``, or
    already discrete at sample time ``dt``) stays untouched, so parameter changes compose
    and clear back to it exactly: a change re-discretises once. Disturbance inputs d enter
    as x_{k+1} += Ed d_k after every step, Ed the ZOH of their columns E (E itself for a
    discrete model); Ed d is worked out when d or the model changes, not per tick.
    """

    def __init__(self, A: Matrix, B: Matrix, dt: float, discrete: bool,
                 disturbances: Sequence[DisturbanceInput]) -> None:
        n, q = A.shape[0], len(disturbances)
        self.A, self.B, self.dt, self.discrete = A.copy(), B.copy(), dt, discrete
        self.E = np.array([d.column for d in disturbances], dtype=np.float64).reshape(
            q, -1).T if q else np.zeros((n, 0))
        self.d = np.zeros(q)
        self.Ed = self.disturbance_matrix(self.A)
        self.Ed_d = np.zeros(n)          # Ed d, added to x_{k+1} while any d is nonzero
        self.disturbed = False

    def discretise(self, a: Matrix, b: Matrix) -> tuple[Matrix, Matrix]:
        return (a, b) if self.discrete else zoh(a, b, self.dt)

    def disturbance_matrix(self, a: Matrix) -> Matrix:
        if not self.E.shape[1] or self.discrete:
            return self.E.copy()
        return zoh(a, self.E, self.dt)[1]

    def changed(self, changes: Sequence[ParameterChange]) -> tuple[Matrix, Matrix]:
        """(A, B) as given with ``changes`` applied in order; Ed follows the new A."""
        a, b = self.A.copy(), self.B.copy()
        for key, change in changes:
            if not isinstance(key, tuple):
                raise ModelError("parameter", f"expected A[row, col] or B[row, col] of a "
                                              f"linear model, found {key!r}")
            which, row, col = key
            matrix = a if which == "A" else b
            matrix[row, col] = change(float(matrix[row, col]))
        self.Ed = self.disturbance_matrix(a)
        self._update()
        return a, b

    def set_disturbance(self, j: int, value: float) -> None:
        self.d[j] = value
        self._update()

    def _update(self) -> None:
        np.dot(self.Ed, self.d, out=self.Ed_d)
        self.disturbed = bool(self.d.any())


class LinearStepper:
    """One tick of a discrete LTI model as a single matrix product.

    [x_{k+1}; y_k] = [[Ad, Bd], [C, D]] @ [x_k; u_k] (+ Ed d_k on x_{k+1} while a
    disturbance input is nonzero). ``A`` and ``B`` are continuous and discretised by exact
    ZOH over ``dt`` (the tick), or, with ``discrete``, already discrete at sample time
    ``dt``. The engine writes u into the ``u`` view and reads ``x`` and ``y``; nothing is
    allocated per tick.
    """

    def __init__(self, A: Matrix, B: Matrix, C: Matrix, D: Matrix, x0: Vector,
                 xu: Vector | None = None, *, dt: float, discrete: bool = False,
                 disturbances: Sequence[DisturbanceInput] = ()) -> None:
        n, m, p = A.shape[0], B.shape[1], C.shape[0]
        self.n_states, self.n_inputs, self.n_outputs = n, m, p
        self.model = LtiModel(A, B, dt, discrete, disturbances)
        self._C, self._D = C, D
        self._disturbed = False                  # a copy of model.disturbed: read per tick
        self._Ed_d = self.model.Ed_d
        # ``xu`` lets the engine keep [x; u] inside its tick record, saving two copies
        self._xu = np.zeros(n + m) if xu is None else xu
        self._next = np.zeros(n + p)
        self.x = self._xu[:n]
        self.u = self._xu[n:]
        self.y = self._next[n:]
        self.x_next = self._next[:n]
        self.x0 = np.array(x0, dtype=np.float64)
        self.reset()

    @functools.cached_property
    def _block(self) -> Matrix:
        """[[Ad, Bd], [C, D]], discretised on first use: `plantrig check` of an LTI rig
        reads the model's form without paying for scipy's matrix exponential."""
        model = self.model
        return np.ascontiguousarray(np.block([[*model.discretise(model.A, model.B)],
                                              [self._C, self._D]]))

    def reset(self) -> None:
        self.x[:] = self.x0
        self.u[:] = 0.0
        self._next[:] = 0.0

    def arrays(self) -> tuple[Matrix, Vector, Vector]:
        """The arrays a step reads and writes in place, for code that steps the same
        model outside Python (sim/engine/_stretch.py): the block [[Ad, Bd], [C, D]],
        [x_{k+1}; y_k], and Ed d (added to x_{k+1} while ``disturbed``)."""
        return self._block, self._next, self._Ed_d

    @property
    def disturbed(self) -> bool:
        """Whether a disturbance input is nonzero (Ed d is added to each step)."""
        return self._disturbed

    def output_only(self, t: float) -> None:
        """Compute y from the present (x, u) without advancing."""
        np.dot(self._block[self.n_states:], self._xu, out=self.y)

    def step(self, t: float) -> None:
        """Compute y_k and x_{k+1} from (x_k, u_k); x keeps x_k until commit()."""
        np.dot(self._block, self._xu, out=self._next)
        if self._disturbed:
            self.x_next += self._Ed_d

    def commit(self) -> None:
        """Move x to x_{k+1} (after the tick has been recorded)."""
        self.x[...] = self.x_next

    def output_and_advance(self, t: float) -> None:
        """step() then commit(), for loops that record nothing in between."""
        np.dot(self._block, self._xu, out=self._next)
        if self._disturbed:
            self.x_next += self._Ed_d
        self.x[...] = self.x_next

    def change_parameters(self, changes: Sequence[ParameterChange]) -> None:
        """Entries of A or B changed; the model is discretised again (exact ZOH)."""
        ad, bd = self.model.discretise(*self.model.changed(changes))
        n = self.n_states
        self._block[:n, :n] = ad
        self._block[:n, n:] = bd

    def set_disturbance(self, j: int, value: float) -> None:
        self.model.set_disturbance(j, value)
        self._disturbed = self.model.disturbed

    def linear_form(self) -> LinearForm:
        model = self.model
        if model.discrete:
            return LinearForm(f"discrete LTI (dt {model.dt:g} s)", model.A, model.B, self._C,
                              sample_time=model.dt)
        return LinearForm("continuous LTI", model.A, model.B, self._C)


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
                 x0: Vector, xu: Vector | None = None, *,
                 disturbances: Sequence[DisturbanceInput] = (),
                 name: str = "nonlinear ODE") -> None:
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
        self.params = dict(plant.params)   # a run's changes act on this copy, never the plant
        self.name = name                   # how the model summary names the model
        # disturbance input j adds to parameter _disturbed[j]: p = p0 + d_j
        self._disturbed = [d.param for d in disturbances]
        self._d = np.zeros(len(disturbances))
        self.reset()

    def reset(self) -> None:
        self.x[:] = self.x0
        self.u[:] = 0.0
        self.y[:] = 0.0

    def output_only(self, t: float) -> None:
        """Compute y from the present (x, u) without advancing."""
        self.y[...] = self.plant.output(t, self.x, self.u, self.params)

    def step(self, t: float) -> None:
        """Compute y_k and x_{k+1} from (x_k, u_k); x keeps x_k until commit()."""
        f, p, u, h = self.plant.dynamics, self.params, self.u, self.h_step
        self.y[...] = self.plant.output(t, self.x, u, p)
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
        self.x_next[...] = x

    def _ros2(self, t: float, x: Vector, h: float) -> Vector:
        """One ROS2 substep: W k1 = f(x), W k2 = f(x + h k1) - 2 k1,
        x+ = x + 3/2 h k1 + 1/2 h k2, with W = I - gamma h J."""
        f, p, u = self.plant.dynamics, self.params, self.u
        fx = f(t, x, u, p)
        if self.plant.jacobian is not None:
            jac = np.asarray(self.plant.jacobian(t, x, u, p), dtype=np.float64)
        else:
            jac = finite_difference_jacobian(lambda z: f(t, z, u, p), x, fx)
        import scipy.linalg  # here: loading or checking a rig needs no scipy

        lu = scipy.linalg.lu_factor(np.eye(x.size) - ROS2_GAMMA * h * jac)
        k1 = scipy.linalg.lu_solve(lu, fx)
        k2 = scipy.linalg.lu_solve(lu, f(t + h, x + h * k1, u, p) - 2.0 * k1)
        return x + 1.5 * h * k1 + 0.5 * h * k2

    def commit(self) -> None:
        """Move x to x_{k+1} (after the tick has been recorded)."""
        self.x[...] = self.x_next

    def output_and_advance(self, t: float) -> None:
        """step() then commit(), for loops that record nothing in between."""
        self.step(t)
        self.commit()

    def change_parameters(self, changes: Sequence[ParameterChange]) -> None:
        """The parameters as given, disturbance inputs added, then ``changes`` in order."""
        given, params = self.plant.params, self.params
        for name, value in given.items():
            params[name] = value
        for name, d in zip(self._disturbed, self._d, strict=True):
            params[name] = given[name] + d
        for key, change in changes:
            if not isinstance(key, str):
                raise ModelError("parameter", f"expected a parameter of [plant.params], "
                                              f"found {key!r}")
            params[key] = change(float(params[key]))

    def set_disturbance(self, j: int, value: float) -> None:
        """p = p0 + d_j on the parameter the disturbance input names."""
        self._d[j] = value
        name = self._disturbed[j]
        self.params[name] = self.plant.params[name] + value

    def linear_form(self) -> LinearForm:
        """The Jacobian of f at (x0, u = 0) and f there; see linearize."""
        kind = f"{self.name} ({self.method}, {self.substeps} substeps per tick), linearised at x0"
        try:
            A, _ = linearize(self.plant, self.x0)
        except ValueError as exc:
            if isinstance(exc, ModelError):
                raise
            why = f"no finite linearisation at x0: {exc}"
            return LinearForm(kind, unjudged=why, warnings=(why,))
        drift = _ode_at(self.plant, self.x0, np.zeros(self.n_inputs))
        return LinearForm(kind, A, x0=self.x0, drift=drift, method=self.method,
                          substep=self.h_step, substeps=self.substeps)


def _ode_at(plant: OdePlant, x: Vector, u: Vector) -> Vector:
    return plant.dynamics(0.0, x, u, plant.params)


def linearize(plant: OdePlant, x0: Vector) -> tuple[Matrix, Matrix]:
    """Finite-difference Jacobians (A, B) of f at (x0, u = 0), t = 0.

    Central differences, or one-sided ones where f is not finite on one side (a square
    root at an empty tank, say). Raises ModelError when f raises or is not finite at x0,
    and ValueError when no difference is finite near it.
    """
    n, m, _ = plant.shape
    u0 = np.zeros(m)
    try:
        f0 = _ode_at(plant, x0, u0)
    except (Exception, SystemExit) as exc:  # the user's function is untrusted here
        raise ModelError("dynamics", f"calling it at x0 raised {type(exc).__name__}: {exc}") \
            from None
    if not np.all(np.isfinite(f0)):
        raise ModelError("dynamics", f"returned {f0.tolist()} at x0 = {x0.tolist()}, u = 0 "
                                     "(NaN or infinite)")

    def column(x_plus: Vector, x_minus: Vector, u_plus: Vector, u_minus: Vector,
               step: float) -> Vector:
        with np.errstate(all="ignore"):
            sides = []
            for x, u in ((x_plus, u_plus), (x_minus, u_minus)):
                try:
                    value = _ode_at(plant, x, u)
                except Exception:  # noqa: BLE001 - one side may lie outside f's domain
                    value = np.full(n, np.nan)
                sides.append(value if np.all(np.isfinite(value)) else None)
        plus, minus = sides
        if plus is not None and minus is not None:
            return (plus - minus) / (2 * step)
        if plus is not None:
            return (plus - f0) / step
        if minus is not None:
            return (f0 - minus) / step
        raise ValueError("f is not finite on either side of x0")

    A = np.zeros((n, n))
    B = np.zeros((n, m))
    for j in range(n):
        step = 1e-6 * max(1.0, abs(x0[j]))
        dx = np.zeros(n)
        dx[j] = step
        A[:, j] = column(x0 + dx, x0 - dx, u0, u0, step)
    for j in range(m):
        du = np.zeros(m)
        du[j] = 1e-6
        B[:, j] = column(x0, x0, du, -du, 1e-6)
    return A, B


def ticks_per_sample(sample_time: float, tick: float) -> int | None:
    """The whole number of ticks in a discrete model's sample time, or None."""
    ratio = sample_time / tick
    every = round(ratio)
    return every if every >= 1 and abs(ratio - every) <= 1e-9 * ratio else None


class HeldLinearStepper(LinearStepper):
    """A discrete model whose sample time ``dt`` is ``every`` ticks (multi-rate).

    On the tick of each model sample it reads u, gives y = C x + D u and computes the
    next model state; on the ticks in between the input is not read and state and
    output are held (zero-order hold), and the next state shows on the tick of the next
    sample. A disturbance input enters with the sample as u does (x_{s+1} = Ad x_s +
    Bd u_s + Ed d_s, d read on the sample's tick): held ticks change nothing.
    """

    def __init__(self, A: Matrix, B: Matrix, C: Matrix, D: Matrix, x0: Vector, every: int,
                 xu: Vector | None = None, *, dt: float,
                 disturbances: Sequence[DisturbanceInput] = ()) -> None:
        self.every = every
        self._phase = 0
        self._pending = np.zeros(A.shape[0])
        self._y_held = np.zeros(C.shape[0])
        super().__init__(A, B, C, D, x0, xu, dt=dt, discrete=True, disturbances=disturbances)

    def reset(self) -> None:
        super().reset()
        self._phase = 0
        self._pending[:] = 0.0
        self._y_held[:] = 0.0

    def output_only(self, t: float) -> None:
        if self._phase == 0:
            super().output_only(t)
        else:
            self.y[...] = self._y_held

    def step(self, t: float) -> None:
        if self._phase == 0:
            np.dot(self._block, self._xu, out=self._next)
            if self._disturbed:
                self.x_next += self._Ed_d
            self._pending[...] = self.x_next
        else:
            self.y[...] = self._y_held
        self.x_next[...] = self._pending if self._phase == self.every - 1 else self.x

    def commit(self) -> None:
        if self._phase == 0:
            self._y_held[...] = self.y
        self.x[...] = self.x_next
        self._phase = (self._phase + 1) % self.every

    def output_and_advance(self, t: float) -> None:
        self.step(t)
        self.commit()

    def linear_form(self) -> LinearForm:
        model = self.model
        return LinearForm(f"discrete LTI (dt {model.dt:g} s = {self.every} ticks, held in "
                          "between)", model.A, model.B, self._C, sample_time=model.dt)


def make_stepper(plant: Plant, dt: float, x0: Any = None, method: str = "rk4",
                 substeps: int = 1, xu: Vector | None = None, *,
                 disturbances: Sequence[DisturbanceInput] = ()) -> Stepper:
    """Build the per-tick stepper for any plant kind at tick ``dt`` seconds (the one place
    that asks a plant's kind).

    ``xu``, if given, is a float64 view of n + m elements the stepper keeps x and u in;
    ``disturbances`` are the model's disturbance inputs, all zero until set.
    """
    from plantrig.sim.model._deadtime import DelayedLinearStepper  # no cycles: imported late
    from plantrig.sim.model._fmu import FmuOdePlant, FmuSlavePlant, FmuSlaveStepper
    n = plant.shape[0]
    x_init = np.zeros(n) if x0 is None else np.array(x0, dtype=np.float64).reshape(-1)
    if isinstance(plant, FmuSlavePlant):
        return FmuSlaveStepper(plant, dt, x_init, xu)
    if x_init.shape != (n,):
        raise ModelError("x0", f"has {x_init.size} entries, expected {n} (one per state)")
    if isinstance(plant, LinearPlant) and plant.has_dead_time:
        return DelayedLinearStepper(plant.A, plant.B, plant.C, plant.D, dt, plant.input_delay,
                                    plant.output_delay, x_init, xu, disturbances=disturbances)
    if isinstance(plant, LinearPlant):
        return LinearStepper(plant.A, plant.B, plant.C, plant.D, x_init, xu, dt=dt,
                             disturbances=disturbances)
    if isinstance(plant, DiscretePlant):
        every = ticks_per_sample(plant.dt, dt)
        if every is None:
            raise ModelError("dt", f"sample time {plant.dt} s differs from the rig tick {dt} s;"
                             " a discrete model runs at the tick or a whole multiple of it")
        if every > 1:
            return HeldLinearStepper(plant.Ad, plant.Bd, plant.C, plant.D, x_init, every, xu,
                                     dt=plant.dt, disturbances=disturbances)
        return LinearStepper(plant.Ad, plant.Bd, plant.C, plant.D, x_init, xu, dt=plant.dt,
                             discrete=True, disturbances=disturbances)
    name = f"model exchange FMU {plant.fmu_file.name}," if isinstance(plant, FmuOdePlant) \
        else "nonlinear ODE"
    return OdeStepper(plant, dt, method, substeps, x_init, xu, disturbances=disturbances,
                      name=name)


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
