"""Limits on plant signals: warn and trip bands, low and high, and rate-of-change limits.

A limit watches one recorded signal of the tick (a state ``x:``, an input ``u:`` or an
output ``y:``), every tick, after the plant step has computed y_k:

    code 0  ok      warn_low <= v <= warn_high  and  |v_k - v_{k-1}| / tick <= rate_warn
    code 1  warn    outside a warn bound, inside every trip bound
    code 2  trip    outside a trip bound (or v is NaN); this is what interlocks act on

A bound left out is unbounded; a limit with trip bounds only warns at its trip bounds.
The code of each limit is a tick column ``limit:<name>``.

The check runs on the hot path: a cheap screen every tick (LimitBank), codes only when
something is outside a warn bound or NaN.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.config._checker import did_you_mean

if TYPE_CHECKING:
    from plantrig.sim.config._checker import Checker
    from plantrig.sim.config._rigfile import Signal

OK, WARN, TRIP = 0, 1, 2
LIMIT_KEYS = {"name", "signal", "warn_low", "warn_high", "trip_low", "trip_high",
              "rate_warn", "rate_trip", "description"}
GROUP_PREFIX = (("y", "outputs"), ("x", "states"), ("u", "inputs"))


@dataclass(frozen=True)
class LimitSpec:
    """One checked ``[[limits]]`` entry; ``column`` is the tick column it watches."""

    name: str
    column: str
    unit: str = ""
    warn_low: float = -math.inf
    warn_high: float = math.inf
    trip_low: float = -math.inf
    trip_high: float = math.inf
    rate_warn: float = math.inf
    rate_trip: float = math.inf
    description: str = ""

    @property
    def trips(self) -> bool:
        """True when the limit has any trip bound (so an interlock may act on it)."""
        return any(math.isfinite(v) for v in (self.trip_low, self.trip_high, self.rate_trip))

    def explain(self, value: float, rate: float) -> str:
        """Why ``value`` (changing at ``rate`` per second) is outside this limit, in words,
        with the rig-file key of the bound in brackets: "y:level = 2.1 m, above its trip
        limit 2 m (trip_high)"."""
        if math.isnan(value):
            return f"{self.column} is NaN"
        for bound, text, key, outside in (
                (self.trip_high, "above its trip limit", "trip_high", value > self.trip_high),
                (self.trip_low, "below its trip limit", "trip_low", value < self.trip_low),
                (self.rate_trip, "changing faster than its trip rate", "rate_trip",
                 abs(rate) > self.rate_trip),
                (self.warn_high, "above its warning limit", "warn_high",
                 value > self.warn_high),
                (self.warn_low, "below its warning limit", "warn_low", value < self.warn_low),
                (self.rate_warn, "changing faster than its warning rate", "rate_warn",
                 abs(rate) > self.rate_warn)):
            if outside:
                unit = f"{self.unit}/s" if key.startswith("rate") else self.unit
                shown = f"{rate if key.startswith('rate') else value:.6g} {unit}".rstrip()
                return f"{self.column} = {shown}, {text} {f'{bound:g} {unit}'.rstrip()} ({key})"
        return f"{self.column} = {value:.6g} inside its limits"


def resolve_signal(name: str, groups: dict[str, list[Signal]]) -> tuple[str | None, str]:
    """The tick column for a signal named ``name`` or ``x:/u:/y:name``; else (None, why)."""
    if ":" in name:
        prefix, _, bare = name.partition(":")
        group = dict(GROUP_PREFIX).get(prefix)
        if group is None:
            return None, (f"expected a prefix x: (state), u: (input) or y: (output), "
                          f"found {prefix!r}")
        names = [s.name for s in groups[group]]
        if bare in names:
            return name, ""
        hint = did_you_mean(bare, names).replace(" '", f" '{prefix}:", 1)
        return None, f"no {group[:-1]} named {bare!r} ({', '.join(names) or 'none'}){hint}"
    found = [f"{p}:{name}" for p, g in GROUP_PREFIX if name in [s.name for s in groups[g]]]
    if len(found) == 1:
        return found[0], ""
    if found:
        return None, (f"{name!r} names more than one signal; write one of "
                      f"{', '.join(repr(f) for f in found)}")
    every = [s.name for _, g in GROUP_PREFIX for s in groups[g]]
    hint = did_you_mean(name, every)
    return None, f"no state, input or output named {name!r}{hint}"


