"""Verdict metrics over a sampled response: step characteristics, tracking, bands.

A scenario's verdict ("settles within 2 % in under 3 s, overshoot below 10 %") needs
numbers computed the same way every time and the same way the engineer's own tools
compute them. Where they overlap, the step definitions here are those of
python-control's ``control.step_info`` (control/timeresp.py, version 0.10), with the
step from ``initial`` to ``final`` of size ``s = final - initial``:

- rise time: t at the first sample with sign(s) * (y - (initial + p_hi * s)) >= 0,
  minus t at the first sample with the same test for p_lo (10 % and 90 % by default);
- settling time: t at the sample after the last one with |(y - initial) / s - 1| >= band
  (2 % by default), measured from ``t_step``; NaN when the last sample is still outside;
- overshoot, percent: 100 * max(sign(s) * (y - final)) / |s|, or 0 when y never passes
  ``final``;
- peak: y at the largest |y - initial| (first such sample), and its time from ``t_step``;
- steady-state value: ``final`` (the last sample unless given).

With ``initial = 0`` and ``t_step = t[0] = 0`` the numbers equal step_info's
RiseTime, SettlingTime, Overshoot, PeakTime and SteadyStateValue; Peak equals
step_info's Peak (which is |y| at that sample) whenever that sample is >= 0.
Where step_info raises (a threshold never crossed), rise time here is NaN.

All inputs are 1-D arrays of equal length with strictly increasing t and finite values;
anything else is a ValueError. Nothing here allocates on a hot path: these run after a
run or on a decimated copy, never inside the tick.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

Series = NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class StepMetrics:
    """Step response characteristics; times in seconds from ``t_step``, overshoot in %."""

    rise_time: float
    settling_time: float
    overshoot: float
    peak: float
    peak_time: float
    steady_state_value: float
    initial: float


@dataclass(frozen=True, slots=True)
class TrackingError:
    """Error y - r over a window: sample RMS, largest magnitude and when it happened."""

    rms: float
    max_abs: float
    time_of_max: float
    samples: int


@dataclass(frozen=True, slots=True)
class BandCheck:
    """Whether y stayed inside [lo, hi] over a window; first sample time outside, if any."""

    inside: bool
    first_violation: float | None


def _values(y: ArrayLike, name: str = "y") -> Series:
    ya = np.asarray(y, dtype=np.float64)
    if ya.ndim != 1 or ya.size < 2:
        raise ValueError(f"{name} must be 1-D with at least 2 samples, got shape {ya.shape}")
    if not np.all(np.isfinite(ya)):
        raise ValueError(f"{name} must be finite (NaN or inf found)")
    return ya


def _series(t: ArrayLike, y: ArrayLike) -> tuple[Series, Series]:
    ta, ya = _values(t, "t"), _values(y)
    if ta.shape != ya.shape:
        raise ValueError(f"t has {ta.size} samples but y has {ya.size}")
    if not np.all(np.diff(ta) > 0):
        raise ValueError("t must be strictly increasing")
    return ta, ya


def _step(y: Series, final: float | None, initial: float) -> tuple[float, float]:
    yf = float(y[-1]) if final is None else float(final)
    y0 = float(initial)
    if not (np.isfinite(yf) and np.isfinite(y0)):
        raise ValueError(f"final and initial must be finite, got {yf} and {y0}")
    if yf == y0:
        raise ValueError(f"step size is zero (initial = final = {yf})")
    return yf, y0


def _fraction(pct: float, name: str) -> float:
    if not 0.0 <= pct <= 100.0:
        raise ValueError(f"{name} must be a percentage 0..100, got {pct}")
    return pct / 100.0


def _first_reaching(y: Series, level: float, sign: float) -> int | None:
    hits = np.flatnonzero(sign * (y - level) >= 0)
    return int(hits[0]) if hits.size else None


def rise_time(
    t: ArrayLike,
    y: ArrayLike,
    *,
    final: float | None = None,
    initial: float = 0.0,
    limits_pct: tuple[float, float] = (10.0, 90.0),
) -> float:
    """Time from first reaching ``limits_pct[0]`` % of the step to first reaching the other.

    NaN when either level is never reached in the record.
    """
    ta, ya = _series(t, y)
    yf, y0 = _step(ya, final, initial)
    lo, hi = (_fraction(p, "limits_pct") for p in limits_pct)
    if lo >= hi:
        raise ValueError(f"limits_pct must rise, got {limits_pct}")
    s = yf - y0
    sign = float(np.sign(s))
    i_lo = _first_reaching(ya, y0 + lo * s, sign)
    i_hi = _first_reaching(ya, y0 + hi * s, sign)
    if i_lo is None or i_hi is None:
        return float("nan")
    return float(ta[i_hi] - ta[i_lo])


def settling_time(
    t: ArrayLike,
    y: ArrayLike,
    *,
    final: float | None = None,
    initial: float = 0.0,
    band_pct: float = 2.0,
    t_step: float | None = None,
) -> float:
    """Time from ``t_step`` (default t[0]) until y stays within ``band_pct`` % of the step.

    NaN when the last sample is still outside the band.
    """
    ta, ya = _series(t, y)
    yf, y0 = _step(ya, final, initial)
    band = _fraction(band_pct, "band_pct")
    outside = np.flatnonzero(np.abs((ya - y0) / (yf - y0) - 1) >= band)
    settled = 0 if outside.size == 0 else int(outside[-1]) + 1
    if settled >= ta.size:
        return float("nan")
    return float(ta[settled] - (ta[0] if t_step is None else t_step))


def overshoot(y: ArrayLike, *, final: float | None = None, initial: float = 0.0) -> float:
    """Largest excursion past ``final`` in the step's direction, percent of the step."""
    ya = _values(y)
    yf, y0 = _step(ya, final, initial)
    s = yf - y0
    sign = float(np.sign(s))
    excess = float(np.max(sign * (ya - y0))) - sign * s
    return 100.0 * excess / abs(s) if excess > 0 else 0.0


