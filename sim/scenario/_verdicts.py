"""Verdicts: a scenario's acceptance criteria, judged on the run record after the run.

Each ``[[verdicts]]`` entry of a scenario names a criterion and its limit; the measured
value comes from the tick record and the events, with the step definitions of
_metrics.py (those of python-control's step_info). Criteria:

    rise_time, settling_time   s, of ``signal`` stepping at ``start`` (band_pct, rise_pct)
    overshoot                  percent of the step
    steady_state_error         |reference - signal| at the end (mean over ``tail`` s)
    tracking_rms, tracking_max signal - reference over [start, stop]
    band                       the signal stayed inside [low, high] over [start, stop]
    trip_within                ``interlock`` tripped within ``max`` ms of ``fault``'s start
    no_unexpected_trip         no interlock tripped that the scenario did not expect
    expect                     (from ``expect`` steps) the condition held when checked

``start`` and ``stop`` are seconds or the name of a phase the scenario marks. A
criterion passes when measured <= max (band: nothing outside; no_unexpected_trip: none).
A measurement that cannot be made (a phase never reached, a signal that never settles)
fails. The result is a list of {name, criterion, measured, limit, unit, passed, detail},
written to verdicts.json in the run folder.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.config._checker import did_you_mean, not_one_of, one_of
from plantrig.sim.safety._limits import resolve_signal
from plantrig.sim.scenario import _metrics

if TYPE_CHECKING:
    from plantrig.sim.config._checker import Checker
    from plantrig.sim.config._rigfile import Rig
    from plantrig.sim.scenario._scenario import Scenario

STEP_KEYS = {"signal", "start", "stop", "final", "initial", "reference"}
CRITERIA: dict[str, set[str]] = {
    "rise_time": STEP_KEYS | {"rise_pct", "max"},
    "settling_time": STEP_KEYS | {"band_pct", "max"},
    "overshoot": STEP_KEYS | {"max"},
    "steady_state_error": {"signal", "reference", "stop", "tail", "max"},
    "tracking_rms": {"signal", "reference", "start", "stop", "max"},
    "tracking_max": {"signal", "reference", "start", "stop", "max"},
    "band": {"signal", "low", "high", "start", "stop"},
    "trip_within": {"interlock", "fault", "max"},
    "no_unexpected_trip": {"allow"},
}
UNITS = {"rise_time": "s", "settling_time": "s", "overshoot": "%", "trip_within": "ms",
         "no_unexpected_trip": "trips"}


@dataclass(frozen=True)
class VerdictSpec:
    """One checked ``[[verdicts]]`` entry (fields a criterion does not use stay None)."""

    name: str
    criterion: str
    signal: str | None = None
    start: float | str | None = None
    stop: float | str | None = None
    final: float | None = None
    initial: float | None = None
    reference: float | str | None = None
    band_pct: float = 2.0
    rise_pct: tuple[float, float] = (10.0, 90.0)
    tail: float = 0.0
    low: float = -math.inf
    high: float = math.inf
    max: float | None = None
    interlock: str | None = None
    fault: str | None = None
    allow: tuple[str, ...] = ()


@dataclass(frozen=True)
class Verdict:
    """One judged criterion."""

    name: str
    criterion: str
    measured: float
    limit: float
    unit: str
    passed: bool
    detail: str = ""
    needs: str = ""             # what passing means, in words ("within 0.4 .. 0.5 m/s")

    def as_dict(self) -> dict[str, Any]:
        def num(v: float) -> float | None:
            return float(v) if math.isfinite(v) else None
        return {"name": self.name, "criterion": self.criterion, "measured": num(self.measured),
                "limit": num(self.limit), "unit": self.unit, "passed": self.passed,
                "detail": self.detail, "needs": self.needs}


def parse_verdicts(c: Checker, doc: dict[str, Any], rig: Rig, columns: list[str],
                   interlocks: list[str], faults: set[str], phases: set[str]) -> list[VerdictSpec]:
    """Check ``[[verdicts]]`` against the rig's columns and the scenario's faults and phases."""
    entries = doc.get("verdicts", [])
    if not isinstance(entries, list) or not all(isinstance(e, dict) for e in entries):
        c.add("verdicts", "expected an array of tables ([[verdicts]])")
        return []
    out: list[VerdictSpec] = []
    for i, e in enumerate(entries):
        where = f"verdicts[{i}]"
        criterion = c.take(e, "criterion", where, "str", check=one_of(tuple(CRITERIA), "criteria"))
        if criterion is None:
            continue
        keys = CRITERIA[criterion]
        c.no_unknown(e, keys | {"name", "criterion"}, where)
        name = c.take(e, "name", where, "str", default=f"{criterion} ({where})")
        v: dict[str, Any] = {}
        if "signal" in keys:
            v["signal"] = _column(c, e, "signal", where, columns, rig, required=True)
        if "reference" in keys:
            _reference(c, e, where, criterion, columns, rig, v)
        _window(c, e, where, keys, phases, v)
        _numbers(c, e, where, criterion, keys, v)
        if criterion == "trip_within":
            il = c.take(e, "interlock", where, "str")
            if il is not None and il not in interlocks:
                c.add(f"{where}.interlock", not_one_of(il, interlocks, "interlocks"))
            fault = c.take(e, "fault", where, "str")
            if fault is not None and fault not in faults:
                c.add(f"{where}.fault", not_one_of(fault, sorted(faults),
                                                   "faults the scenario injects"))
            v["interlock"], v["fault"] = il, fault
        if criterion == "no_unexpected_trip":
            allow = c.take(e, "allow", where, "list", default=[]) or []
            for j, il in enumerate(allow):
                if il not in interlocks:
                    c.add(f"{where}.allow[{j}]", not_one_of(il, interlocks, "interlocks"))
            v["allow"] = tuple(allow)
        out.append(VerdictSpec(name=str(name), criterion=criterion, **v))
    return out


def _reference(c: Checker, e: dict[str, Any], where: str, criterion: str, columns: list[str],
               rig: Rig, v: dict[str, Any]) -> None:
    """``reference``: a number, or a column such as ref:<name>."""
    ref = e.get("reference")
    if isinstance(ref, int | float) and not isinstance(ref, bool):
        v["reference"] = float(ref)
    elif ref is not None:
        v["reference"] = _column(c, e, "reference", where, columns, rig, required=True,
                                 prefix="ref")
    elif criterion in ("steady_state_error", "tracking_rms", "tracking_max"):
        c.add(f"{where}.reference", "missing (expected a number or a column such as "
                                    "ref:<name>)")


def _window(c: Checker, e: dict[str, Any], where: str, keys: set[str], phases: set[str],
            v: dict[str, Any]) -> None:
    """``start`` and ``stop``: a time in seconds, or a phase the scenario marks."""
    for key in ("start", "stop"):
        if key in keys and key in e:
            value = e[key]
            if isinstance(value, str):
                if value not in phases:
                    c.add(f"{where}.{key}", not_one_of(value, sorted(phases),
                                                       "phases the scenario marks"))
                v[key] = value
            else:
                v[key] = c.take(e, key, where, "number")


def _numbers(c: Checker, e: dict[str, Any], where: str, criterion: str, keys: set[str],
             v: dict[str, Any]) -> None:
    """The criterion's numeric keys, and the ones it cannot do without."""
    for key in ("final", "initial", "low", "high", "max", "band_pct", "tail"):
        if key in keys:
            got = c.take(e, key, where, "number", default=None)
            if got is not None:
                v[key] = float(got)
    if "max" in keys and "max" not in v and "max" not in e:
        c.add(f"{where}.max", f"missing (expected the largest acceptable value, in "
                              f"{UNITS.get(criterion, 'the signal unit')})")
    if criterion in ("rise_time", "settling_time", "overshoot") and "final" not in v \
            and "reference" not in v:
        c.add(where, "expected `final` (the value the step goes to) or `reference`")
    if criterion == "band" and "low" not in v and "high" not in v:
        c.add(where, "expected `low`, `high` or both")
    if "rise_pct" in e:
        rp = c.take(e, "rise_pct", where, "vector")
        if rp is not None and (len(rp) != 2 or not 0 <= rp[0] < rp[1] <= 100):
            c.add(f"{where}.rise_pct", f"expected [low, high] percentages with "
                                       f"0 <= low < high <= 100, found {rp}")
        elif rp is not None:
            v["rise_pct"] = (float(rp[0]), float(rp[1]))


