"""Two run folders side by side: signal deviations, events, outcomes (numbers only).

Alignment by plant time. When both runs have the same tick, tick k of A meets tick k
of B (exact, no arithmetic on the values). When the ticks differ, both are compared on
the coarser run's grid t_k; the finer run gives its latest sample at or before t_k (a
zero-order hold, as the plant holds its inputs over a tick). Only the ticks both runs
recorded are compared; a run that ended earlier is said so.

Per signal, with a = A's value, b = B's, scale = the largest |a| over the compared
ticks (|b| when A is all zero, 1 when both are):

    deviation d_k = |a_k - b_k|        relative r_k = d_k / scale
    beyond tolerance  d_k > abs_tol + rel_tol * scale
    RMS = sqrt(mean(d_k^2))

A NaN in only one run is a deviation of infinity; NaN in both counts as equal.
Columns are read one at a time from run.h5 (one dataset per column), so two 1-hour
1 kHz runs are compared without holding either in memory whole.
"""

from __future__ import annotations

import fnmatch
import json
import math
import tomllib
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.config._checker import RigFileError, RigIssue, describe_value
from plantrig.sim.records._envelope import minmax_bands
from plantrig.sim.records._reader import read_current_events

SIGNAL_PREFIXES = ("ref", "cmd", "sent", "y", "x", "u", "d", "limit", "trip")
MUST_MATCH = ("cmd", "sent", "y", "x", "u")     # the same plant and link, or no comparison
EVENT_KINDS = ("trip", "estop", "reset", "fault_injected", "fault_cleared", "link_lost",
               "link_restored", "phase", "scenario_step", "operator_stop", "error",
               "non_finite_state", "non_finite_input", "rule_failed", "run_end")
PLOT_POINTS = 2000      # envelope buckets kept per signal for plots
PART_TICKS = 1 << 19    # ticks of one column read at a time (4 MiB a side)
KEEP_BYTES = 64 << 20   # A's side of a column kept between the two passes if it fits


class NotComparable(ValueError):
    """The two folders cannot be compared; the message says what differs."""


@dataclass(frozen=True)
class Tolerance:
    abs: float = 0.0
    rel: float = 0.0


@dataclass
class Tolerances:
    """Default and per-signal tolerances (``fnmatch`` patterns such as ``y:*``; the
    last matching pattern wins) and the allowed event time difference in seconds."""

    default: Tolerance = Tolerance()
    signals: list[tuple[str, Tolerance]] = field(default_factory=list)
    event_time: float = 0.0

    def of(self, column: str) -> Tolerance:
        found = self.default
        for pattern, tol in self.signals:
            if fnmatch.fnmatchcase(column, pattern):
                found = tol
        return found


@dataclass
class SignalDeviation:
    signal: str
    unit: str
    max_abs: float
    t_max_abs: float | None
    max_rel: float
    rms: float
    scale: float
    abs_tol: float
    rel_tol: float
    first_beyond_t: float | None
    first_beyond_tick: int | None
    ticks_beyond: int
    within: bool
    bit_identical: bool


@dataclass
class EventPair:
    kind: str
    what: str
    t_a: float | None
    t_b: float | None
    within: bool

    @property
    def dt(self) -> float | None:
        return None if self.t_a is None or self.t_b is None else self.t_b - self.t_a


@dataclass
class Envelope:
    """A signal reduced for plotting: per bucket the min and max of A, B and |a - b|."""

    t: NDArray[np.float64]
    a_lo: NDArray[np.float64]
    a_hi: NDArray[np.float64]
    b_lo: NDArray[np.float64]
    b_hi: NDArray[np.float64]
    d_hi: NDArray[np.float64]


