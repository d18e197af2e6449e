"""Scenario files: a timeline of steps that fire at a time or when something happens.

A scenario (TOML, docs/scenarios.md) rehearses one situation on a rig: it sets
references, injects and clears faults, changes plant parameters, marks phases, presses
the E-stop or reset, and checks expectations, each step when its trigger comes:

    at = 1.5                       plant time in seconds
    when = "y:belt_speed > 0.7"    a condition on a tick column (<, <=, >, >=, ==, !=)
    on_trip = "overspeed"          an interlock trips ("estop" for the E-stop)
    on_phase = "surge"             a phase is marked (by a step or by the operator)
    delay = 0.2                    optional, seconds after a when/on_trip/on_phase trigger

Steps act through the same operator commands the dashboard sends, at the start of a
tick: a time trigger in the first tick with t >= at; any other trigger seen in tick k
in tick k + 1 without a delay, in tick k + delay / tick with one (never before k + 1).
Everything counts ticks of plant time, so a fast run gives the same record every time
and a real-time run against hardware follows the same timeline. ``[[verdicts]]``
(see _verdicts.py) judge the run.
"""

from __future__ import annotations

import dataclasses
import math
import operator
import re
import tomllib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.config._checker import (
    Checker,
    RigFileError,
    RigIssue,
    describe_value,
    did_you_mean,
    not_one_of,
)
from plantrig.sim.config._rigfile import Rig
from plantrig.sim.engine._commands import Command
from plantrig.sim.engine._contracts import EmitEvent, Event
from plantrig.sim.faults._faults import parse_fault
from plantrig.sim.safety._interlocks import ESTOP
from plantrig.sim.scenario._verdicts import VerdictSpec, parse_verdicts

TRIGGERS = ("at", "when", "on_trip", "on_phase")
ACTIONS = ("phase", "set_reference", "set_parameter", "inject", "clear", "estop", "reset",
           "stop", "expect")
STEP_KEYS = {"name", "delay", *TRIGGERS, *ACTIONS}
SCENARIO_KEYS = {"name", "description", "duration", "allow_trips"}
OPS: dict[str, Callable[[float, float], bool]] = {
    "<=": operator.le, ">=": operator.ge, "==": operator.eq, "!=": operator.ne,
    "<": operator.lt, ">": operator.gt}
_CONDITION = re.compile(r"^\s*([A-Za-z_][\w]*:[\w]+|t)\s*(<=|>=|==|!=|<|>)\s*(\S+)\s*$")


class ScenarioFileError(RigFileError):
    """Every mistake in one scenario file (file, key path, expected, found)."""


@dataclass(frozen=True)
class Condition:
    """``column op value`` on one tick record."""

    column: str
    op: str
    value: float
    index: int

    def holds(self, row: NDArray[np.float64]) -> bool:
        return OPS[self.op](float(row[self.index]), self.value)

    def __str__(self) -> str:
        return f"{self.column} {self.op} {self.value:g}"


def parse_condition(text: Any, columns: list[str]) -> tuple[Condition | None, str]:
    """A condition such as ``"y:level >= 0.4"``; (None, why) when it is not one."""
    if not isinstance(text, str):
        return None, f"expected a condition such as \"y:level > 0.4\", found {describe_value(text)}"
    m = _CONDITION.match(text)
    if m is None:
        return None, (f"expected '<column> <op> <number>' with op one of "
                      f"{', '.join(OPS)}, found {text!r}")
    column, op, number = m.groups()
    if column not in columns:
        hint = did_you_mean(column, columns)
        return None, f"no tick column {column!r}{hint}"
    try:
        value = float(number)
    except ValueError:
        return None, f"expected a number after {op!r}, found {number!r}"
    if math.isnan(value):
        return None, "a comparison with NaN never holds"
    return Condition(column, op, value, columns.index(column)), ""


@dataclass(frozen=True)
class Step:
    """One timeline entry: its trigger, delay and actions (in ACTIONS order)."""

    label: str
    at: float | None = None
    when: Condition | None = None
    on_trip: str | None = None
    on_phase: str | None = None
    delay: float = 0.0
    commands: tuple[Command, ...] = ()
    expect: Condition | None = None


