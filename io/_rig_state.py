"""The rig's own state as every link tells it to the controller (docs/protocol.md 1.2).

The engine calls a link's optional ``state(tick, state, detail)`` when the run starts,
on every change and when it ends; each link turns that into its own form (a STATUS
frame, a field of the MQTT status document, Modbus status registers) with the codes
below, so a controller reads the same numbers whatever the link.
"""

from __future__ import annotations

from collections.abc import Sequence

from plantrig.sim import EXIT_CODES, Rig

# state codes, slot 0 of a STATUS frame
STATE_CODES = {"idle": 0, "running": 1, "tripped": 2, "fault": 3, "ended": 4}
COUNTER_MODULUS = 1 << 24   # float32 holds every integer below it exactly


class RigState:
    """The newest state a link was told, as codes: ``state`` and ``detail``.

    detail: for ``tripped`` the interlock holding the safe state (1 = the operator
    E-stop, 2.. = the rig file's [[interlocks]] in file order); for ``fault`` and
    ``ended`` the run's exit code (the engine passes the outcome class); else 0.
    """

    def __init__(self, interlocks: Sequence[str]) -> None:
        self.interlocks = ["estop", *interlocks]
        self.name = "idle"
        self.detail_text = ""
        self.code = 0
        self.detail = 0
        self.tick = 0

    @classmethod
    def for_rig(cls, rig: Rig) -> RigState:
        return cls([i.name for i in rig.interlocks])

    def set(self, tick: int, state: str, detail: str = "") -> None:
        """Take the engine's word; an unknown state name is kept out (never raises)."""
        if state not in STATE_CODES:
            return
        self.name, self.detail_text, self.tick = state, detail, tick
        self.code = STATE_CODES[state]
        if state == "tripped":
            self.detail = (self.interlocks.index(detail) + 1
                           if detail in self.interlocks else 0)
        elif state in ("fault", "ended"):
            self.detail = EXIT_CODES.get(detail, 1)
        else:
            self.detail = 0

    def values(self, rx_ok: int, rx_bad: int) -> tuple[float, ...]:
        """The STATUS frame values the rig sends: [state, detail, rx_ok, rx_bad, tick]."""
        m = COUNTER_MODULUS
        return (float(self.code), float(self.detail), float(rx_ok % m), float(rx_bad % m),
                float(max(self.tick, 0) % m))

    def document(self) -> dict[str, object]:
        """The same state for a JSON status document (MQTT)."""
        return {"run_state": self.name, "run_state_code": self.code,
                "detail": self.detail_text, "detail_code": self.detail, "state_tick": self.tick}