@dataclass
class Comparison:
    a: Path
    b: Path
    alignment: str
    ticks_compared: int
    notes: list[str]
    signals: list[SignalDeviation]
    events: list[EventPair]
    outcomes: dict[str, Any]
    envelopes: dict[str, Envelope] = field(default_factory=dict, repr=False)

    @property
    def signals_within(self) -> bool:
        return all(s.within for s in self.signals)

    @property
    def events_within(self) -> bool:
        return all(e.within for e in self.events)

    @property
    def outcomes_same(self) -> bool:
        return bool(self.outcomes["same"])

    @property
    def agree(self) -> bool:
        return self.signals_within and self.events_within and self.outcomes_same

    def as_dict(self) -> dict[str, Any]:
        return {
            "format": "plantrig comparison", "version": 1,
            "a": str(self.a), "b": str(self.b), "agree": self.agree,
            "signals_within": self.signals_within, "events_within": self.events_within,
            "outcomes_same": self.outcomes_same, "alignment": self.alignment,
            "ticks_compared": self.ticks_compared, "notes": self.notes,
            "signals": [asdict(s) for s in self.signals],
            "events": [{**asdict(e), "dt": e.dt} for e in self.events],
            "outcomes": self.outcomes,
        }


class RunColumns:
    """One run folder's columns, read one at a time (run.h5; ticks.npy otherwise)."""

    def __init__(self, folder: str | Path) -> None:
        self.folder = Path(folder)
        summary = self.folder / "summary.json"
        if not summary.is_file():
            raise NotComparable(f"{self.folder}: not a finished run folder (no summary.json)")
        self.summary: dict[str, Any] = json.loads(summary.read_text())
        self.columns: list[str] = list(self.summary.get("columns", []))
        self.units: list[str] = list(self.summary.get("units", [""] * len(self.columns)))
        self.tick = float(self.summary.get("rig", {}).get("tick_s", 0.0))
        self.h5 = self.folder / "run.h5"
        self.n = int(self.summary.get("ticks_recorded", 0))
        if not self.h5.is_file() and not (self.folder / "ticks.npy").is_file():
            raise NotComparable(f"{self.folder}: no tick data (run.h5 or ticks.npy)")
        self.events = read_current_events(self.folder / "events.jsonl")
        self._file: Any = None          # run.h5, open while the comparison reads it

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None

    def unit(self, column: str) -> str:
        return self.units[self.columns.index(column)]

    def read(self, column: str, start: int = 0, stop: int | None = None
             ) -> NDArray[np.float64]:
        """Ticks ``start`` to ``stop`` of one column (only those are read)."""
        if self.h5.is_file():
            from plantrig.sim.records._hdf5 import column_place
            if self._file is None:
                import h5py
                self._file = h5py.File(self.h5, "r")
            group, name = column_place(column)
            return np.asarray(self._file["ticks"][group][name][start:stop], dtype=np.float64)
        rows = np.load(self.folder / "ticks.npy", mmap_mode="r")
        column_rows = rows[column] if rows.dtype.names else \
            rows.reshape(-1, len(self.columns))[:, self.columns.index(column)]
        return np.array(column_rows[start:stop])


def signal_columns(columns: list[str]) -> list[str]:
    return [c for c in columns if c.partition(":")[0] in SIGNAL_PREFIXES and ":" in c]


def compatibility(a: RunColumns, b: RunColumns) -> tuple[list[str], list[str]]:
    """(columns to compare, notes); raises NotComparable saying what differs."""
    sa, sb = signal_columns(a.columns), signal_columns(b.columns)
    problems = []
    for prefix in MUST_MATCH:
        only_a = [c for c in sa if c.startswith(prefix + ":") and c not in sb]
        only_b = [c for c in sb if c.startswith(prefix + ":") and c not in sa]
        if only_a or only_b:
            problems.append(f"{prefix} signals differ: only in A {only_a or 'none'}, "
                            f"only in B {only_b or 'none'}")
    common = [c for c in sa if c in sb]
    for c in common:
        if c.partition(":")[0] in MUST_MATCH and a.unit(c) != b.unit(c):
            problems.append(f"{c}: unit {a.unit(c)!r} in A, {b.unit(c)!r} in B")
    if not a.tick or not b.tick:
        problems.append("a summary without rig.tick_s")
    if problems:
        raise NotComparable("the runs are not of compatible rigs: " + "; ".join(problems))
    notes = []
    for c in [c for c in sa if c not in sb]:
        notes.append(f"{c} only in A (not compared)")
    for c in [c for c in sb if c not in sa]:
        notes.append(f"{c} only in B (not compared)")
    return common, notes