def parse_limits(c: Checker, doc: dict[str, Any], states: list[Signal], inputs: list[Signal],
                 outputs: list[Signal]) -> list[LimitSpec]:
    """Check ``[[limits]]``: every mistake goes to ``c`` with its key path."""
    value = doc.get("limits", [])
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        c.add("limits", "expected an array of tables ([[limits]])")
        return []
    groups = {"states": states, "inputs": inputs, "outputs": outputs}
    units = {f"{p}:{s.name}": s.unit for p, g in GROUP_PREFIX for s in groups[g]}
    out: list[LimitSpec] = []
    for i, entry in enumerate(value):
        where = f"limits[{i}]"
        c.no_unknown(entry, LIMIT_KEYS, where)
        signal = c.take(entry, "signal", where, "str")
        column = None
        if signal is not None:
            column, why = resolve_signal(signal, groups)
            if column is None:
                c.add(f"{where}.signal", why)
        name = c.take(entry, "name", where, "str", default=None)
        if name is None and signal is not None:
            name = signal.partition(":")[2] or signal
        if name is not None and not name.isidentifier():
            c.add(f"{where}.name", f"expected a plain identifier (letters, digits, _), "
                                   f"found {name!r}")
        if name is not None and any(s.name == name for s in out):
            c.add(f"{where}.name", f"duplicate limit name {name!r}; give each limit a name")
        b = {key: c.take(entry, key, where, "number", default=None)
             for key in ("warn_low", "warn_high", "trip_low", "trip_high", "rate_warn",
                         "rate_trip")}
        if all(v is None for v in b.values()):
            c.add(where, "expected at least one of warn_low, warn_high, trip_low, trip_high, "
                         "rate_warn, rate_trip")
        for key in ("rate_warn", "rate_trip"):
            if b[key] is not None and b[key] <= 0:
                c.add(f"{where}.{key}", f"expected a positive rate per second, found {b[key]}")
        for lo_key, hi_key in (("warn_low", "warn_high"), ("trip_low", "trip_high")):
            if b[lo_key] is not None and b[hi_key] is not None and b[lo_key] >= b[hi_key]:
                c.add(f"{where}.{hi_key}", f"expected more than {lo_key} ({b[lo_key]}), "
                                           f"found {b[hi_key]}")
        # a warn bound lies inside its trip bound; a missing warn bound warns at the trip
        for warn, trip, inside in (("warn_low", "trip_low", lambda w, t: w >= t),
                                   ("warn_high", "trip_high", lambda w, t: w <= t),
                                   ("rate_warn", "rate_trip", lambda w, t: w <= t)):
            if b[warn] is None:
                b[warn] = b[trip]
            elif b[trip] is not None and not inside(b[warn], b[trip]):
                c.add(f"{where}.{warn}", f"expected inside {trip} ({b[trip]}), "
                                         f"found {b[warn]}")
        if column is None or name is None:
            continue
        desc = c.take(entry, "description", where, "str", default="") or ""
        bounds = {k: float(v) for k, v in b.items() if v is not None}
        out.append(LimitSpec(name=name, column=column, unit=units.get(column, ""),
                             description=desc, **bounds))
    return out


VECTOR_MIN = 16   # from this many limits on, the numpy screen is the cheaper (measured)


