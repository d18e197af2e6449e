"""How much of its trip band a watched signal used, tick by tick.

    use = (v - base) / (bound - base)      toward the bound on v's side of the base

0 is the base, 1 the trip bound, above 1 beyond it. The base of a two-sided band
(trip_low .. trip_high) is its middle, so either trip bound is 1. A one-sided band has
no middle; its base is where the signal was at tick 0, v_0 (the operating point the
run started from), or 0 when v_0 is not inside the band. A limit without trip bounds
is measured against its warn bounds instead, and says so. A rate limit's use is
|dv/dt| / rate_trip. The warn bounds are drawn at their own fractions.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from plantrig.sim import LimitSpec, RunRecord, column_parts, decimate_minmax


@dataclass
class LimitUse:
    t: NDArray[np.float64]            # plant time of the plotted points
    use: NDArray[np.float64]          # use at those times (a min/max envelope when long)
    rate_use: NDArray[np.float64] | None   # |dv/dt| / rate_trip at rate_t
    rate_t: NDArray[np.float64]
    base: float
    warn_fractions: list[float]
    peak: float                       # of every tick, not of the plotted points
    peak_time: float
    peak_value: float
    bands_text: str


PLOT_BUCKETS = 2000      # per part: a part's use is drawn as its buckets' min and max


def limit_use(record: RunRecord, lim: LimitSpec) -> LimitUse:
    """The limit's use over every tick of the run, read a part at a time from the
    folder: the peak is exact, the plotted series keeps each bucket's min and max."""
    tick = float((record.summary.get("rig") or {}).get("tick_s") or _step(record.t))
    parts = column_parts(record.folder, lim.column)
    first = next(parts, np.zeros(0))
    lo, hi, against = lim.trip_low, lim.trip_high, "trip"
    if not (math.isfinite(lo) or math.isfinite(hi)):
        lo, hi, against = lim.warn_low, lim.warn_high, "warn (no trip bound)"
    v0 = float(first[0]) if len(first) else 0.0
    if math.isfinite(lo) and math.isfinite(hi):
        base = (lo + hi) / 2
    else:
        inside = math.isfinite(v0) and (v0 > lo if math.isfinite(lo) else v0 < hi)
        base = v0 if inside else 0.0
    has_rate = math.isfinite(lim.rate_trip)
    peak, peak_at, peak_value = -math.inf, 0, math.nan
    t_plot, use_plot, rate_t, rate_plot = [], [], [], []
    start, before = 0, v0
    for v in itertools.chain([first], parts):
        if not len(v):
            continue
        use = _use(v, base, lo, hi)
        i = int(np.argmax(use))
        if use[i] > peak:
            peak, peak_at, peak_value = float(use[i]), start + i, float(v[i])
        t = np.multiply(start + np.arange(len(v)), tick, dtype=np.float64)
        shown_t, shown = decimate_minmax(t, use, PLOT_BUCKETS)
        t_plot.append(shown_t)
        use_plot.append(shown)
        if has_rate:
            rate = np.abs(np.diff(v, prepend=before)) / max(tick, 1e-12) / lim.rate_trip
            shown_t, shown = decimate_minmax(t, rate, PLOT_BUCKETS)
            rate_t.append(shown_t)
            rate_plot.append(shown)
        start, before = start + len(v), float(v[-1])
    warn = []
    for w, b in ((lim.warn_high, hi), (lim.warn_low, lo)):
        if math.isfinite(w) and math.isfinite(b) and w != b and b != base:
            warn.append(abs(w - base) / abs(b - base))
    if has_rate and math.isfinite(lim.rate_warn) and lim.rate_warn < lim.rate_trip:
        warn.append(lim.rate_warn / lim.rate_trip)
    bands = [f"{name} {value:g} {lim.unit}".rstrip() for name, value in (
        ("trip below", lim.trip_low), ("trip above", lim.trip_high),
        ("warn below", lim.warn_low), ("warn above", lim.warn_high),
        ("trip faster than", lim.rate_trip), ("warn faster than", lim.rate_warn))
        if math.isfinite(value)]
    both = math.isfinite(lo) and math.isfinite(hi)
    base_text = (f"0 = the middle of the {against} band ({base:g} {lim.unit})" if both else
                 f"0 = {base:g} {lim.unit}".rstrip() + (" (the value at tick 0)"
                                                       if start and base == v0 else ""))
    return LimitUse(_joined(t_plot), _joined(use_plot),
                    _joined(rate_plot) if has_rate and start else None, _joined(rate_t),
                    base, warn, peak if start else 0.0,
                    peak_at * tick if start else 0.0, peak_value,
                    f"{', '.join(bands)}; use {base_text}, 1 = the {against.split()[0]} "
                    "bound")


def _use(v: NDArray[np.float64], base: float, lo: float, hi: float) -> NDArray[np.float64]:
    """Use of each value: toward the bound on its side of the base; NaN counts as
    beyond (a NaN trips, sim/safety/_limits.py)."""
    use = np.full(len(v), np.nan)
    if math.isfinite(hi) and hi != base:
        above = v >= base
        use[above] = (v[above] - base) / (hi - base)
    if math.isfinite(lo) and lo != base:
        below = v < base
        use[below] = (base - v[below]) / (base - lo)
    use[~np.isfinite(v)] = np.inf
    return np.where(np.isnan(use), 0.0, use)


def _joined(pieces: list[NDArray[np.float64]]) -> NDArray[np.float64]:
    return np.concatenate(pieces) if pieces else np.zeros(0)


def _step(t: NDArray[np.float64]) -> float:
    return float(t[1] - t[0]) if len(t) > 1 else 1.0
