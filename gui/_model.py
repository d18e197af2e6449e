"""What every panel shows at one instant, worked out without any GUI code.

A Snapshot is plain data (texts, fractions, time intervals) computed from a row store,
the event log and the rig; the view only copies it into widgets. Tests check the
numbers here directly.

Column conventions read here (prefix:name, DESIGN.md tick record):
  trip:<name>   1 while that interlock is latched ("trip:estop" for the operator E-stop)
  fault:<name>  non-zero while that fault is active (fault windows also come from events)
  limit:<name>  the limit's code: 0 ok, 1 outside a warn bound, 2 outside a trip bound
  lateness      seconds the tick started after its deadline (0 in fast mode)
  exec_time     seconds the tick's work took; fresh: 1 if the controller's command was new
A limit's bar shows its watched signal between the limit's bounds (the rig's
``[[limits]]``); a rig without limits shows its signal ranges (min/max) instead.
"""

from __future__ import annotations

import math
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig.gui._columns import ColumnGroups
from plantrig.gui._eventlog import EventLog, EventRow, FaultWindow
from plantrig.gui._store import RowStore

Rows = NDArray[np.float64]
LINK_WINDOW_S = 1.0
EVENTS_SHOWN = 60
LIMIT_STATES = {0: "ok", 1: "WARN", 2: "TRIP"}


LAMP_LINE_CHARS = 50          # a lamp is about this many characters wide
LAMP_CAUSE_LINES = 2


@dataclass
class Bar:
    label: str
    fraction: float          # 0..1 drawn; the text says the real value
    text: str
    level: int = 0           # 0 normal, 1 needs a look (warn, outside range), 2 trip

    @property
    def outside(self) -> bool:
        return self.level > 0


@dataclass
class Lamp:
    """An interlock's lamp: quiet while normal; latched, it says since when and why."""

    name: str
    tripped: bool
    since: float | None = None
    cause: str = ""

    @property
    def text(self) -> str:
        if not self.tripped:
            return f"{self.name}: normal"
        when = f" at t = {self.since:.3f} s" if self.since is not None else ""
        cause = textwrap.wrap(f"cause: {self.cause or 'not in the events read so far'}",
                              LAMP_LINE_CHARS, max_lines=LAMP_CAUSE_LINES, placeholder=" ...")
        return "\n".join([f"{self.name}: TRIPPED{when}, latched", *cause])


@dataclass
class Snapshot:
    t: float
    rows: Rows
    current: Rows | None
    run_state: str
    estop_latched: bool
    estop_text: str
    lamps: list[Lamp]
    bars: list[Bar]
    bars_title: str
    faults: list[FaultWindow]
    timing: list[str]
    link: list[str]
    events: list[EventRow]
    values: dict[str, float] = field(default_factory=dict)


def runs_nonzero(t: NDArray[np.float64], v: NDArray[np.float64],
                 name: str) -> list[FaultWindow]:
    """Intervals of ``t`` where ``v`` is non-zero; the last stays open if still active."""
    on = np.nan_to_num(v) != 0
    if not on.any():
        return []
    edges = np.diff(on.astype(np.int8))
    starts = [int(i) + 1 for i in np.flatnonzero(edges == 1)]
    ends = [int(i) + 1 for i in np.flatnonzero(edges == -1)]
    if on[0]:
        starts.insert(0, 0)
    out = []
    for i, s in enumerate(starts):
        end = float(t[ends[i]]) if i < len(ends) else None
        out.append(FaultWindow(name, float(t[s]), end))
    return out