def _column(c: Checker, e: dict[str, Any], key: str, where: str, columns: list[str],
            rig: Rig, required: bool, prefix: str = "") -> str | None:
    value = c.take(e, key, where, "str") if required else e.get(key)
    if value is None:
        return None
    if value in columns:
        return str(value)
    if prefix and f"{prefix}:{value}" in columns:
        return f"{prefix}:{value}"
    groups = {"states": list(rig.states), "inputs": list(rig.inputs),
              "outputs": list(rig.outputs)}
    column, why = resolve_signal(value, groups)
    if column is None:
        hint = did_you_mean(value, columns)
        c.add(f"{where}.{key}", why if "more than one" in why or not hint else
              f"no tick column {value!r}{hint}")
    return column


# -- judging a run ---------------------------------------------------------------------
def _ev(event: Any) -> tuple[int, str, str]:
    """(tick, kind, name) of an Event or of a record's event (sim.read_run's form)."""
    if isinstance(event, dict):
        return int(event["tick"]), str(event["kind"]), str(event.get("name", ""))
    return int(event.tick), str(event.kind), str(event.name)


class _Record:
    """The columns, rows and events of one run, with the look-ups criteria need."""

    def __init__(self, columns: list[str], units: list[str], rows: NDArray[np.float64],
                 events: Iterable[Any], tick: float) -> None:
        self.columns, self.units, self.rows, self.tick = columns, units, rows, tick
        self.events = [_ev(e) for e in events]
        self.t = rows[:, columns.index("t")] if len(rows) else np.zeros(0)

    def series(self, column: str) -> NDArray[np.float64]:
        return self.rows[:, self.columns.index(column)]

    def unit(self, column: str | None) -> str:
        return self.units[self.columns.index(column)] if column in self.columns else ""

    def when(self, bound: float | str | None, default: float) -> float:
        if bound is None:
            return default
        if isinstance(bound, str):
            for tick, kind, name in self.events:
                if kind == "phase" and name == bound:
                    return tick * self.tick
            raise _NotMeasured(f"phase {bound!r} was never reached")
        return float(bound)

    def trips(self) -> list[tuple[int, str]]:
        """(tick, interlock) of every latch; the E-stop's interlock is "estop"."""
        return [(tick, name) for tick, kind, name in self.events if kind in ("trip", "estop")]


