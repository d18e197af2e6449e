"""Built-in controllers for software-in-the-loop runs.

A built-in controller sits where the controller under test would: at tick k it reads
the sensor values sent at tick k-1 (one tick of transport, as over a real link) and the
references at t_k, and writes the command u_k. Running fast with a built-in controller
therefore behaves like the bench with a controller that answers within one tick.
"""

from __future__ import annotations

import math
from typing import Protocol

import numpy as np
from numpy.typing import NDArray

Vector = NDArray[np.float64]


class Controller(Protocol):
    def compute(self, t: float, y: Vector, r: Vector, u: Vector) -> None:
        """Write the command into ``u`` from measurements ``y`` and references ``r``."""
        ...

    def reset(self) -> None: ...


class OpenLoop:
    """u[i] = r[j] for each mapped (input i, reference j); unmapped inputs stay 0."""

    def __init__(self, mapping: list[tuple[int, int]]) -> None:
        self.mapping = mapping

    def compute(self, t: float, y: Vector, r: Vector, u: Vector) -> None:
        for i, j in self.mapping:
            u[i] = r[j]

    def reset(self) -> None:
        pass


class Pid:
    """Discrete PID on one measured output driving one input.

    u = kp*e + I + D, e = r - y, with
      - derivative on the measurement (no kick on reference steps), filtered by a
        first-order lag of time constant ``tf``, discretised by backward difference:
        D_k = tf/(tf+dt) * D_{k-1} - kd/(tf+dt) * (y_k - y_{k-1});
      - anti-windup by back-calculation: dI = (ki*e + (u_sat - u)/tt) * dt, or by
        clamping (integration stops while the output saturates in the same direction);
      - output limits [u_min, u_max].
    The structure follows Astrom & Murray, Feedback Systems (2008), section 10.5
    (filtering, integrator windup, discrete implementation).
    """

    def __init__(self, *, measure: int, drive: int, reference: int, kp: float, ki: float,
                 kd: float, dt: float, tf: float = 0.0, u_min: float = -math.inf,
                 u_max: float = math.inf, anti_windup: str = "back_calculation",
                 tt: float | None = None) -> None:
        if anti_windup not in ("back_calculation", "clamp", "none"):
            raise ValueError(f"anti_windup: unknown kind {anti_windup!r}")
        self.measure, self.drive, self.reference = measure, drive, reference
        self.kp, self.ki, self.kd, self.dt, self.tf = kp, ki, kd, dt, tf
        self.u_min, self.u_max = u_min, u_max
        self.anti_windup = anti_windup
        if tt is None:
            # Tt = sqrt(Ti * Td) = sqrt(kd / ki), or Ti = kp / ki without derivative action
            # (Astrom & Murray, section 10.4, rule of thumb).
            tt = math.sqrt(kd / ki) if ki and kd else (kp / ki if ki and kp else dt)
        self.tt = max(tt, dt)
        self._d_pole = tf / (tf + dt)
        self._d_gain = kd / (tf + dt)
        self._tracking_gain = dt / self.tt
        self.reset()

    def reset(self) -> None:
        self.integral = 0.0
        self.derivative = 0.0
        self.y_prev: float | None = None

    def compute(self, t: float, y: Vector, r: Vector, u: Vector) -> None:
        # plain floats and locals: this runs every tick on the real-time thread
        yk = float(y[self.measure])
        e = float(r[self.reference]) - yk
        y_prev = self.y_prev if self.y_prev is not None else yk
        self.y_prev = yk
        if self.kd:
            self.derivative = self._d_pole * self.derivative - self._d_gain * (yk - y_prev)
        v = self.kp * e + self.integral + self.derivative
        lo, hi = self.u_min, self.u_max
        out = lo if v < lo else hi if v > hi else v
        ki_e_dt = self.ki * e * self.dt
        if self.anti_windup == "back_calculation":
            self.integral += ki_e_dt + (out - v) * self._tracking_gain
        elif self.anti_windup == "clamp":
            if not ((v > hi and e > 0) or (v < lo and e < 0)):
                self.integral += ki_e_dt
        else:
            self.integral += ki_e_dt
        u[self.drive] = out


class PidLoops:
    """Independent PID loops, each driving its own input (inputs no loop drives stay 0)."""

    def __init__(self, loops: list[Pid]) -> None:
        self.loops = loops

    def compute(self, t: float, y: Vector, r: Vector, u: Vector) -> None:
        for loop in self.loops:
            loop.compute(t, y, r, u)

    def reset(self) -> None:
        for loop in self.loops:
            loop.reset()


class StateFeedback:
    """u = -K y + N r, then clipped to [u_min, u_max] per input.

    K acts on the measured outputs: give the plant C = I (outputs = states) to feed back
    the full state; the same law then runs unchanged against a real link.
    """

    def __init__(self, K: Vector, N: Vector, u_min: Vector, u_max: Vector) -> None:
        self.K = np.ascontiguousarray(K, dtype=np.float64)
        self.N = np.ascontiguousarray(N, dtype=np.float64)
        self.u_min, self.u_max = u_min, u_max
        self._ky = np.zeros(self.K.shape[0])
        self._nr = np.zeros(self.N.shape[0])

    def compute(self, t: float, y: Vector, r: Vector, u: Vector) -> None:
        np.dot(self.K, y, out=self._ky)
        np.dot(self.N, r, out=self._nr)
        np.subtract(self._nr, self._ky, out=u)
        np.clip(u, self.u_min, self.u_max, out=u)

    def reset(self) -> None:
        pass
