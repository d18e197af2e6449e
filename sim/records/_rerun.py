"""Re-running a recorded run off the bench: the plant gets the recorded commands again.

A rerun is an ordinary fast run of the run folder's own rig.toml (its recorded seed
included) in which the controller is replaced by the record: at tick k the plant gets
``cmd:*`` of tick k (the command as it left the link, before the actuator chain) with
the freshness flag of tick k. Everything downstream of the command is computed again by
the same engine: actuator chain, safety, plant, sensor chain. With the rig unchanged,
x, y, u and the sensor values equal the recording bit for bit; with a changed plant
(``--plant``, ``--set``) the same commands meet the new plant: the what-if after a
surprise on the bench.

What is fed back, at its recorded tick:

- commands and freshness: ``cmd:*`` and ``fresh``; for a run with a built-in controller
  every command was fresh before any rehearsed link fault, so the flag is 1 and the
  rehearsed link faults (which the scenario injects again) act exactly as they did;
- link watchdog events of a real link (``link_lost`` / ``link_restored``), which may
  trip an interlock;
- the scenario (the folder's scenario.toml, run again: its steps fire on the same
  ticks and events);
- operator commands recorded exactly by their events: stop, E-stop, reset, phase marks.

A record a rerun cannot reproduce is refused with the reason (RerunError): operator
reference changes and fault injections (their events do not hold every parameter),
and rehearsed link faults on commands from a real link (what the controller sent before
the fault is not recorded). A real-time run's late ticks are not repeated in fast mode.
"""

from __future__ import annotations

import dataclasses
import queue
import tomllib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.config._checker import RigFileError, RigIssue, describe_value
from plantrig.sim.config._overrides import apply_overrides, effective_text
from plantrig.sim.config._rigfile import Rig, build_rig
from plantrig.sim.engine._commands import Command
from plantrig.sim.engine._contracts import BY_COMMAND, REHEARSED, Event
from plantrig.sim.records._reader import RunRecord, read_run
from plantrig.sim.records._secrets import redact_assignments

Vector = NDArray[np.float64]
REPLAYED_LINK_EVENTS = ("link_lost", "link_restored")
LOSSY_OPERATOR_EVENTS = {"reference_set": "a set_reference command",
                         "fault_injected": "an inject_fault command",
                         "fault_cleared": "a clear_fault command"}


class RerunError(ValueError):
    """The folder cannot be re-run exactly; the message says why."""


class RecordedCommands:
    """A ControllerLink that plays back a run's commands, freshness and link events."""

    def __init__(self, cmd: Vector, fresh: NDArray[np.bool_],
                 events: Sequence[Event] = ()) -> None:
        self.cmd = np.ascontiguousarray(cmd, dtype=np.float64)
        self.fresh = [bool(f) for f in fresh]
        self.n = len(self.fresh)
        self.at: dict[int, list[Event]] = {}
        for ev in events:
            self.at.setdefault(max(ev.tick, 0), []).append(ev)
        self.pending: list[Event] = []
        self.last_tick = -1
        self.lost = sum(ev.kind == "link_lost" for ev in events)

    def open(self) -> None:
        return None

    def receive(self, tick: int, t: float, out: Vector) -> bool:
        self.last_tick = tick
        if tick in self.at:
            self.pending.extend(self.at[tick])
        if tick >= self.n:
            return False
        out[:] = self.cmd[tick]
        return self.fresh[tick]

    def send(self, tick: int, t: float, values: Vector) -> None:
        return None

    def drain_events(self) -> list[Event]:
        if not self.pending:
            return []
        out, self.pending = self.pending, []
        return out

    def health(self) -> dict[str, float]:
        return {"link_lost": float(self.lost)} if self.lost else {}

    def close(self) -> None:
        return None


class RecordedOperator:
    """A command source (``get_nowait``) giving each recorded operator command at the
    poll of its tick; the tick is the one after the link's last receive."""

    def __init__(self, commands: list[tuple[int, Command]], link: RecordedCommands) -> None:
        self.commands = sorted(commands, key=lambda c: c[0])
        self.link = link

    def get_nowait(self) -> Command:
        if self.commands and self.commands[0][0] <= self.link.last_tick + 1:
            return self.commands.pop(0)[1]
        raise queue.Empty


@dataclasses.dataclass
class RerunPlan:
    """Everything a rerun needs, from the folder and the changes asked for."""

    rig: Rig
    link: RecordedCommands
    operator: RecordedOperator | None
    scenario_path: Path | None
    about: dict[str, Any]
    recorded_s: float          # plant time the record covers; a rerun goes no further


def _events(record: RunRecord) -> list[dict[str, Any]]:
    return sorted(record.events, key=lambda e: int(e["tick"]))


def operator_commands(events: list[dict[str, Any]]) -> list[tuple[int, Command]]:
    """Operator commands recorded by their events (those a scenario step did not issue:
    a scenario's commands follow its scenario_step event in the same tick); ``events``
    as sim.read_run gives them, each with its name where it has one."""
    scenario_ticks = {int(e["tick"]) for e in events if e["kind"] == "scenario_step"}
    out: list[tuple[int, Command]] = []
    for e in events:
        k, kind, detail = int(e["tick"]), e["kind"], str(e.get("detail", ""))
        if k in scenario_ticks:
            continue
        if kind in LOSSY_OPERATOR_EVENTS and not (
                kind == "fault_cleared" and e.get("source") != BY_COMMAND):
            raise RerunError(f"the record holds {LOSSY_OPERATOR_EVENTS[kind]} from the "
                             f"operator at {float(e['time']):g} s ({detail}); its event does "
                             "not keep every parameter, so a rerun would not be exact")
        if kind == "operator_stop":
            out.append((k, Command("stop", {"reason": detail} if detail else {})))
        elif kind == "estop":
            out.append((k, Command("estop")))
        elif kind in ("reset", "reset_refused"):
            name = str(e.get("name", ""))    # none: a reset of every latch
            out.append((k, Command("reset", {"interlock": name} if name else {})))
        elif kind == "phase":
            out.append((k, Command("mark_phase", {"name": str(e.get("name", ""))})))
    return out


