"""What the event stream says about the run: E-stop latch, fault windows, the recent list.

Events come from the engine's event tape (or a run folder's record) as EventRow: tick,
time, kind, detail and the name of what the event is about. The engine latches an
operator E-stop with an "estop" event and releases it with a "reset" of that name (a
recorded "trip:estop" column, where there is one, is the authority); an interlock
latches with a "trip" event of its name and is released by a "reset" of its name, which
gives each latched lamp its time and cause; fault windows open on events that announce a
fault and close on those that clear it (the kind names are matched loosely, see
``fault_edge``, so the safety work can choose its own). Names come from the events'
name field, never from their detail text, which is only shown.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass
from typing import Any, NamedTuple

from plantrig.sim import ESTOP

RECENT_EVENTS = 400


class EventRow(NamedTuple):
    """One event as the dashboard holds it."""

    tick: int
    time: float
    kind: str
    detail: str
    name: str = ""       # the fault, interlock, step, phase ... the event is about
    source: str = ""     # where it came from, when logic must tell (Event.source)

    @classmethod
    def of(cls, event: dict[str, Any]) -> EventRow:
        """From an event as the event tape and sim.read_run give it."""
        return cls(int(event["tick"]), float(event["time"]), str(event["kind"]),
                   str(event.get("detail", "")), str(event.get("name", "")),
                   str(event.get("source", "")))


@dataclass(frozen=True)
class Latch:
    """When an interlock (or the E-stop) latched, and what made it."""

    t: float
    cause: str


@dataclass
class FaultWindow:
    """A stretch of plant time with a fault active; ``end`` None while it lasts."""

    name: str
    start: float
    end: float | None = None


def fault_edge(kind: str) -> int:
    """+1 if an event of this kind starts a fault, -1 if it clears one, 0 otherwise.

    A refused command is not a fault; "fault_injected", "inject_fault", "fault_start",
    "sensor_fault" start one; "fault_cleared", "clear_fault", "fault_end" clear one.
    """
    k = kind.lower()
    if "fault" not in k or "refused" in k:
        return 0
    if "clear" in k or k.endswith(("_end", "_off", "_over")):
        return -1
    return 1


def trip_cause(event: EventRow) -> str:
    """The cause a trip event shows on its lamp: its detail ("<name>: <cause>: <why>;
    <action>") without the name and the action (the lamp says both itself). Display
    only: the name that decides which lamp is the event's name field."""
    text = event.detail.removeprefix(f"{event.name}: ")
    return (text.rsplit("; ", 1)[0] if "; " in text else text).strip()


class EventLog:
    """Folds events into the state the dashboard shows; the list keeps the newest."""

    def __init__(self, keep: int = RECENT_EVENTS) -> None:
        self.recent: deque[EventRow] = deque(maxlen=keep)
        self.count = 0
        self.estop_latched = False
        self.estop_time: float | None = None
        self.ended: str | None = None
        self.windows: list[FaultWindow] = []
        self.kinds: dict[str, int] = {}
        self.latches: dict[str, Latch] = {}     # interlock name -> its latest latch
        self.trips: list[tuple[float, str]] = []  # every latch: (time, what latched)
        self.stopping = ""                       # why the run is ending (operator stop)
        self.steps: list[tuple[float, str]] = []   # scenario steps fired: (time, label)
        self.phases: list[tuple[float, str]] = []  # phases marked: (time, name)

    @classmethod
    def upto(cls, events: list[EventRow], t: float) -> EventLog:
        """The state after every event at or before plant time ``t`` (for replay)."""
        log = cls()
        log.add([e for e in events if e.time <= t])
        return log

    def add(self, events: list[EventRow]) -> None:
        for event in events:
            t, kind, detail, name = event.time, event.kind, event.detail, event.name
            self.recent.append(event)
            self.count += 1
            self.kinds[kind] = self.kinds.get(kind, 0) + 1
            if kind == "estop":
                self.estop_latched, self.estop_time = True, t
                self.latches[ESTOP] = Latch(t, "operator E-stop")
                self.trips.append((t, "E-stop"))
            elif kind == "trip":
                self.latches[name] = Latch(t, trip_cause(event))
                self.trips.append((t, name))
            elif kind == "operator_stop":
                self.stopping = f"operator stop ({detail})" if detail else "operator stop"
            elif kind == "scenario_step":
                self.steps.append((t, name))
            elif kind == "phase":
                self.phases.append((t, name))
            elif kind == "reset":
                self.latches.pop(name, None)
                if name == ESTOP:
                    self.estop_latched = False
            elif kind == "run_end":
                self.ended = detail
            edge = fault_edge(kind)
            if edge > 0:
                name = name or "fault"
                if not any(w.name == name and w.end is None for w in self.windows):
                    self.windows.append(FaultWindow(name, t))
            elif edge < 0:
                name = name or "fault"
                open_ = [w for w in self.windows if w.end is None]
                named = [w for w in open_ if w.name == name]
                for w in named or open_:
                    w.end = t

    def newest_first(self, limit: int) -> list[EventRow]:
        out = list(self.recent)[-limit:]
        out.reverse()
        return out
