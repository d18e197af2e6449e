"""Interlocks: named, latched trips that force the safe state, and the rules to reset them.

An interlock trips when one of its causes appears and then stays tripped (latched) until
an operator resets it. Causes (the ``on`` list of ``[[interlocks]]``):

    limit:<name>   that limit is outside a trip bound (see _limits.py)
    link_lost      the link's watchdog saw no valid command for its timeout
    overruns       ``[safety] overrun_streak`` real-time ticks in a row started late
    non_finite     the plant state became NaN or infinite (the run then ends)

Every rig also has the interlock ``estop``: the operator's E-stop, which trips it at
once and whose cause clears when the operator resets it.

While an interlock is tripped its inputs (all, or those listed) get the rig's ``safe``
values in every tick, beginning with the tick its cause appears; ``action = "freeze"``
also holds the plant state where it is, ``action = "stop"`` ends the run after that tick.
A reset needs an explicit operator command and is refused, with the reason, while any
cause of that interlock is still present. Trips, resets, refused resets and E-stops are
events with their tick and time; ``trip:<name>`` columns are 1 while latched.

plantrig's interlocks protect the simulated plant and the rehearsal. They are not a
safety function for real equipment (docs/safety.md).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.config._checker import did_you_mean, not_one_of, one_of
from plantrig.sim.engine._contracts import REHEARSED, EmitEvent, Event
from plantrig.sim.safety._limits import LimitBank, LimitSpec

if TYPE_CHECKING:
    from plantrig.sim.config._checker import Checker
    from plantrig.sim.config._rigfile import Signal

ESTOP = "estop"
ACTIONS = ("safe_inputs", "freeze", "stop")
PLAIN_CAUSES = ("link_lost", "overruns", "non_finite")
INTERLOCK_KEYS = {"name", "on", "action", "inputs", "description"}
SAFETY_KEYS = {"watchdog_timeout", "overrun_streak"}
LINK_EVENTS = ("link_lost", "link_restored")
WARN_EVENTS = 20   # itemised limit_warn events per limit; the rest are counted
# how event texts name a cause; its key for `on` in brackets, to find it in the rig file
CAUSE_WORDS = {"link_lost": "link lost (link_lost)",
               "overruns": "late ticks in a row (overruns)",
               "non_finite": "plant state not finite (non_finite)"}


def cause_words(cause: str) -> str:
    """A cause as event texts say it: "limit belt_fast", "link lost (link_lost)"."""
    if cause.startswith("limit:"):
        return f"limit {cause.removeprefix('limit:')}"
    return CAUSE_WORDS.get(cause, cause)


@dataclass(frozen=True)
class InterlockSpec:
    """One checked ``[[interlocks]]`` entry; an empty ``inputs`` means every input."""

    name: str
    on: tuple[str, ...]
    action: str = "safe_inputs"
    inputs: tuple[str, ...] = ()
    description: str = ""


@dataclass(frozen=True)
class SafetySettings:
    """The ``[safety]`` table.

    ``watchdog_timeout`` is the silence, in seconds, after which a run without a link of
    its own (a built-in controller) reports ``link_lost`` while a link fault drops its
    commands (a real link uses its own ``[link] watchdog_timeout``);
    ``overrun_streak`` is how many late real-time ticks in a row make the ``overruns``
    cause.
    """

    watchdog_timeout: float = 0.1
    overrun_streak: int = 3


ESTOP_SPEC = InterlockSpec(ESTOP, (ESTOP,), "safe_inputs", (), "operator E-stop")


def parse_safety(c: Checker, doc: dict[str, Any]) -> SafetySettings:
    t = c.table(doc, "safety", "", required=False)
    c.no_unknown(t, SAFETY_KEYS, "safety")
    timeout = c.take(t, "watchdog_timeout", "safety", "number", default=0.1,
                     check=lambda v: None if v > 0 else f"expected a positive number of "
                                                        f"seconds, found {v}")
    streak = c.take(t, "overrun_streak", "safety", "int", default=3,
                    check=lambda v: None if v >= 1 else f"expected >= 1, found {v}")
    return SafetySettings(float(timeout if timeout is not None else 0.1),
                          int(streak if streak is not None else 3))


def parse_interlocks(c: Checker, doc: dict[str, Any], limits: list[LimitSpec],
                     inputs: list[Signal]) -> list[InterlockSpec]:
    """Check ``[[interlocks]]`` against the rig's limits and inputs."""
    value = doc.get("interlocks", [])
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        c.add("interlocks", "expected an array of tables ([[interlocks]])")
        return []
    causes = [*PLAIN_CAUSES, *(f"limit:{s.name}" for s in limits)]
    trip_limits = {f"limit:{s.name}" for s in limits if s.trips}
    input_names = [s.name for s in inputs]
    out: list[InterlockSpec] = []
    for i, entry in enumerate(value):
        where = f"interlocks[{i}]"
        c.no_unknown(entry, INTERLOCK_KEYS, where)
        name = c.take(entry, "name", where, "str")
        if name is not None:
            if not name.isidentifier():
                c.add(f"{where}.name", f"expected a plain identifier, found {name!r}")
            elif name == ESTOP:
                c.add(f"{where}.name", "'estop' is the built-in E-stop interlock; choose "
                                       "another name")
            elif any(s.name == name for s in out):
                c.add(f"{where}.name", f"duplicate interlock name {name!r}")
        on = c.take(entry, "on", where, "list")
        good: list[str] = []
        for j, cause in enumerate(on or []):
            if not isinstance(cause, str) or cause not in causes:
                c.add(f"{where}.on[{j}]", not_one_of(cause, causes))
            elif cause.startswith("limit:") and cause not in trip_limits:
                c.add(f"{where}.on[{j}]", f"{cause} has no trip bound (trip_low, trip_high "
                                          "or rate_trip), so it can never trip")
            else:
                good.append(cause)
        if on is not None and not on:
            c.add(f"{where}.on", "expected at least one cause")
        action = c.take(entry, "action", where, "str", default="safe_inputs",
                        check=one_of(ACTIONS)) or "safe_inputs"
        chosen = c.take(entry, "inputs", where, "list", default=[]) or []
        for j, inp in enumerate(chosen):
            if inp not in input_names:
                c.add(f"{where}.inputs[{j}]", not_one_of(inp, input_names, "plant inputs"))
        desc = c.take(entry, "description", where, "str", default="") or ""
        if name is not None:
            out.append(InterlockSpec(name, tuple(good), action, tuple(chosen), desc))
    listed = {cause for spec in out for cause in spec.on}
    raw = doc.get("limits", [])
    for spec in limits:
        if spec.trips and f"limit:{spec.name}" not in listed:
            j = next(i for i, e in enumerate(raw) if e.get("name", e.get("signal", "")
                                                            .partition(":")[2]
                                                            or e.get("signal")) == spec.name)
            c.add(f"limits[{j}]", f"limit {spec.name!r} has a trip bound but no interlock "
                                  f"lists 'limit:{spec.name}' in its `on`; add it to one "
                                  "(or keep warn bounds only)")
    return out