def plan_rerun(folder: str | Path, *, overrides: Sequence[str] = (),
               plant_file: str | Path | None = None) -> RerunPlan:
    """Read ``folder`` and prepare its rerun; RigFileError for a mistake in the changes
    asked for, RerunError when the record cannot be re-run exactly."""
    folder = Path(folder)
    rig_copy = folder / "rig.toml"
    if not rig_copy.is_file() or not (folder / "summary.json").is_file():
        raise RerunError(f"{folder}: not a finished run folder (rig.toml and summary.json "
                         "needed)")
    record = read_run(folder)
    text = rig_copy.read_text(encoding="utf-8")
    doc = tomllib.loads(text)
    changes: list[str] = []
    if plant_file is not None:
        doc["plant"] = _plant_table(Path(plant_file))
        changes.append(f"plant from {plant_file}")
    assignments = list(overrides)
    ticks = int(record.summary.get("ticks_recorded", len(record.rows)))
    tick = float(record.summary.get("rig", {}).get("tick_s", 0.0))
    if "rig.duration" not in " ".join(assignments) and tick > 0:
        recorded = ticks * tick
        if recorded < float(doc.get("rig", {}).get("duration", recorded)) - tick / 2:
            doc["rig"]["duration"] = recorded     # no commands beyond the record
            changes.append(f"duration {recorded:g} s (the recorded ticks)")
    if assignments:
        doc = apply_overrides(doc, assignments, str(rig_copy))
        changes += redact_assignments(assignments)
    changed = bool(changes)
    rig = build_rig(doc, rig_copy, effective_text(doc) if changed else text)
    if changed:
        rig = dataclasses.replace(rig, overrides=tuple(changes))
    if abs(rig.tick - tick) > 1e-12 * max(tick, 1.0):
        raise RerunError(f"rig.tick {rig.tick:g} s differs from the record's {tick:g} s; "
                         "commands are replayed tick by tick, so the tick cannot change")
    names = [f"cmd:{s.name}" for s in rig.inputs]
    missing = [n for n in names if n not in record.columns]
    if missing or "fresh" not in record.columns:
        raise RerunError(f"{folder}: the record has no {', '.join(missing) or 'fresh'} "
                         "column; the rig's inputs changed?")
    events = _events(record)
    built_in = rig.controller.kind != "external"
    link_events = [] if built_in else [
        Event(int(e["tick"]), float(e["time"]), e["kind"], str(e.get("detail", "")))
        for e in events if e["kind"] in REPLAYED_LINK_EVENTS
        and e.get("source") != REHEARSED]
    if not built_in and (folder / "scenario.toml").is_file():
        _refuse_link_faults_on_commands(folder / "scenario.toml")
    cmd = np.column_stack([record[n] for n in names]) if names else np.zeros((ticks, 0))
    fresh = np.ones(len(record.rows), dtype=bool) if built_in else record["fresh"] > 0.5
    link = RecordedCommands(cmd, fresh, link_events)
    operator = operator_commands(events)
    about = {"rerun": {
        "of": str(folder.resolve()),
        "of_started_utc": record.summary.get("started_utc"),
        "of_mode": record.summary.get("mode"),
        "of_ended": record.summary.get("ended"),
        "changes": changes,
        "fed": "recorded cmd:* and fresh per tick" + (
            "" if built_in else ", link_lost/link_restored events") +
            (f", {len(operator)} operator command(s)" if operator else ""),
    }}
    scenario = folder / "scenario.toml"
    return RerunPlan(rig, link, RecordedOperator(operator, link) if operator else None,
                     scenario if scenario.is_file() else None, about, ticks * tick)


def _plant_table(path: Path) -> dict[str, Any]:
    """The [plant] table of ``path`` (a rig file or a file with only [plant]); an ODE
    module is named by its absolute path, as it lies beside ``path``."""
    file = str(path)
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise RigFileError([RigIssue(file, "", f"cannot read: {exc.strerror or exc}")]) from None
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise RigFileError([RigIssue(file, "", f"not valid TOML: {exc}")]) from None
    plant = doc.get("plant")
    if not isinstance(plant, dict):
        raise RigFileError([RigIssue(file, "plant", "expected a [plant] table, found "
                                     + ("nothing" if plant is None else describe_value(plant)))])
    if isinstance(plant.get("module"), str):
        plant = {**plant, "module": str((path.parent / plant["module"]).resolve())}
    return plant


def _refuse_link_faults_on_commands(scenario: Path) -> None:
    text = scenario.read_text(encoding="utf-8")
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return
    for step in doc.get("steps", []):
        inject = step.get("inject") if isinstance(step, dict) else None
        if isinstance(inject, dict) and str(inject.get("kind", "")).startswith("link_") \
                and inject.get("target") != "to_controller":
            raise RerunError(
                f"the scenario rehearses the link fault {inject.get('name')!r} "
                f"({inject.get('kind')}) on commands from a real controller; what the "
                "controller sent before the fault is not recorded, so a rerun would not "
                "be exact")