class LimitBank:
    """All limits of a rig, checked together on one tick record (no allocation per tick).

    ``check(row)`` reads the watched values from ``row`` (the engine's tick record),
    writes each limit's code into its ``limit:`` column of the same row, and says whether
    any code changed; ``rising_trips``, ``falling_trips`` and ``rising_warns`` then list
    the limits whose code reached or left TRIP, or reached WARN, in that tick.

    Every tick starts with a screen: is every value inside its warn band and every
    change |v_k - v_{k-1}| inside rate_warn * tick? (NaN never is.) Codes are worked out
    only when the screen fails. With many limits the screen is one numpy comparison of
    the stack [v, -v, |dv|] against [warn_high, -warn_low, rate_warn * tick] over
    preallocated arrays (five calls); below VECTOR_MIN limits a plain loop over floats
    is cheaper, because each numpy call costs about 1 us on small arrays (on the
    reference VM: 2 limits 0.9 us by loop against 6 us by numpy; 32 limits 5.5 us
    against 3.2 us), so the bank picks the screen by count.
    """

    def __init__(self, specs: list[LimitSpec] | tuple[LimitSpec, ...], columns: list[str],
                 tick: float) -> None:
        self.specs = list(specs)
        n = len(self.specs)
        self.n = n
        self.tick = tick
        idx = [columns.index(s.column) for s in self.specs]
        self.watched = idx                      # the tick column each limit reads
        self._code_idx = np.array([columns.index(f"limit:{s.name}") for s in self.specs],
                                  dtype=np.intp)
        self._rates = any(math.isfinite(s.rate_warn) for s in self.specs)
        self._primed = False
        self.vector = n >= VECTOR_MIN
        if self.vector:
            size = 3 * n if self._rates else 2 * n
            self._idx2 = np.array(idx + idx, dtype=np.intp)
            self._s = np.zeros(size)
            self._pm = self._s[:2 * n]          # [v, -v]
            self._dv = self._s[2 * n:]          # |v - v_prev| (rates only)
            self.values: Any = self._s[:n]
            self.deltas: Any = self._dv if self._rates else np.zeros(n)
            self._sign = np.array([1.0] * n + [-1.0] * n)
            self._prev = np.zeros(n)
            self._ok = np.zeros(size, dtype=bool)
            self._warn = np.array([s.warn_high for s in self.specs]
                                  + [-s.warn_low for s in self.specs]
                                  + ([s.rate_warn * tick for s in self.specs]
                                     if self._rates else []))
        else:
            self.values = [0.0] * n
            self.deltas = [0.0] * n
            self._items = [(j, i, s.warn_low, s.warn_high, s.rate_warn * tick)
                           for j, (i, s) in enumerate(zip(idx, self.specs, strict=True))]
        self.codes = np.zeros(n, dtype=np.int8)
        self._last = np.zeros(n, dtype=np.int8)
        self._nonzero = False
        self.rising_trips: list[int] = []
        self.falling_trips: list[int] = []
        self.rising_warns: list[int] = []

    def value(self, i: int) -> float:
        return float(self.values[i])

    @property
    def primed(self) -> bool:
        """Whether the screen has seen a tick (before that, no rate is measured)."""
        return self._primed

    @property
    def all_ok(self) -> bool:
        """Every code OK: a tick whose screen passes changes nothing."""
        return not self._nonzero

    def screen(self) -> tuple[list[float], list[float], list[float], bool]:
        """The screen's bounds, as this bank compares them: warn_low, warn_high and
        rate_warn * tick per limit, and whether any rate is checked."""
        return ([s.warn_low for s in self.specs], [s.warn_high for s in self.specs],
                [s.rate_warn * self.tick for s in self.specs], self._rates)

    def screened_elsewhere(self, values: list[float]) -> None:
        """The screen passed on ticks checked outside this bank (plain ticks in C), the
        last of them seeing ``values``: rates of the next tick are measured from them."""
        self.values[:] = values
        if self.vector:
            self._prev[:] = values
        self._primed = True

    def rate(self, i: int) -> float:
        """|dv/dt| of limit i at the last check (0 without rate limits)."""
        return float(self.deltas[i]) / self.tick

    def check(self, row: NDArray[np.float64]) -> bool:
        """Update every code from ``row``; True when any code differs from the last tick."""
        inside = self._screen_vector(row) if self.vector else self._screen_loop(row)
        if inside:
            if not self._nonzero:
                return False
            self.codes[:] = OK
        else:
            self._codes()
        return self._publish(row)

    def _screen_loop(self, row: NDArray[np.float64]) -> bool:
        item, values, deltas = row.item, self.values, self.deltas
        rates, primed = self._rates, self._primed
        self._primed = True
        inside = True
        for j, i, lo, hi, rate in self._items:
            v = item(i)
            if rates:
                d = abs(v - values[j]) if primed else 0.0
                deltas[j] = d
                if not d <= rate:
                    inside = False
            values[j] = v
            if not lo <= v <= hi:
                inside = False
        return inside

    def _screen_vector(self, row: NDArray[np.float64]) -> bool:
        row.take(self._idx2, out=self._pm)
        np.multiply(self._pm, self._sign, out=self._pm)
        if self._rates:
            if not self._primed:             # no change before the first tick
                self._prev[:] = self.values
                self._primed = True
            np.subtract(self.values, self._prev, out=self._dv)
            np.abs(self._dv, out=self._dv)
            self._prev[:] = self.values
        np.less_equal(self._s, self._warn, out=self._ok)
        return np.count_nonzero(self._ok) == self._ok.size

    def _codes(self) -> None:
        for i, spec in enumerate(self.specs):
            v, d = float(self.values[i]), float(self.deltas[i]) / self.tick
            if not (spec.trip_low <= v <= spec.trip_high and d <= spec.rate_trip):
                self.codes[i] = TRIP
            elif not (spec.warn_low <= v <= spec.warn_high and d <= spec.rate_warn):
                self.codes[i] = WARN
            else:
                self.codes[i] = OK

    def _publish(self, row: NDArray[np.float64]) -> bool:
        codes, last = self.codes, self._last
        if np.array_equal(codes, last):
            return False
        self.rising_trips = [i for i in range(self.n) if codes[i] == TRIP and last[i] != TRIP]
        self.falling_trips = [i for i in range(self.n) if codes[i] != TRIP and last[i] == TRIP]
        self.rising_warns = [i for i in range(self.n) if codes[i] == WARN and last[i] == OK]
        row[self._code_idx] = codes
        last[:] = codes
        self._nonzero = bool(codes.any())
        return True