def _fraction(v: float, lo: float, hi: float) -> float:
    """Where v sits between lo and hi, clipped to 0..1 (0 when unknown)."""
    if not (math.isfinite(v) and math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return 0.0
    return min(max((v - lo) / (hi - lo), 0.0), 1.0)


def fmt(value: float, unit: str = "") -> str:
    text = "n/a" if not math.isfinite(value) else f"{value:.4g}"
    return f"{text} {unit}".rstrip()


class DashboardModel:
    """Joins the columns, the rows and the events of one run into snapshots."""

    def __init__(self, groups: ColumnGroups, tick: float, *, has_link: bool,
                 limits: Sequence[Any] = ()) -> None:
        self.groups = groups
        self.limits = {spec.name: spec for spec in limits}
        self.tick = tick
        self.has_link = has_link
        self.log = EventLog()
        self.overruns = 0
        self.rows_seen = 0
        self.rows_skipped = 0
        self.late_index = groups.index("lateness") if "lateness" in groups else None

    def count_rows(self, block: Rows) -> None:
        """Keep run-long counters that outlive the sliding window (live mode)."""
        self.rows_seen += len(block)
        if self.late_index is not None and len(block):
            self.overruns += int(np.count_nonzero(block[:, self.late_index] >= self.tick))

    def snapshot(self, store: RowStore, t_end: float, span: float, *,
                 run_state: str, log: EventLog | None = None) -> Snapshot:
        log = log or self.log
        g = self.groups
        rows = store.window(t_end, span)
        current = store.at(t_end)
        t = rows[:, g.index("t")] if len(rows) else np.empty(0)
        values = {c.key: float(current[c.index]) for c in g.columns} if current is not None \
            else {}

        lamps = []
        for c in g.group("trip"):
            latch = log.latches.get(c.name)
            lamps.append(Lamp(c.name, bool(values.get(c.key, 0.0)),
                              latch.t if latch else None, latch.cause if latch else ""))
        bars, title = self._bars(values)
        faults = [w for w in log.windows]
        for c in g.group("fault"):
            if len(rows):
                faults.extend(runs_nonzero(t, rows[:, c.index], c.name))
        latched = log.estop_latched
        if "trip:estop" in g:                       # the engine's own latch, when recorded
            latched = bool(values.get("trip:estop", 0.0))
        if latched:
            since = f" at t = {log.estop_time:.3f} s" if log.estop_time is not None else ""
            estop_text = f"E-STOP LATCHED{since}: inputs at safe values"
        else:
            estop_text = "E-STOP clear"
        return Snapshot(
            t=t_end, rows=rows, current=current, run_state=run_state,
            estop_latched=latched, estop_text=estop_text, lamps=lamps,
            bars=bars, bars_title=title, faults=faults,
            timing=self._timing(rows), link=self._link(rows, t, log),
            events=log.newest_first(EVENTS_SHOWN), values=values)

    def _bars(self, values: dict[str, float]) -> tuple[list[Bar], str]:
        limits = self.groups.group("limit")
        if limits:
            return [self._limit_bar(c.name, values) for c in limits], \
                "Limits (watched signal between the limit's bounds)"
        bars = []
        for prefix in ("y", "u", "x"):
            for c in self.groups.group(prefix):
                if c.has_range:
                    v = values.get(c.key, math.nan)
                    outside = math.isfinite(v) and not c.low <= v <= c.high
                    bars.append(Bar(c.key, _fraction(v, c.low, c.high),
                                    f"{c.key} {fmt(v, c.unit)} in [{c.low:g}, {c.high:g}]"
                                    + ("  OUTSIDE" if outside else ""), int(outside)))
        return bars, "Signal ranges (rig min/max; this rig has no limits)"

    def _limit_bar(self, name: str, values: dict[str, float]) -> Bar:
        code = values.get(f"limit:{name}", math.nan)
        state = LIMIT_STATES.get(int(code), f"code {code:g}") if math.isfinite(code) \
            else "n/a"
        level = {"ok": 0, "TRIP": 2}.get(state, 1)       # WARN, n/a: needs a look
        spec = self.limits.get(name)
        if spec is None or spec.column not in self.groups:
            return Bar(name, 0.0, f"{name}: {state}", level)
        watched = self.groups[spec.column]
        v = values.get(spec.column, math.nan)
        lo, hi = spec.trip_low, spec.trip_high
        if not (math.isfinite(lo) and math.isfinite(hi)):
            lo = lo if math.isfinite(lo) else spec.warn_low
            hi = hi if math.isfinite(hi) else spec.warn_high
        if not (math.isfinite(lo) and math.isfinite(hi)):
            lo, hi = watched.low, watched.high
        span = f" in [{lo:g}, {hi:g}]" if math.isfinite(lo) and math.isfinite(hi) else ""
        return Bar(name, _fraction(v, lo, hi),
                   f"{name}: {spec.column} {fmt(v, watched.unit)}{span}  {state}", level)

    def _timing(self, rows: Rows) -> list[str]:
        g = self.groups
        if "lateness" not in g or not len(rows):
            return ["timing: no rows yet"]
        late = rows[:, g.index("lateness")]
        work = rows[:, g.index("exec_time")] if "exec_time" in g else np.zeros(len(rows))
        if not late.any() and not work.any():
            return ["fast mode: ticks are not paced to the wall clock",
                    f"overruns: {self.overruns}"]
        budget = self.tick
        return [
            f"lateness now {late[-1] * 1e6:.1f} us, p99 {np.percentile(late, 99) * 1e6:.1f} us,"
            f" max {late.max() * 1e6:.1f} us (window)",
            f"tick work p99 {np.percentile(work, 99) * 1e6:.1f} us "
            f"= {np.percentile(work, 99) / budget:.0%} of the {budget * 1e3:g} ms tick",
            f"overruns (tick started a full tick late): {self.overruns}",
        ]

    def _link(self, rows: Rows, t: NDArray[np.float64], log: EventLog) -> list[str]:
        g = self.groups
        link_events = sum(n for kind, n in log.kinds.items()
                          if any(w in kind for w in ("link", "frame", "crc", "silence")))
        if not self.has_link:
            return ["link: none (built-in controller)"]
        if "fresh" not in g or not len(rows):
            return ["link: no rows yet"]
        fresh = rows[:, g.index("fresh")]
        recent = fresh[t > t[-1] - LINK_WINDOW_S]
        nonzero = np.flatnonzero(fresh)
        since = len(fresh) - 1 - int(nonzero[-1]) if nonzero.size else len(fresh)
        state = "UP" if since * self.tick < 0.1 else "SILENT"
        return [f"link {state}: fresh commands {recent.mean():.0%} of ticks (last "
                f"{LINK_WINDOW_S:g} s)",
                f"ticks since last fresh command: {since}",
                f"link events so far: {link_events}"]