def _grid(a: RunColumns, b: RunColumns) -> tuple[str, NDArray[np.int64] | None,
                                                 NDArray[np.int64] | None, int, list[str]]:
    """How to align: (description, index into A, index into B, ticks, notes); None
    indices mean tick k meets tick k."""
    notes = []
    if a.n != b.n:
        notes.append(f"A recorded {a.n} ticks, B {b.n}: the first "
                     f"{min(a.n, b.n)} ticks' worth of plant time is compared")
    if math.isclose(a.tick, b.tick, rel_tol=1e-12):
        n = min(a.n, b.n)
        return f"by tick (both {a.tick:g} s)", None, None, n, notes
    coarse, fine = (a, b) if a.tick > b.tick else (b, a)
    t_end = min(a.n * a.tick, b.n * b.tick)
    n = min(coarse.n, int(math.floor(t_end / coarse.tick + 1e-9)))
    t = np.arange(n) * coarse.tick
    idx = np.searchsorted(np.arange(fine.n) * fine.tick, t + fine.tick * 1e-6,
                          side="right") - 1
    idx = np.clip(idx, 0, fine.n - 1)
    ident = np.arange(n)
    text = (f"resampled: on the {coarse.tick:g} s grid of {'A' if coarse is a else 'B'}, "
            f"the {fine.tick:g} s run held at its latest sample (zero-order hold)")
    return (text, ident if coarse is a else idx, idx if coarse is a else ident, n, notes)


def compare_runs(folder_a: str | Path, folder_b: str | Path,
                 tolerances: Tolerances | None = None, *,
                 envelopes: bool = True) -> Comparison:
    """Compare two run folders; raises NotComparable when they cannot be compared."""
    tol = tolerances or Tolerances()
    a, b = RunColumns(folder_a), RunColumns(folder_b)
    columns, notes = compatibility(a, b)
    alignment, ia, ib, n, grid_notes = _grid(a, b)
    notes = grid_notes + notes
    t_step = a.tick if ia is None or a.tick >= b.tick else b.tick
    out: list[SignalDeviation] = []
    plots: dict[str, Envelope] = {}
    try:
        for column in columns:
            parts = _AlignedParts(a, b, column, ia, ib, n)
            dev, env = _deviation(column, a.unit(column), parts, t_step, tol.of(column),
                                  envelopes)
            out.append(dev)
            if env is not None:
                plots[column] = env
    finally:
        a.close()
        b.close()
    return Comparison(Path(folder_a), Path(folder_b), alignment, n, notes, out,
                      pair_events(a.events, b.events, tol.event_time),
                      _outcomes(a.summary, b.summary), plots)