def peak(
    t: ArrayLike, y: ArrayLike, *, initial: float = 0.0, t_step: float | None = None
) -> tuple[float, float]:
    """(value, time from ``t_step``) of the first sample farthest from ``initial``."""
    ta, ya = _series(t, y)
    i = int(np.argmax(np.abs(ya - float(initial))))
    return float(ya[i]), float(ta[i] - (ta[0] if t_step is None else t_step))


def step_metrics(
    t: ArrayLike,
    y: ArrayLike,
    *,
    final: float | None = None,
    initial: float = 0.0,
    rise_pct: tuple[float, float] = (10.0, 90.0),
    band_pct: float = 2.0,
    t_step: float | None = None,
) -> StepMetrics:
    """All step characteristics at once (definitions in the module docstring)."""
    ta, ya = _series(t, y)
    yf, y0 = _step(ya, final, initial)
    value, when = peak(ta, ya, initial=y0, t_step=t_step)
    return StepMetrics(
        rise_time=rise_time(ta, ya, final=yf, initial=y0, limits_pct=rise_pct),
        settling_time=settling_time(ta, ya, final=yf, initial=y0, band_pct=band_pct, t_step=t_step),
        overshoot=overshoot(ya, final=yf, initial=y0),
        peak=value,
        peak_time=when,
        steady_state_value=yf,
        initial=y0,
    )


def _window(ta: Series, start: float | None, stop: float | None) -> NDArray[np.bool_]:
    mask = np.ones(ta.size, dtype=bool)
    if start is not None:
        mask &= ta >= start
    if stop is not None:
        mask &= ta <= stop
    if not mask.any():
        raise ValueError(f"no samples in the window [{start}, {stop}]")
    return mask


def steady_state_error(t: ArrayLike, y: ArrayLike, reference: float, *, tail: float = 0.0) -> float:
    """reference - y at the end: the last sample, or the mean over the last ``tail`` s."""
    ta, ya = _series(t, y)
    if not (np.isfinite(reference) and np.isfinite(tail) and tail >= 0):
        raise ValueError(f"reference must be finite and tail >= 0, got {reference}, {tail}")
    end = ya[ta >= ta[-1] - tail]
    return float(reference - np.mean(end))


def tracking_error(
    t: ArrayLike,
    y: ArrayLike,
    reference: ArrayLike,
    *,
    start: float | None = None,
    stop: float | None = None,
) -> TrackingError:
    """Error y - reference over [start, stop] (inclusive; whole record by default).

    ``reference`` is a number or an array like y. The RMS is over samples, which is the
    time RMS on the rig's fixed tick.
    """
    ta, ya = _series(t, y)
    r = np.broadcast_to(np.asarray(reference, dtype=np.float64), ya.shape)
    if not np.all(np.isfinite(r)):
        raise ValueError("reference must be finite")
    mask = _window(ta, start, stop)
    e = ya[mask] - r[mask]
    i = int(np.argmax(np.abs(e)))
    return TrackingError(
        rms=float(np.sqrt(np.mean(e * e))),
        max_abs=float(abs(e[i])),
        time_of_max=float(ta[mask][i]),
        samples=int(e.size),
    )


def band_check(
    t: ArrayLike,
    y: ArrayLike,
    lo: ArrayLike,
    hi: ArrayLike,
    *,
    start: float | None = None,
    stop: float | None = None,
) -> BandCheck:
    """Did lo <= y <= hi hold at every sample in [start, stop]? lo/hi may vary with t."""
    ta, ya = _series(t, y)
    lo_a = np.broadcast_to(np.asarray(lo, dtype=np.float64), ya.shape)
    hi_a = np.broadcast_to(np.asarray(hi, dtype=np.float64), ya.shape)
    if np.any(np.isnan(lo_a)) or np.any(np.isnan(hi_a)) or np.any(lo_a > hi_a):
        raise ValueError("band needs lo <= hi (and no NaN)")
    mask = _window(ta, start, stop)
    out = np.flatnonzero(mask & ((ya < lo_a) | (ya > hi_a)))
    if out.size == 0:
        return BandCheck(inside=True, first_violation=None)
    return BandCheck(inside=False, first_violation=float(ta[out[0]]))
