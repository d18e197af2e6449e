"""Dead time on LTI plants, exact under ZOH for delays of any length.

Input j reaches the plant tau_j = d_j T + delta_j late (d_j whole ticks, 0 <= delta_j < T).
With the input held over each tick, inside tick k the plant sees u_j[k-d_j-1] until
kT + delta_j and u_j[k-d_j] after it, so over a part [0, s] of the tick

    x(kT + s) = e^(A s) x_k
              + sum_j ( e^(A (s - a_j)) Gamma(a_j) b_j u_j[k-d_j-1]
                      + Gamma(s - a_j) b_j u_j[k-d_j] ),      a_j = min(s, delta_j),

with Gamma(t) = int_0^t e^(A r) dr (both from one block exponential, as in zoh). At
s = T this is the sampled model with a fractional input delay (Astrom & Wittenmark,
Computer-Controlled Systems, 3rd ed., section 2.3 "sampling a system with time delay";
its pulse transfer function is the modified z-transform of G(s)/s with m = 1 - delta/T,
Franklin, Powell & Workman, Digital Control of Dynamic Systems, 3rd ed., section 4.6;
sections from memory). Output i read tau_i = e_i T + eps_i late is the output of the
same model at (k - e_i - 1) T + (T - eps_i), i.e. the formula above with s = T - eps_i
applied to the stored past state and inputs. Everything stays linear in the stored
history, so a tick is two matrix products; before tick 0 the plant sat at x0 with all
inputs 0.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.model._plant import DisturbanceInput, LinearForm, LtiModel, ParameterChange

Vector = NDArray[np.float64]
Matrix = NDArray[np.float64]


def split_delay(tau: float, dt: float) -> tuple[int, float]:
    """tau = d dt + delta with d whole and 0 <= delta < dt (delta within 1e-9 dt of a
    tick edge counts as on it)."""
    ticks = tau / dt
    whole = math.floor(ticks + 1e-9)
    frac = (ticks - whole) * dt
    return whole, (0.0 if frac < 1e-9 * dt else frac)


def _exp_and_integral(A: Matrix, B: Matrix, t: float) -> tuple[Matrix, Matrix]:
    """(e^(A t), Gamma(t) B) by expm([[A, B], [0, 0]] t) (Van Loan)."""
    import scipy.linalg  # here: loading or checking a rig needs no scipy (bench_imports)

    n, m = B.shape
    block = np.zeros((n + m, n + m))
    block[:n, :n] = A
    block[:n, n:] = B
    phi = scipy.linalg.expm(block * t)
    return phi[:n, :n], phi[:n, n:]


class DelayedLinearStepper:
    """One tick of x' = A x + B u(t - tau_in), y_i = (C x + D u(. - tau_in))_i (t - tau_out_i).

    A Stepper (sim/model/_plant.py) that keeps its history of past states and inputs privately.
    Disturbance inputs add Ed d_k to x_{k+1} (they act on the plant, not delayed); a
    parameter change builds the tick's matrices again from the changed A and B.
    """

    def __init__(self, A: Matrix, B: Matrix, C: Matrix, D: Matrix, dt: float,
                 input_delay: Sequence[float], output_delay: Sequence[float], x0: Vector,
                 xu: Vector | None = None, *,
                 disturbances: Sequence[DisturbanceInput] = ()) -> None:
        n, m, p = A.shape[0], B.shape[1], C.shape[0]
        self.n_states, self.n_inputs, self.n_outputs = n, m, p
        self._A, self._B, self._C, self._D, self.dt = A, B, C, D, dt
        self._delays = (list(input_delay), list(output_delay))   # as given, for the summary
        self.model = LtiModel(A, B, dt, False, disturbances)
        ins = [split_delay(t, dt) for t in (input_delay or [0.0] * m)]
        outs = [split_delay(t, dt) for t in (output_delay or [0.0] * p)]
        # lags of the input history each output row needs, and of the state history
        self._q = max([e + (1 if eps else 0) for e, eps in outs], default=0)
        self._lags = max([e + 1 for e, _ in outs], default=0) + \
            max([d + 1 for d, _ in ins], default=0) + 1
        q, L = self._q, self._lags
        # work vector v = [x_k, u_k, x_{k-1} .. x_{k-q}, u_{k-1} .. u_{k-L}]
        self._v = np.zeros(n + m + q * n + L * m)
        self._xh = self._v[n + m:n + m + q * n]
        self._uh = self._v[n + m + q * n:]
        self.Mx = np.zeros((n, self._v.size))
        self.My = np.zeros((p, self._v.size))
        self._ins, self._outs = ins, outs
        self._build()
        xu = np.zeros(n + m) if xu is None else xu
        self.x = xu[:n]
        self.u = xu[n:]
        self.y = np.zeros(p)
        self.x_next = np.zeros(n)
        self.x0 = np.array(x0, dtype=np.float64)
        self.reset()

    def _x_col(self, q: int) -> slice:
        n, m = self.n_states, self.n_inputs
        return slice(0, n) if q == 0 else slice(n + m + (q - 1) * n, n + m + q * n)

    def _u_col(self, lag: int, j: int) -> int:
        n, m = self.n_states, self.n_inputs
        return n + j if lag == 0 else n + m + self._q * n + (lag - 1) * m + j

    def _state_at(self, s: float, q: int, weight: Matrix, out: Matrix) -> None:
        """out += weight @ x(t) with t = (k - q) T + s, in terms of the stored history."""
        n = self.n_states
        phi, _ = _exp_and_integral(self._A, self._B, s)
        out[:, self._x_col(q)] += weight @ phi
        for j, (d, delta) in enumerate(self._ins):
            b = self._B[:, j:j + 1]
            a = min(s, delta)
            if a > 0:
                _, g_old = _exp_and_integral(self._A, b, a)
                phi_rest, _ = _exp_and_integral(self._A, np.zeros((n, 1)), s - a)
                out[:, self._u_col(q + d + 1, j)] += (weight @ phi_rest @ g_old)[:, 0]
            if s > a:
                _, g_new = _exp_and_integral(self._A, b, s - a)
                out[:, self._u_col(q + d, j)] += (weight @ g_new)[:, 0]

    def _plant_input_lag(self, s: float, j: int) -> int:
        d, delta = self._ins[j]
        return d if s >= delta else d + 1

    def _build(self) -> None:
        n, T = self.n_states, self.dt
        self.Mx[:] = 0.0
        self.My[:] = 0.0
        self._state_at(T, 0, np.eye(n), self.Mx)
        for i, (e, eps) in enumerate(self._outs):
            row = self.My[i:i + 1]
            q, s = (e, 0.0) if eps == 0 else (e + 1, T - eps)
            self._state_at(s, q, self._C[i:i + 1], row)
            for j in range(self.n_inputs):
                row[0, self._u_col(q + self._plant_input_lag(s, j), j)] += self._D[i, j]

    def reset(self) -> None:
        self.x[:] = self.x0
        self.u[:] = 0.0
        self.y[:] = 0.0
        self._v[:] = 0.0
        for q in range(self._q):
            self._xh[q * self.n_states:(q + 1) * self.n_states] = self.x0

    def _load(self) -> None:
        n = self.n_states
        self._v[:n] = self.x
        self._v[n:n + self.n_inputs] = self.u

    def output_only(self, t: float) -> None:
        self._load()
        np.dot(self.My, self._v, out=self.y)

    def step(self, t: float) -> None:
        """Compute y_k and x_{k+1} from (x_k, u_k) and the history; nothing moves yet."""
        self._load()
        np.dot(self.My, self._v, out=self.y)
        np.dot(self.Mx, self._v, out=self.x_next)
        if self.model.disturbed:
            self.x_next += self.model.Ed_d

    def commit(self) -> None:
        """Push x_k and u_k into the history, then move x to x_{k+1}."""
        n, m = self.n_states, self.n_inputs
        if self._q > 1:
            self._xh[n:] = self._xh[:-n].copy()
        if self._q:
            self._xh[:n] = self.x
        if m:
            self._uh[m:] = self._uh[:-m].copy()
            self._uh[:m] = self.u
        self.x[:] = self.x_next

    def output_and_advance(self, t: float) -> None:
        self.step(t)
        self.commit()

    def change_parameters(self, changes: Sequence[ParameterChange]) -> None:
        """Entries of A or B changed: the tick's matrices are built again."""
        self._A, self._B = self.model.changed(changes)
        self._build()

    def set_disturbance(self, j: int, value: float) -> None:
        self.model.set_disturbance(j, value)

    def linear_form(self) -> LinearForm:
        ins, outs = self._delays
        return LinearForm(f"continuous LTI with dead time (inputs {ins or 0} s, outputs "
                          f"{outs or 0} s; exact under ZOH)", self.model.A, self.model.B,
                          self._C)