class _NotMeasured(Exception):
    """A criterion that cannot be measured on this record (it fails, saying why)."""


def evaluate(scenario: Scenario, columns: list[str], units: list[str],
             rows: NDArray[np.float64], events: Iterable[Any], tick: float) -> list[Verdict]:
    """Judge every verdict and expectation of ``scenario`` on one run's record."""
    rec = _Record(columns, units, np.asarray(rows, dtype=np.float64).reshape(-1, len(columns)),
                  events, tick)
    out = [_judge(spec, rec, scenario) for spec in scenario.verdicts]
    out += _expectations(scenario, rec)
    return out


def _judge(spec: VerdictSpec, rec: _Record, scenario: Scenario) -> Verdict:
    unit = UNITS.get(spec.criterion, rec.unit(spec.signal))
    limit = spec.max if spec.max is not None else 0.0
    needs = _needs(spec, limit, unit)
    try:
        measured, detail = _measure(spec, rec, scenario)
    except (_NotMeasured, ValueError) as exc:
        return Verdict(spec.name, spec.criterion, math.nan, limit, unit, False, str(exc), needs)
    passed = math.isfinite(measured) and measured <= limit
    return Verdict(spec.name, spec.criterion, measured, limit, unit, passed, detail, needs)


def _needs(spec: VerdictSpec, limit: float, unit: str) -> str:
    """What the criterion asks for, in the terms of the scenario file."""
    if spec.criterion == "band":
        low = f"{spec.low:g}" if math.isfinite(spec.low) else ""
        high = f"{spec.high:g}" if math.isfinite(spec.high) else ""
        where = f"{low} .. {high}" if low and high else f">= {low}" if low else f"<= {high}"
        return f"{spec.signal} {where} {unit}".rstrip()
    if spec.criterion == "no_unexpected_trip":
        return "no unexpected trip"
    return f"<= {_human(limit, unit)}"