@dataclass(frozen=True)
class Scenario:
    """A checked scenario file."""

    path: Path
    text: str
    name: str
    description: str
    duration: float | None
    steps: tuple[Step, ...]
    verdicts: tuple[VerdictSpec, ...]
    allow_trips: tuple[str, ...] = ()

    def apply_to(self, rig: Rig) -> Rig:
        """The rig with this scenario's duration (if it sets one)."""
        return rig if self.duration is None else dataclasses.replace(rig, duration=self.duration)

    @property
    def expected_trips(self) -> set[str]:
        """Interlocks this scenario means to trip (allowed, or judged by trip_within)."""
        named = {v.interlock for v in self.verdicts if v.criterion == "trip_within"}
        estops = {ESTOP for s in self.steps for c in s.commands if c.kind == "estop"}
        return set(self.allow_trips) | {n for n in named if n} | estops


def load_scenario(path: str | Path, rig: Rig) -> Scenario:
    """Read and check a scenario file against ``rig``; ScenarioFileError lists every mistake."""
    path = Path(path)
    file = str(path)
    try:
        text = path.read_text(encoding="utf-8")
        doc = tomllib.loads(text)
    except OSError as exc:
        raise ScenarioFileError([RigIssue(file, "", f"cannot read: {exc.strerror or exc}")]) \
            from None
    except UnicodeDecodeError as exc:
        raise ScenarioFileError([RigIssue(file, "", f"not UTF-8 text: {exc.reason}")]) from None
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioFileError([RigIssue(file, "", f"not valid TOML: {exc}")]) from None
    return build_scenario(doc, path, rig, text)


def build_scenario(doc: dict[str, Any], path: Path, rig: Rig, text: str = "") -> Scenario:
    """Check a parsed scenario document against ``rig`` (used by load_scenario and tests)."""
    from plantrig.sim.engine._engine import tick_columns  # the engine imports this module

    c = Checker(str(path))
    c.no_unknown(doc, {"scenario", "steps", "verdicts"}, "")
    head = c.table(doc, "scenario", "", required=True)
    c.no_unknown(head, SCENARIO_KEYS, "scenario")
    name = c.take(head, "name", "scenario", "str", default=path.stem) or path.stem
    description = c.take(head, "description", "scenario", "str", default="") or ""
    duration = c.take(head, "duration", "scenario", "number", default=None,
                      check=lambda v: None if v >= rig.tick else
                      f"expected at least one tick ({rig.tick:g} s), found {v}")
    interlocks = [ESTOP, *(i.name for i in rig.interlocks)]
    allow = c.take(head, "allow_trips", "scenario", "list", default=[]) or []
    for j, item in enumerate(allow):
        if item not in interlocks:
            c.add(f"scenario.allow_trips[{j}]", not_one_of(item, interlocks, "interlocks"))
    columns = tick_columns(dataclasses.replace(rig, duration=duration or rig.duration))[0]
    entries = doc.get("steps", [])
    if not isinstance(entries, list) or not all(isinstance(e, dict) for e in entries):
        c.add("steps", f"expected an array of tables ([[steps]]), found {describe_value(entries)}")
        entries = []
    steps = [_step(c, e, i, rig, columns, interlocks) for i, e in enumerate(entries)]
    faults = {cmd.args["name"] for s in steps if s for cmd in s.commands
              if cmd.kind == "inject_fault"}
    phases = {str(cmd.args["name"]) for s in steps if s for cmd in s.commands
              if cmd.kind == "mark_phase"}
    for i, step in enumerate(steps):     # a clear that matches nothing is a typo, caught
        for cmd in step.commands if step else ():   # here, not as a refusal mid-run
            if cmd.kind == "clear_fault" and cmd.args and cmd.args["name"] not in faults:
                c.add(f"steps[{i}].clear", not_one_of(cmd.args["name"], ["all", *sorted(faults)],
                                                      "faults the scenario injects"))
    verdicts = parse_verdicts(c, doc, rig, columns, interlocks, faults, phases)
    if c.issues:
        raise ScenarioFileError(c.issues)
    return Scenario(path, text, name, description,
                    None if duration is None else float(duration),
                    tuple(s for s in steps if s is not None), tuple(verdicts), tuple(allow))