class _AlignedParts:
    """One column of A and of B on the common grid, a part at a time: memory stays the
    same whatever the runs' length (a part is whole plot buckets, so bands add up)."""

    def __init__(self, a: RunColumns, b: RunColumns, column: str,
                 ia: NDArray[np.int64] | None, ib: NDArray[np.int64] | None, n: int) -> None:
        self.a, self.b, self.column, self.ia, self.ib, self.n = a, b, column, ia, ib, n
        self.bucket = max(1, math.ceil(n / PLOT_POINTS))
        self.part = max(1, PART_TICKS // self.bucket) * self.bucket
        self._kept: list[NDArray[np.float64]] | None = None

    def _side(self, run: RunColumns, index: NDArray[np.int64] | None, start: int,
              stop: int) -> NDArray[np.float64]:
        if index is None:
            return run.read(self.column, start, stop)
        wanted = index[start:stop]                 # increasing: one contiguous read
        first = int(wanted[0]) if len(wanted) else 0
        last = int(wanted[-1]) + 1 if len(wanted) else 0
        return run.read(self.column, first, last)[wanted - first]

    def __iter__(self) -> Iterator[tuple[int, NDArray[np.float64], NDArray[np.float64]]]:
        kept = self._kept
        for i, start in enumerate(range(0, self.n, self.part)):
            stop = min(self.n, start + self.part)
            a = kept[i] if kept is not None else self._side(self.a, self.ia, start, stop)
            yield start, a, self._side(self.b, self.ib, start, stop)

    def scale(self) -> float:
        """The largest |a| that is not NaN (of |b| when A is all zero), for relative
        figures. A's parts are kept for the second pass when they fit in KEEP_BYTES."""
        kept: list[NDArray[np.float64]] | None = []
        for side, run, index in ((0, self.a, self.ia), (1, self.b, self.ib)):
            top, held = 0.0, 0
            for start in range(0, self.n, self.part):
                v = self._side(run, index, start, min(self.n, start + self.part))
                if side == 0 and kept is not None:
                    held += v.nbytes
                    if held <= KEEP_BYTES:
                        kept.append(v)
                    else:
                        kept = None
                largest = float(np.fmax.reduce(np.abs(v))) if v.size else 0.0  # NaN skipped
                if largest > top:
                    top = largest
            if side == 0:
                self._kept = kept
            if top:
                return top
        return 1.0


def _deviation(column: str, unit: str, parts: _AlignedParts, t_step: float,
               tol: Tolerance, envelope: bool) -> tuple[SignalDeviation, Envelope | None]:
    """The deviation figures of one column, from its parts in order."""
    scale = parts.scale()
    limit = tol.abs + tol.rel * scale
    identical, one_sided = True, False
    max_abs, k_max, sum_sq, count = 0.0, None, 0.0, 0
    first: int | None = None
    bands: list[tuple[NDArray[np.float64], ...]] = []
    for start, a, b in parts:
        d = np.abs(a - b)
        if np.isnan(d).any():       # NaN in A or B: equal when both, infinitely apart if one
            nan_a, nan_b = np.isnan(a), np.isnan(b)
            d[nan_a & nan_b] = 0.0
            one = nan_a ^ nan_b
            if one.any():
                d[one] = np.inf
                one_sided = True
        identical = identical and not d.any()   # equal, NaN where the other has NaN
        k = int(np.argmax(d))
        if k_max is None or d[k] > max_abs:
            max_abs, k_max = float(d[k]), start + k
        if not one_sided:
            sum_sq += float(np.dot(d, d))
        beyond = d > limit
        hits = int(np.count_nonzero(beyond))
        if hits and first is None:
            first = start + int(np.argmax(beyond))
        count += hits
        if envelope:
            bands.append((*minmax_bands(a, parts.bucket), *minmax_bands(b, parts.bucket),
                          minmax_bands(np.where(np.isinf(d), np.nan, d), parts.bucket)[1]))
    n = parts.n
    rms = math.inf if one_sided else (math.sqrt(sum_sq / n) if n else 0.0)
    env = None
    if envelope and bands:
        a_lo, a_hi, b_lo, b_hi, d_hi = (np.concatenate(c) for c in zip(*bands, strict=True))
        starts = np.arange(len(a_lo)) * parts.bucket          # each bucket's first tick
        env = Envelope(np.multiply(starts, t_step, dtype=np.float64), a_lo, a_hi, b_lo,
                       b_hi, d_hi)
    return SignalDeviation(
        column, unit, max_abs, None if k_max is None else k_max * t_step, max_abs / scale,
        rms, scale, tol.abs, tol.rel, None if first is None else first * t_step, first,
        count, count == 0, identical), env


def _event_key(ev: dict[str, Any]) -> tuple[str, str]:
    """(kind, name): the interlock, fault, phase, step or rule the event is about, ""
    for an event that names nothing (a link loss, an operator stop, the run's end)."""
    return str(ev["kind"]), str(ev.get("name", ""))


def pair_events(a: list[dict[str, Any]], b: list[dict[str, Any]],
                max_dt: float) -> list[EventPair]:
    """The n-th event of a kind (and name) in A meets the n-th in B."""
    def groups(events: list[dict[str, Any]]) -> dict[tuple[str, str], list[float]]:
        out: dict[tuple[str, str], list[float]] = {}
        for ev in events:
            if ev.get("kind") in EVENT_KINDS:
                out.setdefault(_event_key(ev), []).append(float(ev["time"]))
        return out

    ga, gb = groups(a), groups(b)
    pairs = []
    for key in sorted(set(ga) | set(gb), key=lambda k: (min(ga.get(k, [math.inf])[:1]
                                                            + gb.get(k, [math.inf])[:1]), k)):
        ta, tb = ga.get(key, []), gb.get(key, [])
        for i in range(max(len(ta), len(tb))):
            x = ta[i] if i < len(ta) else None
            y = tb[i] if i < len(tb) else None
            ok = x is not None and y is not None and abs(y - x) <= max_dt + 1e-12
            pairs.append(EventPair(key[0], key[1], x, y, ok))
    pairs.sort(key=lambda p: min(v for v in (p.t_a, p.t_b) if v is not None))
    return pairs


def _outcomes(sa: dict[str, Any], sb: dict[str, Any]) -> dict[str, Any]:
    def one(s: dict[str, Any]) -> dict[str, Any]:
        return {"ended": s.get("ended"), "reason": s.get("reason"),
                "exit_code": s.get("exit_code"), "mode": s.get("mode"),
                "ticks_run": s.get("ticks_run"),
                "acceptance": {r["rule"]: r["passed"] for r in s.get("acceptance", [])},
                "verdicts": {v.get("name", v.get("label", str(i))): v.get("passed")
                             for i, v in enumerate(s.get("verdicts", []))}}
    oa, ob = one(sa), one(sb)
    same = oa["ended"] == ob["ended"] and oa["exit_code"] == ob["exit_code"] and \
        oa["verdicts"] == ob["verdicts"]
    return {"a": oa, "b": ob, "same": same}


def load_tolerances(path: str | Path) -> Tolerances:
    """A tolerance file (TOML)::

        [default]            abs = 0.0, rel = 0.0   (for every signal)
        [signals."y:*"]      abs = 0.01, rel = 0.02 (fnmatch patterns, later wins)
        [events]             time = 0.002           (seconds)

    Raises RigFileError naming the file, key and reason.
    """
    file = str(path)
    try:
        doc = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except OSError as exc:
        raise RigFileError([RigIssue(file, "", f"cannot read: {exc.strerror or exc}")]) from None
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise RigFileError([RigIssue(file, "", f"not valid TOML: {exc}")]) from None
    issues: list[RigIssue] = []
    tol = Tolerances()
    for key in doc:
        if key not in ("default", "signals", "events"):
            issues.append(RigIssue(file, key, "unknown key; known keys: default, events, "
                                              "signals"))
    tol.default = _tolerance(doc.get("default", {}), "default", file, issues)
    signals = doc.get("signals", {})
    if isinstance(signals, dict):
        for pattern, table in signals.items():
            tol.signals.append((pattern, _tolerance(table, f"signals.{pattern}", file,
                                                    issues)))
    else:
        issues.append(RigIssue(file, "signals", f"expected a table, found "
                                                f"{describe_value(signals)}"))
    events = doc.get("events", {})
    if isinstance(events, dict):
        for key, value in events.items():
            if key != "time":
                issues.append(RigIssue(file, f"events.{key}", "unknown key; known keys: time"))
            elif not _non_negative(value):
                issues.append(RigIssue(file, "events.time", "expected a number >= 0 "
                                                            f"(seconds), found "
                                                            f"{describe_value(value)}"))
            else:
                tol.event_time = float(value)
    else:
        issues.append(RigIssue(file, "events", f"expected a table, found "
                                               f"{describe_value(events)}"))
    if issues:
        raise RigFileError(issues)
    return tol


def _non_negative(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and \
        math.isfinite(value) and value >= 0


def _tolerance(table: Any, where: str, file: str, issues: list[RigIssue]) -> Tolerance:
    if not isinstance(table, dict):
        issues.append(RigIssue(file, where, f"expected a table with abs and rel, found "
                                            f"{describe_value(table)}"))
        return Tolerance()
    values = {"abs": 0.0, "rel": 0.0}
    for key, value in table.items():
        if key not in values:
            issues.append(RigIssue(file, f"{where}.{key}", "unknown key; known keys: abs, rel"))
        elif not _non_negative(value):
            issues.append(RigIssue(file, f"{where}.{key}", f"expected a number >= 0, found "
                                                           f"{describe_value(value)}"))
        else:
            values[key] = float(value)
    return Tolerance(values["abs"], values["rel"])


def parse_tolerance_option(text: str) -> tuple[str, Tolerance]:
    """``SIGNAL=ABS[,REL]`` (SIGNAL may be an fnmatch pattern); ValueError if malformed."""
    pattern, sep, values = text.partition("=")
    parts = values.split(",")
    try:
        numbers = [float(p) for p in parts]
    except ValueError:
        numbers = []
    if not sep or not pattern or not 1 <= len(numbers) <= 2 or \
            not all(math.isfinite(x) and x >= 0 for x in numbers):
        raise ValueError(f"--tol {text!r}: expected SIGNAL=ABS or SIGNAL=ABS,REL with numbers "
                         ">= 0, e.g. --tol 'y:belt_speed=0.01,0.02' or --tol 'x:*=1e-9'")
    return pattern, Tolerance(numbers[0], numbers[1] if len(numbers) == 2 else 0.0)


def iter_lines(c: Comparison) -> Iterator[str]:
    """The console text of a comparison."""
    yield f"A: {c.a}"
    yield f"B: {c.b}"
    yield f"aligned {c.alignment}; {c.ticks_compared} ticks compared"
    for note in c.notes:
        yield f"note: {note}"
    oa, ob = c.outcomes["a"], c.outcomes["b"]
    yield f"outcome  A: {str(oa['ended']).upper()} ({oa['reason']}), exit {oa['exit_code']}"
    yield f"         B: {str(ob['ended']).upper()} ({ob['reason']}), exit {ob['exit_code']}"
    rules = list(dict.fromkeys([*oa["acceptance"], *ob["acceptance"]]))
    mark = {True: "held", False: "FAILED", None: "n/a"}
    for rule in rules:
        ra, rb = oa["acceptance"].get(rule, "-"), ob["acceptance"].get(rule, "-")
        yield f"  {rule:<22} A {mark.get(ra, '-'):<7} B {mark.get(rb, '-')}"
    for name in list(dict.fromkeys([*oa["verdicts"], *ob["verdicts"]])):
        va, vb = oa["verdicts"].get(name), ob["verdicts"].get(name)
        yield f"  verdict {name:<14} A {mark.get(va, '-'):<7} B {mark.get(vb, '-')}"
    worst = sorted(c.signals, key=lambda s: (s.within, -s.max_rel))
    beyond = [s for s in c.signals if not s.within]
    identical = sum(s.bit_identical for s in c.signals)
    yield (f"signals: {len(c.signals)} compared, {identical} bit for bit identical, "
           f"{len(beyond)} beyond tolerance")
    for s in worst[:12]:
        flag = "BEYOND" if not s.within else ("same" if s.bit_identical else "within")
        first = f", first beyond at {s.first_beyond_t:g} s" if s.first_beyond_t is not None \
            else ""
        if s.bit_identical:
            yield f"  {flag:<6} {s.signal}"
            continue
        yield (f"  {flag:<6} {s.signal:<28} max {s.max_abs:.4g} {s.unit} at "
               f"{s.t_max_abs if s.t_max_abs is not None else 0:g} s "
               f"({s.max_rel:.3%}), rms {s.rms:.4g}{first}")
    if len(worst) > 12:
        yield f"  ... {len(worst) - 12} more in deviations.csv"
    for e in c.events:
        if e.t_a is None or e.t_b is None or not e.within or e.kind != "run_end":
            ta = "-" if e.t_a is None else f"{e.t_a:g} s"
            tb = "-" if e.t_b is None else f"{e.t_b:g} s"
            dt = "" if e.dt is None else f" (B - A {e.dt:+.6g} s)"
            mark_e = "" if e.within else "  DIFFERS"
            yield f"  event {e.kind} {e.what}".rstrip() + f": A {ta}, B {tb}{dt}{mark_e}"
    yield "runs agree within tolerance" if c.agree else "runs DIFFER: " + ", ".join(
        w for w, bad in (("signals beyond tolerance", not c.signals_within),
                         ("events differ", not c.events_within),
                         ("outcomes differ", not c.outcomes_same)) if bad)