def _human(value: float, unit: str) -> str:
    """A value in its unit, long times in seconds (a 76 s trip is not 7.6e+04 ms)."""
    if not math.isfinite(value):
        return "-"
    if unit == "ms" and abs(value) >= 10_000:
        return f"{value / 1000:.4g} s"
    return f"{value:.4g} {unit}".rstrip()


def _measure(spec: VerdictSpec, rec: _Record, scenario: Scenario) -> tuple[float, str]:
    crit = spec.criterion
    if crit == "trip_within":
        began = next((tick for tick, kind, name in rec.events if kind == "fault_injected"
                      and name == spec.fault), None)
        if began is None:
            raise _NotMeasured(f"fault {spec.fault!r} was never injected")
        trip = next((tick for tick, name in rec.trips()
                     if name == spec.interlock and tick >= began), None)
        if trip is None:
            raise _NotMeasured(f"{spec.interlock} did not trip after {spec.fault} began "
                               f"(t = {began * rec.tick:g} s)")
        return (trip - began) * rec.tick * 1e3, (f"{spec.fault} at {began * rec.tick:g} s, "
                                                 f"{spec.interlock} tripped at "
                                                 f"{trip * rec.tick:g} s")
    if crit == "no_unexpected_trip":
        expected = scenario.expected_trips | set(spec.allow)
        bad = [(tick, name) for tick, name in rec.trips() if name not in expected]
        return float(len(bad)), ", ".join(f"{n} at {k * rec.tick:g} s" for k, n in bad) or \
            "no unexpected trip"
    assert spec.signal is not None
    t_all = rec.t
    if t_all.size < 2:
        raise _NotMeasured("the record has fewer than two ticks")
    start = rec.when(spec.start, float(t_all[0]))
    stop = rec.when(spec.stop, float(t_all[-1]))
    mask = (t_all >= start - rec.tick / 2) & (t_all <= stop + rec.tick / 2)
    if mask.sum() < 2:
        raise _NotMeasured(f"fewer than two ticks between {start:g} s and {stop:g} s")
    t, y = t_all[mask], rec.series(spec.signal)[mask]
    ref = spec.reference
    r = rec.series(ref)[mask] if isinstance(ref, str) else ref
    if crit == "band":
        above = np.max(y - spec.high) if math.isfinite(spec.high) else -math.inf
        below = np.max(spec.low - y) if math.isfinite(spec.low) else -math.inf
        worst = max(float(above), float(below), 0.0)
        check = _metrics.band_check(t, y, spec.low, spec.high)
        where = "inside" if check.inside else f"first outside at {check.first_violation:g} s"
        return worst, f"[{spec.low:g}, {spec.high:g}] over {start:g}..{stop:g} s: {where}, " \
                      f"range {y.min():.6g}..{y.max():.6g}"
    if crit in ("tracking_rms", "tracking_max"):
        assert r is not None
        tracking = _metrics.tracking_error(t, y, r)
        if crit == "tracking_rms":
            return tracking.rms, f"over {start:g}..{stop:g} s ({tracking.samples} ticks)"
        return tracking.max_abs, f"at {tracking.time_of_max:g} s"
    if crit == "steady_state_error":
        assert r is not None
        target = float(r[-1]) if isinstance(r, np.ndarray) else float(r)
        err = _metrics.steady_state_error(t, y, target, tail=spec.tail)
        return abs(err), f"reference {target:.6g}, signal {target - err:.6g} at {t[-1]:g} s"
    final = spec.final if spec.final is not None else (
        float(r[-1]) if isinstance(r, np.ndarray) else float(r))  # type: ignore[arg-type]
    initial = spec.initial if spec.initial is not None else float(y[0])
    m = _metrics.step_metrics(t, y, final=final, initial=initial, rise_pct=spec.rise_pct,
                              band_pct=spec.band_pct, t_step=start)
    step = f"step {initial:.6g} -> {final:.6g} at {start:g} s"
    if crit == "rise_time":
        return m.rise_time, step
    if crit == "settling_time":
        return m.settling_time, f"{step}, band {spec.band_pct:g} %" + (
            "" if math.isfinite(m.settling_time) else ": still outside at the window's end")
    return m.overshoot, f"{step}, peak {m.peak:.6g} at {start + m.peak_time:g} s"