def _step(c: Checker, e: dict[str, Any], i: int, rig: Rig, columns: list[str],
          interlocks: list[str]) -> Step | None:
    """One [[steps]] table (the i-th): its trigger, then its actions in a fixed order.
    Without a name its events call it "step 3 (steps[2])": counted as a person counts,
    with the key that finds it in the scenario file."""
    where = f"steps[{i}]"
    c.no_unknown(e, STEP_KEYS, where)
    unnamed = f"step {i + 1} ({where})"
    label = c.take(e, "name", where, "str", default=unnamed) or unnamed
    triggers = [t for t in TRIGGERS if t in e]
    if len(triggers) != 1:
        c.add(where, f"expected exactly one trigger ({', '.join(TRIGGERS)}), found "
                     f"{', '.join(triggers) or 'none'}")
    at = c.take(e, "at", where, "number", default=None, check=_seconds)
    when = _condition(c, e, "when", where, columns)
    on_trip = c.take(e, "on_trip", where, "str", default=None)
    if on_trip is not None and on_trip not in interlocks:
        c.add(f"{where}.on_trip", not_one_of(on_trip, interlocks, "interlocks"))
    on_phase = c.take(e, "on_phase", where, "str", default=None)
    delay = c.take(e, "delay", where, "number", default=0.0, check=_seconds)
    if "delay" in e and "at" in e:
        c.add(f"{where}.delay", "a delay goes with when, on_trip or on_phase; with `at`, "
                                "give the time itself")
    if not any(a in e for a in ACTIONS):
        c.add(where, f"expected at least one action ({', '.join(ACTIONS)})")
    commands = [*_setting_actions(c, e, where, rig), *_fault_actions(c, e, where, rig),
                *_safety_actions(c, e, where, label, interlocks)]
    expect = _condition(c, e, "expect", where, columns)
    if len(triggers) != 1:
        return None
    return Step(label, at, when, on_trip, on_phase, float(delay or 0.0), tuple(commands), expect)


def _seconds(value: float) -> str | None:
    return None if value >= 0 else f"expected seconds >= 0, found {value}"


def _condition(c: Checker, e: dict[str, Any], key: str, where: str,
               columns: list[str]) -> Condition | None:
    """``when`` or ``expect``: '<column> <op> <number>' (None when absent or wrong)."""
    if key not in e:
        return None
    condition, why = parse_condition(e[key], columns)
    if condition is None:
        c.add(f"{where}.{key}", why)
    return condition


def _setting_actions(c: Checker, e: dict[str, Any], where: str, rig: Rig) -> list[Command]:
    """``phase`` and ``set_reference``."""
    commands: list[Command] = []
    phase = c.take(e, "phase", where, "str", default=None)
    if phase is not None:
        commands.append(Command("mark_phase", {"name": phase}))
    refs = c.take(e, "set_reference", where, "table", default={}) or {}
    names = [r.name for r in rig.references]
    for ref, value in refs.items():
        if ref not in names:
            c.add(f"{where}.set_reference.{ref}", not_one_of(ref, names, "references"))
        elif not isinstance(value, int | float) or isinstance(value, bool) \
                or not math.isfinite(value):
            c.add(f"{where}.set_reference.{ref}", f"expected a finite number, found "
                                                  f"{describe_value(value)}")
        else:
            commands.append(Command("set_reference", {"name": ref, "value": float(value)}))
    return commands


def _fault_actions(c: Checker, e: dict[str, Any], where: str, rig: Rig) -> list[Command]:
    """``set_parameter``, ``inject`` and ``clear``."""
    commands: list[Command] = []
    param = c.take(e, "set_parameter", where, "table", default=None)
    if param is not None:
        for key in {"kind", "duration", "name"} & set(param):
            c.add(f"{where}.set_parameter.{key}", "not used here: a parameter change is a "
                                                  "plant_step that lasts to the end of the run")
        args = {**param, "kind": "plant_step",
                "name": f"parameter:{param.get('target', '')}"}
        args.pop("duration", None)
        if _fault_ok(c, f"{where}.set_parameter", args, rig):
            commands.append(Command("inject_fault", args))
    inject = c.take(e, "inject", where, "table", default=None)
    if inject is not None and _fault_ok(c, f"{where}.inject", inject, rig):
        spec, _ = parse_fault(inject, rig)
        assert spec is not None
        commands.append(Command("inject_fault", {**inject, "name": spec.name}))
    clear = c.take(e, "clear", where, "str", default=None)
    if clear is not None:
        commands.append(Command("clear_fault", {} if clear == "all" else {"name": clear}))
    return commands


