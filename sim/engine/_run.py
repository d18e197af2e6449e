"""Running a rig: in memory for the Python API, or into a run folder for the CLI."""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig import __version__
from plantrig.sim.config._rigfile import Rig
from plantrig.sim.engine._clock import Clock
from plantrig.sim.engine._commands import CommandInbox
from plantrig.sim.engine._contracts import ControllerLink, SignalChain
from plantrig.sim.engine._engine import Engine, RunOutcome, tick_columns
from plantrig.sim.engine._outcome import COMPLETED, EXIT_CODES, EXIT_VERDICT, FAULT
from plantrig.sim.engine._signals import SignalStop, stop_on_signals
from plantrig.sim.model._plant import Plant, from_state_space_object, make_stepper
from plantrig.sim.model._summary import summarize
from plantrig.sim.records._manifest import write_atomic
from plantrig.sim.records._preflight import RecordError, preflight
from plantrig.sim.records._recorder import start_recorder
from plantrig.sim.records._records import count_ticks, finish_record, salvage_rows, start_record
from plantrig.sim.records._run_info import (
    add_to_run_start,
    note_tick0,
    run_info_of,
    utc_of,
)
from plantrig.sim.records._sources import copy_sources
from plantrig.sim.records._tape import EventTape, MemoryTape, Tape, tape_dir
from plantrig.sim.scenario._scenario import Scenario
from plantrig.sim.scenario._verdicts import evaluate, write_verdicts

RING_SECONDS = 10.0
RING_MIN_ROWS = 4096
RECORDER_JOIN_S = 60.0


@dataclass
class RunData:
    """A run's tick records as one array with named columns."""

    columns: list[str]
    units: list[str]
    rows: NDArray[np.float64]
    outcome: RunOutcome

    def __getitem__(self, name: str) -> NDArray[np.float64]:
        try:
            return self.rows[:, self.columns.index(name)]
        except ValueError:
            raise KeyError(f"no column {name!r}; columns: {', '.join(self.columns)}") from None

    @property
    def t(self) -> NDArray[np.float64]:
        return self["t"]


def simulate(rig: Rig, *, realtime: bool = False, clock: Clock | None = None,
             link: ControllerLink | None = None, actuator_chain: SignalChain | None = None,
             sensor_chain: SignalChain | None = None,
             scenario: Scenario | None = None, stretches: bool = True) -> RunData:
    """Run ``rig`` in this process, keeping every row in memory (``scenario``: its steps
    fire during the run; judge it with evaluate on the result). ``stretches`` False
    keeps every tick in Python (plain ticks otherwise run in C, with the same record)."""
    rig = scenario.apply_to(rig) if scenario is not None else rig
    columns, units = tick_columns(rig)
    tape = MemoryTape(columns, rig.n_ticks)
    engine = Engine(rig, tape, realtime=realtime, clock=clock, link=link,
                    actuator_chain=actuator_chain, sensor_chain=sensor_chain,
                    scenario=scenario, stretches=stretches)
    outcome = engine.run()
    return RunData(columns, units, tape.rows, outcome)


