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
WINDUP = ("unwind", "freeze", "off")   # what the integrator does at an output limit


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
      - derivative on the measurement (no kick on reference steps), passed through a
        first-order lag of time constant ``derivative_lag`` (s), discretised by backward
        difference: D_k = Tf/(Tf+dt) * D_{k-1} - kd/(Tf+dt) * (y_k - y_{k-1});
      - integrator windup handled by ``windup``: "unwind" (the textbook's
        back-calculation: dI = (ki*e + (u_lim - u)/Tt) * dt, Tt = ``unwind_time``),
        "freeze" (conditional integration, also called clamping: the integral stops
        while the output is at a limit and the error pushes further) or "off";
      - output held within [``drive_low``, ``drive_high``].
    The structure follows Astrom & Murray, Feedback Systems (2008), section 10.4
    (integrator windup) and 10.5 (filtering, discrete implementation).
    """

    def __init__(self, *, measure: int, drive: int, reference: int, kp: float, ki: float,
                 kd: float, dt: float, derivative_lag: float = 0.0,
                 drive_low: float = -math.inf, drive_high: float = math.inf,
                 windup: str = "unwind", unwind_time: float | None = None) -> None:
        if windup not in WINDUP:
            raise ValueError(f"windup: unknown kind {windup!r}")
        self.measure, self.drive, self.reference = measure, drive, reference
        self.kp, self.ki, self.kd, self.dt = kp, ki, kd, dt
        self.derivative_lag = derivative_lag
        self.drive_low, self.drive_high = drive_low, drive_high
        self.windup = windup
        tt = unwind_time
        if tt is None:
            # Tt = sqrt(Ti * Td) = sqrt(kd / ki), or Ti = kp / ki without derivative action
            # (Astrom & Murray, section 10.4, rule of thumb).
            tt = math.sqrt(kd / ki) if ki and kd else (kp / ki if ki and kp else dt)
        self.unwind_time = max(tt, dt)
        tf = derivative_lag
        self._d_pole = tf / (tf + dt)
        self._d_gain = kd / (tf + dt)
        self._unwind_gain = dt / self.unwind_time
        self.reset()

    def reset(self) -> None:
        self.integral = 0.0
        self.derivative = 0.0
        self.y_prev: float | None = None

    def law(self) -> tuple[float, ...]:
        """The constants compute() uses, in this order: kp, ki, kd, dt, the derivative
        filter's pole and gain, the unwind gain, drive_low, drive_high (for code that
        runs the same law outside Python: sim/engine/_stretch.py)."""
        return (self.kp, self.ki, self.kd, self.dt, self._d_pole, self._d_gain,
                self._unwind_gain, self.drive_low, self.drive_high)

    def compute(self, t: float, y: Vector, r: Vector, u: Vector) -> None:
        # plain floats and locals: this runs every tick on the real-time thread
        yk = float(y[self.measure])
        e = float(r[self.reference]) - yk
        y_prev = self.y_prev if self.y_prev is not None else yk
        self.y_prev = yk
        if self.kd:
            self.derivative = self._d_pole * self.derivative - self._d_gain * (yk - y_prev)
        v = self.kp * e + self.integral + self.derivative
        lo, hi = self.drive_low, self.drive_high
        out = lo if v < lo else hi if v > hi else v
        ki_e_dt = self.ki * e * self.dt
        if self.windup == "unwind":
            self.integral += ki_e_dt + (out - v) * self._unwind_gain
        elif self.windup == "freeze":
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