class Safety:
    """Limits, interlock latches and the safe state of one run.

    The engine asks three cheap questions every tick: ``checking`` (are there limits to
    check), ``forcing`` (must inputs be forced to safe values) and ``freezing``; all the
    work happens only when a limit is near, a cause appears or an operator acts.
    ``emit(tick, kind, detail, name=...)`` records an event.
    """

    def __init__(self, specs: tuple[InterlockSpec, ...] | list[InterlockSpec],
                 limits: tuple[LimitSpec, ...] | list[LimitSpec], settings: SafetySettings,
                 input_names: list[str], safe_u: NDArray[np.float64], columns: list[str],
                 row: NDArray[np.float64], tick: float,
                 emit: EmitEvent) -> None:
        self.specs = [ESTOP_SPEC, *specs]
        self.settings = settings
        self.tick = tick
        self.emit = emit
        self.safe_u = safe_u
        self.limits = LimitBank(limits, columns, tick) if limits else None
        self.checking = self.limits is not None
        self.row = row                          # the engine's tick record, written in place
        self._trip_col = [columns.index(f"trip:{s.name}") for s in self.specs]
        self._masks = [np.array([not s.inputs or n in s.inputs for n in input_names])
                       for s in self.specs]
        self.latched = [False] * len(self.specs)
        self.active: dict[str, str] = {}        # cause -> what made it (while present)
        self._by_cause: dict[str, list[int]] = {}
        for i, spec in enumerate(self.specs):
            for cause in spec.on:
                self._by_cause.setdefault(cause, []).append(i)
        self._link_sources: set[str] = set()
        self.mask = np.zeros(len(input_names), dtype=bool)
        self.forcing = False
        self.freezing = False
        self.stop_reason = ""
        self.trips: list[tuple[int, str]] = []   # (tick, interlock) of every latch, in order
        self.warnings_shown: dict[str, int] = {}

    # -- the tick --------------------------------------------------------------------
    def check(self, k: int) -> bool:
        """Check the limits on the tick record; True when an interlock newly tripped."""
        bank = self.limits
        assert bank is not None
        if not bank.check(self.row):
            return False
        for i in bank.rising_warns:
            self._warn(k, bank.specs[i], bank.value(i), bank.rate(i))
        tripped = False
        for i in bank.falling_trips:
            self.active.pop(f"limit:{bank.specs[i].name}", None)
        for i in bank.rising_trips:
            spec = bank.specs[i]
            tripped |= self.cause(k, f"limit:{spec.name}",
                                  spec.explain(bank.value(i), bank.rate(i)))
        return tripped

    def force(self, u: NDArray[np.float64]) -> None:
        """Give the inputs of every tripped interlock their safe values."""
        np.copyto(u, self.safe_u, where=self.mask)

    # -- causes ----------------------------------------------------------------------
    def cause(self, k: int, cause: str, why: str) -> bool:
        """A cause is present from tick ``k``; trip what it feeds. True if anything tripped."""
        self.active[cause] = why
        tripped = False
        for i in self._by_cause.get(cause, ()):
            if not self.latched[i]:
                self._latch(k, i, cause, why)
                tripped = True
        return tripped

    def clear_cause(self, cause: str) -> None:
        self.active.pop(cause, None)

    def on_event(self, event: Event) -> None:
        """Follow link watchdog events (from the link, or from a rehearsed link fault)."""
        if event.kind not in LINK_EVENTS:
            return
        source = "fault" if event.source == REHEARSED else "link"
        if event.kind == "link_lost":
            self._link_sources.add(source)
            self.cause(event.tick, "link_lost", event.detail)
        else:
            self._link_sources.discard(source)
            if not self._link_sources:
                self.clear_cause("link_lost")

    def estop(self, k: int) -> None:
        self.active[ESTOP] = "operator E-stop"
        if not self.latched[0]:
            self._latch(k, 0, ESTOP, "operator E-stop")

    # -- operator reset --------------------------------------------------------------
    def reset(self, k: int, name: Any = None, by: str = "operator") -> None:
        """A reset of interlock ``name`` (every tripped one when None) by the operator,
        or by whoever ``by`` names (a scenario step)."""
        names = [s.name for s in self.specs]
        if name not in (None, "", "all"):
            if name not in names:
                hint = did_you_mean(str(name), names)
                self.emit(k, "reset_refused", f"{name}: no such interlock "
                                              f"({', '.join(names)}){hint}", name=str(name))
                return
            chosen = [names.index(name)]
            if not self.latched[chosen[0]]:
                self.emit(k, "reset_refused", f"{name}: not tripped", name=name)
                return
        else:
            chosen = [i for i, on in enumerate(self.latched) if on]
            if not chosen:
                self.emit(k, "reset_refused", "nothing is latched")
                return
        for i in chosen:
            spec = self.specs[i]
            if i == 0:
                self.active.pop(ESTOP, None)   # releasing the E-stop clears its cause
            present = [c for c in spec.on if c in self.active]
            if present:
                why = "; ".join(f"{cause_words(c)}: {self.active[c]}" for c in present)
                self.emit(k, "reset_refused", f"{spec.name}: cause still present: {why}",
                          name=spec.name)
                continue
            self.latched[i] = False
            self._update()
            self.emit(k, "reset", f"{spec.name}: " + (
                f"E-stop released by {by}" if i == 0 else f"reset by {by}"), name=spec.name)

    # -- internals -------------------------------------------------------------------
    def _latch(self, k: int, i: int, cause: str, why: str) -> None:
        spec = self.specs[i]
        self.latched[i] = True
        self.trips.append((k, spec.name))
        self._update()
        if i == 0:
            self.emit(k, "estop", "operator E-stop: inputs forced to safe values",
                      name=spec.name)
            return
        action = {"safe_inputs": "inputs to safe values", "freeze": "inputs to safe values, "
                  "plant frozen", "stop": "inputs to safe values, run stops"}[spec.action]
        self.emit(k, "trip", f"{spec.name}: {cause_words(cause)}: {why}; {action}",
                  name=spec.name)
        if spec.action == "stop" and not self.stop_reason:
            self.stop_reason = f"interlock {spec.name!r} tripped ({cause_words(cause)})"

    def _update(self) -> None:
        self.mask[:] = False
        for i, on in enumerate(self.latched):
            if on:
                self.mask |= self._masks[i]
        self.forcing = bool(self.mask.any())
        self.freezing = any(on and s.action == "freeze"
                            for on, s in zip(self.latched, self.specs, strict=True))
        for col, on in zip(self._trip_col, self.latched, strict=True):
            self.row[col] = 1.0 if on else 0.0

    def _warn(self, k: int, spec: LimitSpec, value: float, rate: float) -> None:
        shown = self.warnings_shown.get(spec.name, 0)
        self.warnings_shown[spec.name] = shown + 1
        if shown < WARN_EVENTS:
            more = "; further warnings of this limit are counted only" \
                if shown == WARN_EVENTS - 1 else ""
            self.emit(k, "limit_warn", f"{spec.name}: {spec.explain(value, rate)}{more}",
                      name=spec.name)

    def finish(self, k: int) -> None:
        """At the end of a run: how many warnings each limit gave beyond the itemised ones."""
        for name, count in self.warnings_shown.items():
            if count > WARN_EVENTS:
                self.emit(k, "limit_warn", f"{name}: {count} warnings in all, the first "
                                           f"{WARN_EVENTS} itemised", name=name)