def simulate_inputs(plant: Plant | Any, tick: float, u: NDArray[np.float64],
                    x0: NDArray[np.float64] | None = None, method: str = "rk4",
                    substeps: int = 1) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Open-loop response to an input sequence ``u`` (ticks x inputs), held per tick.

    ``plant`` may be a plantrig plant or a scipy / python-control StateSpace object.
    Returns (y, x): outputs y_k and states x_k for every tick k, through the same
    stepper the engine uses.
    """
    if not isinstance(plant, Plant):
        plant = from_state_space_object(plant)
    stepper = make_stepper(plant, tick, x0, method, substeps)
    u = np.asarray(u, dtype=np.float64).reshape(len(u), -1)
    y = np.zeros((len(u), stepper.n_outputs))
    x = np.zeros((len(u), stepper.n_states))
    for k in range(len(u)):
        x[k] = stepper.x
        stepper.u[:] = u[k]
        stepper.output_and_advance(k * tick)
        y[k] = stepper.y
    return y, x


def ring_capacity(rig: Rig) -> int:
    return max(RING_MIN_ROWS, min(rig.n_ticks, int(RING_SECONDS / rig.tick)))


def new_run_folder(rig: Rig, out_dir: Path) -> Path:
    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y%m%d-%H%M%S")
    folder = out_dir / f"{rig.name}-{stamp}"
    suffix = 1
    while folder.exists():
        suffix += 1
        folder = out_dir / f"{rig.name}-{stamp}-{suffix}"
    folder.mkdir(parents=True)
    return folder


def run_to_folder(rig: Rig, out_dir: Path, *, realtime: bool | None = None,
                  link: ControllerLink | None = None,
                  actuator_chain: SignalChain | None = None,
                  sensor_chain: SignalChain | None = None,
                  folder: Path | None = None, commands: Any = None,
                  on_tapes_ready: Any = None,
                  scenario: Scenario | None = None,
                  about: dict[str, Any] | None = None,
                  npy: bool = False,
                  run_info: dict[str, Any] | None = None) -> tuple[Path, RunOutcome,
                                                                   dict[str, Any]]:
    """Run ``rig`` with the recorder in its own process; write the run folder.

    The folder holds the rig file as given (and an ODE model's module), the tick data
    once (the self-describing ``run.h5``; ``ticks.npy``, one named float64 field per
    column, where h5py is missing or as well with ``npy``), ``events.jsonl``,
    ``summary.json`` with the model summary and timing statistics, and
    ``manifest.json`` (docs/records.md). ``commands`` is a
    queue of operator Commands; ``on_tapes_ready(tape_path, event_tape_path)`` is called
    once both tapes exist (to start a dashboard on them). With a ``scenario`` the folder
    also holds it (``scenario.toml``) and its judged criteria (``verdicts.json``), and
    the summary lists them under "verdicts". ``about`` adds keys to the summary (a
    rerun says what it re-ran). ``run_info`` (the device under test as "dut", say) goes
    into run_start.json and the summary, with the link's ``describe()`` as "link_used";
    the summary also holds "tick0_utc", the wall-clock time tick 0 started.
    """
    rig = scenario.apply_to(rig) if scenario is not None else rig
    columns, units = tick_columns(rig)
    preflight(folder or out_dir, rig.n_ticks, len(columns),
              ring_capacity(rig) * len(columns) * 8, tape_dir())
    with stop_on_signals() as stopper:
        return _run_and_record(rig, folder or new_run_folder(rig, out_dir), stopper,
                               realtime=realtime, link=link, actuator_chain=actuator_chain,
                               sensor_chain=sensor_chain, commands=commands,
                               on_tapes_ready=on_tapes_ready, scenario=scenario,
                               about=about, npy=npy, run_info=run_info)


def _run_and_record(rig: Rig, folder: Path, stopper: SignalStop, *, realtime: bool | None,
                    link: ControllerLink | None, actuator_chain: SignalChain | None,
                    sensor_chain: SignalChain | None, commands: Any, on_tapes_ready: Any,
                    scenario: Scenario | None,
                    about: dict[str, Any] | None = None,
                    npy: bool = False,
                    run_info: dict[str, Any] | None = None) -> tuple[Path, RunOutcome,
                                                                     dict[str, Any]]:
    columns, units = tick_columns(rig)
    copy_sources(rig, scenario, folder)  # rig.toml points at its module copy
    (folder / "columns.json").write_text(json.dumps({"columns": columns, "units": units}))
    tape_path = tape_dir() / f"plantrig-{folder.name}-{id(folder):x}.tape"
    tape = Tape(tape_path, columns, ring_capacity(rig), units)
    event_tape_path = tape_path.with_suffix(".events")
    event_tape = EventTape(event_tape_path)
    journal = folder / "ticks.journal"
    status = folder / "recorder.json"
    recorder = start_recorder(tape_path, journal, status, event_tape_path,
                              folder / "events.jsonl")
    tape.watch_recorder(recorder.is_alive)
    start_record(folder, rig, columns, units, tape_path, event_tape_path, recorder.pid,
                 rig.mode == "realtime" if realtime is None else realtime)
    run_info = run_info_of(run_info, link, rig.dut)
    add_to_run_start(folder, run_info)
    if on_tapes_ready is not None:
        on_tapes_ready(tape_path, event_tape_path)
    started = _dt.datetime.now(_dt.UTC)
    try:
        engine = Engine(rig, tape, realtime=realtime, link=link,
                        actuator_chain=actuator_chain, sensor_chain=sensor_chain,
                        commands=CommandInbox(commands) if commands is not None else None,
                        event_tape=event_tape, scenario=scenario,
                        on_tick0=lambda unix_ns: note_tick0(folder, unix_ns))
        stopper.attach(engine.request_stop)
        outcome = engine.run()
    finally:
        stopper.finish()
        tape.end()
        event_tape.end()
        recorder.join(timeout=RECORDER_JOIN_S)
        if recorder.exitcode != 0:   # died, or hung: the rig writes what the ring holds
            if recorder.is_alive():
                recorder.kill()
                recorder.join()
            salvage_rows(journal, tape_path, len(columns))
        tape.close(unlink=True)
        event_tape.close(unlink=True)
    if recorder.exitcode != 0:   # events.jsonl from the loop's own complete list
        write_atomic(folder / "events.jsonl", "".join(
            json.dumps(e.record())
            + "\n" for e in outcome.events).encode())
    recorded = count_ticks(folder, len(columns))
    recorder_status = json.loads(status.read_text()) if status.exists() else {}
    status.unlink(missing_ok=True)
    model = summarize(rig.plant, rig.tick, rig.x0, rig.method, rig.substeps)
    summary: dict[str, Any] = {
        "software": {"name": "plantrig", "version": __version__},
        "rig": {"name": rig.name, "file": str(rig.path),
                "sha256": hashlib.sha256(rig.path.read_bytes()).hexdigest(),
                "tick_s": rig.tick, "duration_s": rig.duration},
        "started_utc": started.isoformat(timespec="seconds"),
        "tick0_utc": utc_of(engine.tick0_unix_ns),
        "mode": "realtime" if engine.realtime else "fast",
        "ended": outcome.ended, "reason": outcome.reason,
        "ticks_planned": rig.n_ticks, "ticks_run": outcome.ticks,
        "ticks_recorded": recorded,
        "acceptance": [r.as_dict() for r in outcome.rules],
        "timing": outcome.timing(rig.tick),
        "recorder": recorder_status,
        "link": outcome.link_health,
        "events": _count_kinds(outcome),
        "model": model.as_dict(),
        "columns": columns, "units": units,
        **run_info,
        **(about or {}),
    }
    verdicts_passed = True
    if scenario is not None:
        rows = np.memmap(journal, dtype=np.float64, mode="r", shape=(recorded, len(columns))) \
            if recorded else np.zeros((0, len(columns)))   # read in place, not copied
        verdicts = evaluate(scenario, columns, units, rows, outcome.events, rig.tick)
        del rows
        write_verdicts(folder, verdicts)
        summary["verdicts"] = [v.as_dict() for v in verdicts]
        verdicts_passed = all(v.passed for v in verdicts)
    summary["exit_code"] = outcome.exit_code if outcome.ended != COMPLETED or verdicts_passed \
        else EXIT_VERDICT
    try:
        finish_record(folder, summary, npy=npy)  # summary.json, run.h5, manifest
    except RecordError as exc:
        summary["record"]["problems"].append(str(exc))
    if summary["record"]["problems"] and summary["exit_code"] == EXIT_CODES[COMPLETED]:
        summary["exit_code"] = EXIT_CODES[FAULT]   # the run did its work; its record did not
    return folder, outcome, summary


def _count_kinds(outcome: RunOutcome) -> dict[str, int]:
    counts: dict[str, int] = {}
    for ev in outcome.events:
        counts[ev.kind] = counts.get(ev.kind, 0) + 1
    return counts
