"""The contracts the tick engine meets other parts through.

The engine (plantrig.sim) knows nothing of links or devices; the composition root
(plantrig.cli) builds objects from plantrig.io that satisfy these protocols and hands
them to the engine. Every method here is called on the real-time thread: it must not
block, must not allocate on the hot path where it can be avoided, and must never raise
for bad controller input (count it and report an event instead).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

Vector = NDArray[np.float64]


REHEARSED = "rehearsed"   # Event.source of what a fault injection made happen
BY_COMMAND = "command"    # Event.source of a fault_cleared that a clear_fault command ended
WINDOW_FAULT, WINDOW_DISTURBANCE = "fault", "disturbance"   # Event.window's values
OPTIONAL_EVENT_FIELDS = ("source", "name", "window")   # recorded only when set


@dataclass(frozen=True, slots=True)
class Event:
    """Something worth a line in the run record: a trip, a bad frame, a link loss.

    ``detail`` is for people; logic reads the fields, never its wording. ``source``
    says where it came from when logic must tell ("rehearsed" for a link fault a
    scenario or the operator injected, "" for the real thing; "command" for a fault a
    clear_fault command ended, "" when its duration ran out). ``name`` is what the
    event is about: the fault, interlock (``estop`` for the E-stop), limit, scenario
    step, phase, reference, acceptance rule or refused command (docs/records.md,
    "Events"). ``window`` is set on ``fault_injected`` only: the kind of window the
    fault opens on the plots, ``fault`` or ``disturbance``.
    """

    tick: int
    time: float
    kind: str
    detail: str = ""
    source: str = ""
    name: str = ""
    window: str = ""

    def record(self) -> dict[str, Any]:
        """The event as events.jsonl holds it (source, name and window only when set)."""
        line: dict[str, Any] = {"tick": self.tick, "time": self.time, "kind": self.kind,
                                "detail": self.detail}
        for key in OPTIONAL_EVENT_FIELDS:
            if getattr(self, key):
                line[key] = getattr(self, key)
        return line


class EmitEvent(Protocol):
    """How safety, faults and the scenario record an event (the engine's ``_event``)."""

    def __call__(self, tick: int, kind: str, detail: str = "", source: str = "", *,
                 name: str = "", window: str = "") -> None:
        ...


class SignalChain(Protocol):
    """Conditioning between engineering values and what crosses the link.

    An actuator chain maps the controller's command (as decoded) to the plant input u;
    a sensor chain maps the plant output y to the values sent to the controller.
    """

    def apply(self, tick: int, src: Vector, dst: Vector) -> None:
        """Write the conditioned version of ``src`` into ``dst`` (same tick, in place)."""
        ...

    def reset(self) -> None:
        """Forget history (delay lines, rate limiter memory, noise state is reseeded)."""
        ...


class ControllerLink(Protocol):
    """A link to a controller under test, as the tick loop sees it. Never blocks.

    Optional: ``state(tick, state, detail) -> None``. A link that has it is told the
    rig's run state so it can tell the controller (docs/protocol.md 1.2): "running"
    after open, "tripped" (detail: the interlock holding the safe state) or "running"
    again when latches change, and "fault" or "ended" (detail: the outcome class)
    before close. The engine calls it on a change only, never per tick.
    """

    def open(self) -> None:
        """Open the port or connect; called once before the first tick."""
        ...

    def receive(self, tick: int, t: float, out: Vector) -> bool:
        """Copy the newest valid actuator command into ``out``; True if one arrived.

        When nothing valid arrived ``out`` is left untouched (the engine holds the last
        good command or applies the safe value, as the rig file says).
        """
        ...

    def send(self, tick: int, t: float, values: Vector) -> None:
        """Send the sensor values for this tick to the controller."""
        ...

    def drain_events(self) -> list[Event]:
        """Events since the last call (bad frames, link lost, reconnects)."""
        ...

    def health(self) -> dict[str, float]:
        """Counters and estimates: frames in/out, CRC errors, latency, ..."""
        ...

    def close(self) -> None:
        """Release the port or connection; safe to call twice."""
        ...
