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

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from plantrig.sim import LimitSpec, RunRecord


@dataclass
class LimitUse:
    use: NDArray[np.float64]          # per tick
    rate_use: NDArray[np.float64] | None
    base: float
    warn_fractions: list[float]
    peak: float
    peak_time: float
    peak_value: float
    bands_text: str


def limit_use(record: RunRecord, lim: LimitSpec) -> LimitUse:
    v = record[lim.column]
    t = record.t
    lo, hi, against = lim.trip_low, lim.trip_high, "trip"
    if not (math.isfinite(lo) or math.isfinite(hi)):
        lo, hi, against = lim.warn_low, lim.warn_high, "warn (no trip bound)"
    if math.isfinite(lo) and math.isfinite(hi):
        base = (lo + hi) / 2
    else:
        v0 = float(v[0]) if len(v) else 0.0
        inside = math.isfinite(v0) and (v0 > lo if math.isfinite(lo) else v0 < hi)
        base = v0 if inside else 0.0
    use = np.full(len(v), np.nan)
    if math.isfinite(hi) and hi != base:
        above = v >= base
        use[above] = (v[above] - base) / (hi - base)
    if math.isfinite(lo) and lo != base:
        below = v < base
        use[below] = (base - v[below]) / (base - lo)
    use[~np.isfinite(v)] = np.inf                 # NaN trips (sim/safety/_limits.py)
    use = np.where(np.isnan(use), 0.0, use)
    warn = []
    for w, b in ((lim.warn_high, hi), (lim.warn_low, lo)):
        if math.isfinite(w) and math.isfinite(b) and w != b and b != base:
            warn.append(abs(w - base) / abs(b - base))
    rate_use = None
    if math.isfinite(lim.rate_trip) and len(v) > 1:
        rate = np.abs(np.diff(v, prepend=v[0])) / max(float(t[1] - t[0]), 1e-12)
        rate_use = rate / lim.rate_trip
        if math.isfinite(lim.rate_warn) and lim.rate_warn < lim.rate_trip:
            warn.append(lim.rate_warn / lim.rate_trip)
    i = int(np.argmax(use)) if len(use) else 0
    bands = [f"{name} {value:g} {lim.unit}".rstrip() for name, value in (
        ("trip below", lim.trip_low), ("trip above", lim.trip_high),
        ("warn below", lim.warn_low), ("warn above", lim.warn_high),
        ("trip faster than", lim.rate_trip), ("warn faster than", lim.rate_warn))
        if math.isfinite(value)]
    both = math.isfinite(lo) and math.isfinite(hi)
    base_text = (f"0 = the middle of the {against} band ({base:g} {lim.unit})" if both else
                 f"0 = {base:g} {lim.unit}".rstrip() + (" (the value at tick 0)"
                                                       if len(v) and base == float(v[0])
                                                       else ""))
    return LimitUse(use, rate_use, base, warn, float(use[i]) if len(use) else 0.0,
                    float(t[i]) if len(t) else 0.0, float(v[i]) if len(v) else math.nan,
                    f"{', '.join(bands)}; use {base_text}, 1 = the {against.split()[0]} "
                    "bound")