def _expectations(scenario: Scenario, rec: _Record) -> list[Verdict]:
    checked: dict[str, int] = {}
    for tick, kind, name in rec.events:
        if kind == "expect":
            checked.setdefault(name, tick)
    seq = rec.series("seq") if len(rec.rows) else np.zeros(0)
    out = []
    for step in scenario.steps:
        cond = step.expect
        if cond is None:
            continue
        unit = rec.unit(cond.column)
        at = checked.get(step.label)
        hits = np.flatnonzero(seq == at) if at is not None else np.zeros(0, dtype=int)
        if at is None or not hits.size:
            out.append(Verdict(step.label, "expect", math.nan, cond.value, unit, False,
                               f"{cond}: never checked (its trigger did not come)"))
            continue
        row = rec.rows[hits[0]]
        value = float(row[rec.columns.index(cond.column)])
        out.append(Verdict(step.label, "expect", value, cond.value, unit, cond.holds(row),
                           f"{cond} at {at * rec.tick:g} s"))
    return out


def write_verdicts(folder: Path, verdicts: list[Verdict]) -> Path:
    """verdicts.json in the run folder: the list the sign-off report reads."""
    path = Path(folder) / "verdicts.json"
    tmp = path.with_suffix(".json.tmp")
    tmp.write_text(json.dumps([v.as_dict() for v in verdicts], indent=2) + "\n")
    tmp.replace(path)
    return path


def verdict_lines(verdicts: list[dict[str, Any]]) -> list[str]:
    """A plain-text pass/fail table of verdicts in their verdicts.json form."""
    def measured(v: dict[str, Any]) -> str:
        if v["measured"] is None:
            return "-"
        if v["criterion"] == "band":   # how far outside the band, at worst
            return f"{_human(v['measured'], v['unit'])} outside"
        return _human(v["measured"], v["unit"])

    def needs(v: dict[str, Any]) -> str:
        return v.get("needs") or ("-" if v["limit"] is None else
                                  f"<= {_human(v['limit'], v['unit'])}")
    head = ("verdict", "criterion", "measured", "needs", "result")
    body = [(v["name"], v["criterion"], measured(v), needs(v),
             "pass" if v["passed"] else "FAIL") for v in verdicts]
    widths = [max(len(r[i]) for r in [head, *body]) for i in range(len(head))]
    lines = ["  ".join(cell.ljust(w) for cell, w in zip(r, widths, strict=True)).rstrip()
             for r in [head, *body]]
    lines.insert(1, "  ".join("-" * w for w in widths))
    lines += [f"FAIL {v['name']}: {v['detail']}" for v in verdicts
              if not v["passed"] and v.get("detail")]
    failed = sum(not v["passed"] for v in verdicts)
    lines.append(f"{len(verdicts) - failed} of {len(verdicts)} criteria passed")
    return lines
