"""What every panel shows at one instant, worked out without any GUI code.

A Snapshot is plain data (texts, fractions, time intervals) computed from a row store,
the event log and the rig; the view only copies it into widgets. Tests check the
numbers here directly.

Column conventions read here (prefix:name, the tick record of sim/engine/_engine.py):
  trip:<name>   1 while that interlock is latched ("trip:estop" for the operator E-stop)
  fault:<name>  non-zero while that fault is active (fault windows also come from events)
  limit:<name>  the limit's code: 0 ok, 1 outside a warn bound, 2 outside a trip bound
  lateness      seconds the tick started after its deadline (0 in fast mode)
  exec_time     seconds the tick's work took; fresh: 1 if the controller's command was new
A limit's bar shows its watched signal as a fraction of its trip band (the rig's
``[[limits]]``; a one-sided limit from 0 to its trip bound); a rig without limits
shows its signal ranges (min/max) instead.

The status line says the one real state of the run, in this order of precedence:
replay, ended (with its outcome), latched (E-stop or interlock: by what, since when,
why), stopping, running. The link lamp judges the controller's commands by the rig's
own watchdog timeout, as the engine does.
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
QUIET, ATTENTION, ALARM, ENDED, REPLAY = "quiet", "attention", "alarm", "ended", "replay"


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


@dataclass(frozen=True)
class Status:
    """One line of words and the look that goes with it (QUIET ... REPLAY)."""

    text: str
    level: str = QUIET


@dataclass(frozen=True)
class TripMark:
    """Where a limit reached TRIP in the window: on the plot of the signal it watches."""

    column: str
    t: float
    value: float
    limit: str


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
    status: Status = Status("")
    link_lamp: Status = Status("")
    trips: list[tuple[float, str]] = field(default_factory=list)   # (t, what latched)
    trip_marks: list[TripMark] = field(default_factory=list)


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


def trip_band(spec: Any) -> tuple[float, float]:
    """The span a limit's bar runs over: its trip bounds; one-sided, from 0 to the trip
    bound (a fraction of the way to the trip point); warn bounds where it has no trip."""
    lo, hi = spec.trip_low, spec.trip_high
    if not (math.isfinite(lo) or math.isfinite(hi)):
        lo, hi = spec.warn_low, spec.warn_high
    if math.isfinite(hi) and not math.isfinite(lo):
        lo = 0.0 if hi > 0 else hi - 1.0
    elif math.isfinite(lo) and not math.isfinite(hi):
        hi = 0.0 if lo < 0 else lo + 1.0
    return lo, hi


def fmt(value: float, unit: str = "") -> str:
    text = "n/a" if not math.isfinite(value) else f"{value:.4g}"
    return f"{text} {unit}".rstrip()


class DashboardModel:
    """Joins the columns, the rows and the events of one run into snapshots."""

    def __init__(self, groups: ColumnGroups, tick: float, *, has_link: bool,
                 limits: Sequence[Any] = (), watchdog_s: float = 0.1) -> None:
        self.groups = groups
        self.limits = {spec.name: spec for spec in limits}
        self.tick = tick
        self.has_link = has_link
        self.watchdog_s = watchdog_s
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
                 run_state: str = "", log: EventLog | None = None, ended: str | None = None,
                 replay_of: str | None = None) -> Snapshot:
        """What the panels show at plant time ``t_end``.

        ``ended``: the run's outcome once known ("" when the tape ended without one);
        ``replay_of``: the run id when this is a replay.
        """
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
        link_lamp, link_lines = self._link(rows, t, log)
        return Snapshot(
            t=t_end, rows=rows, current=current, run_state=run_state,
            estop_latched=latched, estop_text=estop_text, lamps=lamps,
            bars=bars, bars_title=title, faults=faults,
            timing=self._timing(rows), link=link_lines,
            events=log.newest_first(EVENTS_SHOWN), values=values,
            status=self.status(t_end, lamps, latched, log, ended, replay_of),
            link_lamp=link_lamp, trips=list(log.trips), trip_marks=self._trip_marks(rows))

    def status(self, t: float, lamps: list[Lamp], estop: bool, log: EventLog,
               ended: str | None, replay_of: str | None) -> Status:
        """The run's one real state at plant time ``t`` (see the module docstring)."""
        latched = [lamp for lamp in lamps if lamp.tripped and lamp.name != "estop"]
        if estop:
            latch = log.latches.get("estop")
            latched.insert(0, Lamp("E-stop", True, latch.t if latch else log.estop_time,
                                   "operator E-stop"))
        if latched:
            names = ", ".join(lamp.name for lamp in latched)
            times = [lamp.since for lamp in latched if lamp.since is not None]
            since = f" since t = {min(times):.3f} s" if times else ""
            causes = "; ".join(lamp.cause for lamp in latched if lamp.cause)
            what = "E-STOP LATCHED" if names == "E-stop" else f"TRIPPED by {names}"
            state = f"{what}{since}" + (f" ({causes})" if causes and what != \
                                        "E-STOP LATCHED" else "") + \
                ": inputs held at their safe values"
        elif log.stopping:
            state = f"STOPPING: {log.stopping}"
        else:
            state = "RUNNING"
        now = f"plant time {t:.3f} s"
        if replay_of is not None:
            state = "normal" if state == "RUNNING" else state
            return Status(f"REPLAY of {replay_of} | at {now}: {state}", REPLAY)
        if ended is not None or log.ended is not None:
            outcome = ended or log.ended or "the tape ended"
            still = f" | latched at the end: {', '.join(lamp.name for lamp in latched)}" \
                if latched else ""
            return Status(f"ENDED: {outcome} | {now}{still}", ENDED)
        return Status(f"{state} | {now}", ALARM if latched else QUIET)

    def _trip_marks(self, rows: Rows) -> list[TripMark]:
        """Each tick in the window where a limit's code rose to TRIP, at its watched value."""
        g = self.groups
        out: list[TripMark] = []
        if len(rows) < 1:
            return out
        t = rows[:, g.index("t")]
        for spec in self.limits.values():
            code_key = f"limit:{spec.name}"
            if code_key not in g or spec.column not in g:
                continue
            trip = np.nan_to_num(rows[:, g.index(code_key)]) >= 2
            rising = np.flatnonzero(trip[1:] & ~trip[:-1]) + 1
            for i in rising:
                out.append(TripMark(spec.column, float(t[i]),
                                    float(rows[i, g.index(spec.column)]), spec.name))
        return out

    def _bars(self, values: dict[str, float]) -> tuple[list[Bar], str]:
        limits = self.groups.group("limit")
        if limits:
            return [self._limit_bar(c.name, values) for c in limits], \
                "Limits (bar: the watched signal's way to its trip point)"
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
        """The watched value as a fraction of its trip band; the text names the trip
        point, so a one-sided limit never hides it."""
        code = values.get(f"limit:{name}", math.nan)
        state = LIMIT_STATES.get(int(code), f"code {code:g}") if math.isfinite(code) \
            else "n/a"
        level = {"ok": 0, "TRIP": 2}.get(state, 1)       # WARN, n/a: needs a look
        spec = self.limits.get(name)
        if spec is None or spec.column not in self.groups:
            return Bar(name, 0.0, f"{name}: {state}", level)
        unit = self.groups[spec.column].unit
        v = values.get(spec.column, math.nan)
        lo, hi = trip_band(spec)
        text = f"{name} ({spec.column}) {fmt(v, unit)}  {state}"
        if math.isfinite(spec.trip_low) and math.isfinite(spec.trip_high):
            text += f"; trip outside {spec.trip_low:g}..{spec.trip_high:g}"
        elif math.isfinite(spec.trip_high):
            text += f"; trip above {spec.trip_high:g}"
        elif math.isfinite(spec.trip_low):
            text += f"; trip below {spec.trip_low:g}"
        else:
            warn = [f"{b:g}" for b in (spec.warn_low, spec.warn_high) if math.isfinite(b)]
            text += f"; warn at {' / '.join(warn)}, no trip" if warn else ""
        return Bar(name, _fraction(v, lo, hi), text, level)

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

    def _link(self, rows: Rows, t: NDArray[np.float64], log: EventLog) -> tuple[Status,
                                                                                list[str]]:
        """The link lamp, judged by the rig's watchdog (silence >= watchdog: lost, as the
        engine judges it; over half of it: late), and its detail lines."""
        g = self.groups
        source = "controller link" if self.has_link else "built-in controller"
        lost = log.kinds.get("link_lost", 0)
        if "fresh" not in g or not len(rows):
            return Status(f"link: no rows yet ({source})"), []
        fresh = rows[:, g.index("fresh")]
        recent = fresh[t > t[-1] - LINK_WINDOW_S]
        nonzero = np.flatnonzero(fresh)
        since = len(fresh) - 1 - int(nonzero[-1]) if nonzero.size else len(fresh)
        silent = since * self.tick
        watchdog = self.watchdog_s
        if silent >= watchdog:
            length = f"{silent:.3f} s" if nonzero.size else f"all {silent:.3f} s in view"
            lamp = Status(f"LINK LOST: silent {length}, beyond the {watchdog:g} s "
                          "watchdog", ALARM)
        elif silent >= watchdog / 2:
            lamp = Status(f"LINK LATE: silent {silent:.3f} s; watchdog {watchdog:g} s",
                          ATTENTION)
        else:
            lamp = Status(f"link ok: last command {since} tick(s) ago; watchdog "
                          f"{watchdog:g} s")
        return lamp, [f"{source}: fresh commands {recent.mean():.0%} of ticks (last "
                      f"{LINK_WINDOW_S:g} s)",
                      f"link lost {lost} time(s) so far; link events "
                      f"{sum(n for kind, n in log.kinds.items() if _link_kind(kind))}"]


def _link_kind(kind: str) -> bool:
    return any(w in kind for w in ("link", "frame", "crc", "silence"))