def _safety_actions(c: Checker, e: dict[str, Any], where: str, label: str,
                    interlocks: list[str]) -> list[Command]:
    """``estop``, ``reset`` and ``stop``."""
    commands: list[Command] = []
    if c.take(e, "estop", where, "bool", default=False):
        commands.append(Command("estop", {"source": f"scenario {label}"}))
    reset = c.take(e, "reset", where, "str", default=None)
    if reset is not None:
        if reset != "all" and reset not in interlocks:
            c.add(f"{where}.reset", not_one_of(reset, ["all", *interlocks], "interlocks"))
        commands.append(Command("reset", {"source": f"scenario {label}"} if reset == "all"
                                else {"interlock": reset, "source": f"scenario {label}"}))
    if c.take(e, "stop", where, "bool", default=False):
        commands.append(Command("stop", {"reason": f"scenario {label}"}))
    return commands


def _fault_ok(c: Checker, where: str, args: dict[str, Any], rig: Rig) -> bool:
    _, problems = parse_fault(args, rig)
    for key, message in problems:
        c.add(f"{where}.{key}", message)
    return not problems


NEVER = 1 << 62


class ScenarioRunner:
    """Fires a scenario's steps during one run (owned by the engine, on its thread).

    ``next_tick`` is the earliest tick with a step due; ``watching`` says whether a tick
    record must be looked at (pending conditions or an expectation to check).
    """

    def __init__(self, scenario: Scenario, columns: list[str], tick: float,
                 emit: EmitEvent) -> None:
        self.scenario = scenario
        self.tick = tick
        self.emit = emit
        self._due: dict[int, int] = {}             # step index -> tick it fires at
        self._waiting: list[int] = []               # condition steps not yet triggered
        self._on_trip: dict[str, list[int]] = {}
        self._on_phase: dict[str, list[int]] = {}
        for i, step in enumerate(scenario.steps):
            if step.at is not None:
                self._due[i] = math.ceil(round(step.at / tick, 9))
            elif step.when is not None:
                self._waiting.append(i)
            elif step.on_trip is not None:
                self._on_trip.setdefault(step.on_trip, []).append(i)
            elif step.on_phase is not None:
                self._on_phase.setdefault(step.on_phase, []).append(i)
        self._expects: list[int] = []
        self._update()

    def _update(self) -> None:
        self.next_tick = min(self._due.values(), default=NEVER)
        self.watching = bool(self._waiting or self._expects)

    def _arm(self, i: int, tick: int) -> None:
        self._due[i] = tick + max(1, round(self.scenario.steps[i].delay / self.tick))

    def due(self, k: int) -> list[Command]:
        """The commands of every step due by tick ``k`` (at its start), in step order."""
        out: list[Command] = []
        for i in sorted(i for i, when in self._due.items() if when <= k):
            step = self.scenario.steps[i]
            del self._due[i]
            self.emit(k, "scenario_step", f"{step.label}: {_trigger_text(step)}",
                      name=step.label)
            out.extend(step.commands)
            if step.expect is not None:
                self._expects.append(i)
        self._update()
        return out

    def after_record(self, k: int, row: NDArray[np.float64]) -> None:
        """Look at tick ``k``'s record: arm condition steps, check expectations."""
        for i in self._expects:
            cond = self.scenario.steps[i].expect
            assert cond is not None
            value = float(row[cond.index])
            verdict = "passed" if cond.holds(row) else "failed"
            label = self.scenario.steps[i].label
            self.emit(k, "expect", f"{label}: {verdict}: {cond} (found {value:.6g})",
                      name=label)
        self._expects.clear()
        for i in list(self._waiting):
            cond = self.scenario.steps[i].when
            assert cond is not None
            if cond.holds(row):
                self._waiting.remove(i)
                self._arm(i, k)
        self._update()

    def on_event(self, event: Event) -> None:
        """Trips and phases arm the steps waiting for them."""
        if event.kind == "phase":
            waiting = self._on_phase.pop(event.name, [])
        elif event.kind in ("trip", "estop"):
            waiting = self._on_trip.pop(event.name, [])
        else:
            return
        for i in waiting:
            self._arm(i, event.tick)
        if waiting:
            self._update()


def _trigger_text(step: Step) -> str:
    if step.at is not None:
        return f"at {step.at:g} s"
    delay = f" + {step.delay:g} s" if step.delay else ""
    if step.when is not None:
        return f"when {step.when}{delay}"
    if step.on_trip is not None:
        return f"on trip of {step.on_trip}{delay}"
    return f"on phase {step.on_phase}{delay}"
