"""The tick loop: one fixed step, the same code in real time and as fast as possible.

Order inside tick k, at plant time t_k = k * tick:

    1. read link        the controller's newest command (or the built-in controller's,
                        computed from the values sent at tick k-1 and r(t_k))
    2. actuator chain   command -> plant input u_k (scaling, saturation, rate limit),
                        then actuator faults
    3. safety           non-finite inputs never reach the plant (last good u is held;
                        the check is the squared norm, so |v| > 1e154 counts as
                        non-finite too); tripped interlocks force inputs to safe values
    4. plant step       y_k = h(x_k, u_k), x_{k+1} = F(x_k, u_k) (+ disturbances); then the
                        limits are checked on x, u_k and y_k, and a trip in this tick
                        repeats the step with the safe inputs (safety acts in the tick
                        its cause appears); a frozen plant keeps x_k
    5. sensor chain     y_k -> values for the controller, then sensor faults
    6. write link       (link faults act on both directions at the boundary)
    7. record           one row on the tape: time, timing, r, command, u, y, sent, x_k,
                        disturbances, limit codes, trip latches

Scenario steps and operator commands act at the start of a tick (_scenario.py).

In fast mode, runs of plain ticks (an LTI plant under built-in PID loops, limits inside
their warn bands, and nothing active that needs Python every tick: see _stretch.py) go
to C in one call each, with the same record bit for bit; every other tick, and every
tick in real time, runs the stages above in Python.

Anything the model, the controller or a link raises ends the run through one stop path
that records the error as an event; every row recorded up to then is kept.
"""

from __future__ import annotations

import math
import time
import traceback
from collections.abc import Callable
from contextlib import AbstractContextManager
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.config._rigfile import Rig
from plantrig.sim.engine._chains import build_chains
from plantrig.sim.engine._clock import Clock, WallClock
from plantrig.sim.engine._commands import COMMAND_POLL_S, Command, CommandInbox
from plantrig.sim.engine._contracts import ControllerLink, Event, SignalChain
from plantrig.sim.engine._outcome import (
    COMPLETED,
    FAULT,
    STOPPED,
    TRIPPED,
    RuleResult,
    RunFacts,
    judge,
    settle,
)
from plantrig.sim.engine._realtime import RealtimeReport, realtime_process
from plantrig.sim.engine._stretch import Stretch
from plantrig.sim.engine._timing import FINE_NS, DurationHistogram
from plantrig.sim.faults._faults import Faults
from plantrig.sim.model._controllers import Controller, OpenLoop, Pid, PidLoops, StateFeedback
from plantrig.sim.model._plant import Stepper, make_stepper
from plantrig.sim.records._tape import RECORDER_DIED, RECORDER_DISK_FULL, RECORDER_OK, EventTape
from plantrig.sim.safety._interlocks import ESTOP, Safety
from plantrig.sim.scenario._scenario import Scenario, ScenarioRunner

Vector = NDArray[np.float64]
START_LEAD_NS = 5_000_000
QUIET_POLL_TICKS = 1024
META_COLUMNS = ("seq", "t", "lateness", "exec_time", "fresh")


class TapeLike(Protocol):
    recorded_elsewhere: bool   # another process records it and may stop mid-run

    def append(self, row: Vector) -> None: ...
    def append_rows(self, block: Vector) -> None: ...
    def free(self) -> int: ...
    def wait_for_room(self, timeout_s: float = 30.0) -> None: ...
    def recorder_error(self) -> int: ...
    def wait_drained(self, timeout_s: float = 30.0) -> int: ...
    def end(self) -> None: ...


def tick_columns(rig: Rig) -> tuple[list[str], list[str]]:
    """Column names and units of one tick record for ``rig``."""
    names = list(META_COLUMNS)
    units = ["", "s", "s", "s", ""]
    for prefix, signals in (("ref", rig.references), ("cmd", rig.inputs),
                            ("sent", rig.outputs), ("y", rig.outputs), ("x", rig.states),
                            ("u", rig.inputs)):
        for s in signals:
            names.append(f"{prefix}:{s.name}")
            units.append(s.unit)
    names += [f"d:{d.name}" for d in rig.disturbances]
    units += [d.unit for d in rig.disturbances]
    names += [f"limit:{lim.name}" for lim in rig.limits]       # 0 ok, 1 warn, 2 trip
    names += [f"trip:{name}" for name in (ESTOP, *(i.name for i in rig.interlocks))]
    units += [""] * (len(rig.limits) + 1 + len(rig.interlocks))
    return names, units


def build_controller(rig: Rig) -> Controller | None:
    """The built-in controller the rig file asks for (None for an external one)."""
    spec = rig.controller
    inputs = [i.name for i in rig.inputs]
    outputs = [o.name for o in rig.outputs]
    refs = [r.name for r in rig.references]
    if spec.kind == "pid":
        loops = []
        for loop in spec.loops:
            drive = inputs.index(loop.drive)
            lo = loop.drive_low if loop.drive_low is not None else rig.inputs[drive].min
            hi = loop.drive_high if loop.drive_high is not None else rig.inputs[drive].max
            loops.append(Pid(measure=outputs.index(loop.measure), drive=drive,
                             reference=refs.index(loop.reference), kp=loop.kp, ki=loop.ki,
                             kd=loop.kd, dt=rig.tick, derivative_lag=loop.derivative_lag,
                             drive_low=lo, drive_high=hi, windup=loop.windup,
                             unwind_time=loop.unwind_time))
        return loops[0] if len(loops) == 1 else PidLoops(loops)  # one call less per tick
    if spec.kind == "state_feedback" and spec.K is not None and spec.N is not None:
        order = [refs.index(r) for r in spec.references]
        n_matrix = np.zeros((len(inputs), len(refs)))
        n_matrix[:, order] = spec.N
        return StateFeedback(spec.K, n_matrix, np.array([i.min for i in rig.inputs]),
                             np.array([i.max for i in rig.inputs]))
    if spec.kind == "open_loop":
        return OpenLoop([(inputs.index(i), refs.index(r)) for i, r in spec.drive.items()])
    return None


@dataclass
class RunOutcome:
    """How a run ended and what its timing was."""

    ticks: int
    ended: str                     # an outcome class of sim/engine/_outcome.py
    reason: str
    events: list[Event]
    lateness: DurationHistogram   # real time only; every tick's value is in the record
    work: DurationHistogram
    overruns: int
    skipped_slots: int
    wall_s: float                  # the whole run: set-up, ticks and closing
    realtime: RealtimeReport | None = None
    link_health: dict[str, float] = field(default_factory=dict)
    rules: list[RuleResult] = field(default_factory=list)
    answered: int = 0
    loop_s: float = 0.0            # from tick 0's start to the end of the last tick
    ticks_in_c: int = 0            # plain ticks run in C (_stretch.py), same record

    @property
    def exit_code(self) -> int:
        """The exit code of the outcome class (sim/engine/_outcome.py)."""
        from plantrig.sim.engine._outcome import EXIT_CODES
        return EXIT_CODES[self.ended]

    def timing(self, tick: float) -> dict[str, float | int | str | None]:
        """Timing statistics for the summary (lateness only means something in real time;
        quantiles to the histogram's resolution, sim/engine/_timing.py)."""
        late, work = self.lateness, self.work
        return {
            "ticks": self.ticks,
            "wall_s": self.wall_s, "loop_s": self.loop_s,
            "ticks_per_s": self.ticks / self.loop_s if self.loop_s > 0 else 0.0,
            "lateness_p50_s": late.quantile_s(50), "lateness_p99_s": late.quantile_s(99),
            "lateness_max_s": late.max_s,
            "exec_p50_s": work.quantile_s(50), "exec_p99_s": work.quantile_s(99),
            "exec_max_s": work.max_s,
            "timing_resolution_s": FINE_NS / 1e9,
            "overruns": self.overruns, "skipped_slots": self.skipped_slots,
            "scheduler": self.realtime.scheduler if self.realtime else None,
            "spin_window_s": self.realtime.spin_ns / 1e9 if self.realtime else None,
            "cpu": self.realtime.cpu if self.realtime else None,
            "ticks_in_c": self.ticks_in_c,
        }


class _RunEnds(Exception):
    """A stage ends the run: the outcome class (sim/engine/_outcome.py) and the reason."""

    def __init__(self, ended: str, reason: str) -> None:
        super().__init__(reason)
        self.ended, self.reason = ended, reason


class Engine:
    """Runs one rig for its duration, in real time or as fast as possible.

    run() primes the link, then each tick paces (real time or tape room) and runs the
    stages in the order of this module's docstring, one method each.
    """

    def __init__(self, rig: Rig, tape: TapeLike, *, realtime: bool | None = None,
                 clock: Clock | None = None, link: ControllerLink | None = None,
                 actuator_chain: SignalChain | None = None,
                 sensor_chain: SignalChain | None = None,
                 commands: CommandInbox | None = None,
                 event_tape: EventTape | None = None,
                 scenario: Scenario | None = None,
                 on_tick0: Callable[[int], None] | None = None,
                 stretches: bool = True) -> None:
        self.rig = rig
        self.on_tick0 = on_tick0    # told tick 0's UTC time (ns) as the loop starts
        self.commands = commands
        self.event_tape = event_tape
        self.tape = tape
        self.realtime = rig.mode == "realtime" if realtime is None else realtime
        self.clock = clock or WallClock()
        self._own_clock = clock is None     # its spin window is measured at the start
        self.link = link
        self.controller = build_controller(rig)
        if self.controller is None and link is None:
            raise ValueError(f"{rig.path}: controller.kind 'external' needs a link")
        if actuator_chain is None or sensor_chain is None:   # as the rig file says
            from_rig = build_chains(rig)
            actuator_chain = actuator_chain or from_rig[0]
            sensor_chain = sensor_chain or from_rig[1]
        self.actuator_chain = actuator_chain
        self.sensor_chain = sensor_chain
        self.columns, self.units = tick_columns(rig)
        self.row = np.zeros(len(self.columns))
        nr, m, p, n = len(rig.references), len(rig.inputs), len(rig.outputs), len(rig.states)
        cuts = np.cumsum([len(META_COLUMNS), nr, m, p, p, n, m])
        self.r = self.row[cuts[0]:cuts[1]]
        self.cmd = self.row[cuts[1]:cuts[2]]
        self.sent = self.row[cuts[2]:cuts[3]]
        self.y_rec = self.row[cuts[3]:cuts[4]]
        # x_k and u_k live in the record itself: the stepper works on that view
        self.stepper: Stepper = make_stepper(rig.plant, rig.tick, rig.x0, rig.method,
                                             rig.substeps, xu=self.row[cuts[4]:cuts[6]],
                                             disturbances=rig.disturbances)
        self.safe_u = np.array([i.safe for i in rig.inputs], dtype=np.float64)
        self.events: list[Event] = []
        self.stop_requested = False
        self.tick0_unix_ns: int | None = None   # set when the loop starts (run())
        self.stop_why = ""
        self.expected_trips = scenario.expected_trips if scenario else set()
        self.safety = Safety(rig.interlocks, rig.limits, rig.safety,
                             [i.name for i in rig.inputs], self.safe_u, self.columns, self.row,
                             rig.tick, self._event)
        self.faults = Faults(rig, self.stepper, self.columns, self.row, self._event,
                             has_link=link is not None)
        self.scenario = ScenarioRunner(scenario, self.columns, rig.tick, self._event) \
            if scenario else None
        self.ref_override = np.full(nr, np.nan)
        self.any_override = False
        self.ref_names = [r.name for r in rig.references]
        # the link's optional state(tick, state, detail) (sim/engine/_contracts.py), told on changes
        self._tell_link = getattr(link, "state", None)
        self._told: tuple[str, str] | None = None
        # what the stages read each tick, fixed for the run
        self.tick_ns = int(round(rig.tick * 1e9))
        self.ref_values = [(i, r.waveform.value) for i, r in enumerate(rig.references)]
        self.hold_on_silence = rig.on_link_silence == "hold"
        # ticks between looks at the command inbox and the recorder's health; a run with
        # neither (the Python API's in-memory runs) has nothing to look at, and only its
        # plain ticks' stretches in C are cut there (their scratch is sized by it)
        self.poll_every = max(1, int(round(COMMAND_POLL_S / rig.tick))) \
            if commands is not None or tape.recorded_elsewhere else QUIET_POLL_TICKS
        self.demand = np.zeros(m)           # u before the safe values, for the limits
        # what the run counts, and the pacing's state
        self.lateness, self.work_time = DurationHistogram(), DurationHistogram()
        self.overruns = self.skipped = self.done = self.answered = 0
        self.orders_due = 0                 # the next tick _take_orders has work at
        self.loop_start = 0
        self._start = self._slot = self._streak = self._began = self._late = 0
        # plain ticks in C where this run can have them (_stretch.py); ``stretches``
        # False keeps every tick in Python (the bit-for-bit tests and the bench's peer)
        self.stretch = Stretch.for_engine(self, [int(c) for c in cuts[:5]]) \
            if stretches else None

    def request_stop(self, why: str = "stop requested") -> None:
        """Ask the loop to end at the next tick boundary (from a signal handler, say);
        the first reason given is the one recorded."""
        if not self.stop_requested:
            self.stop_why = why
        self.stop_requested = True

    def _event(self, tick: int, kind: str, detail: str = "", source: str = "", *,
               name: str = "", window: str = "") -> None:
        self._record_event(Event(tick, tick * self.rig.tick, kind, detail, source, name,
                                 window))

    def _record_event(self, event: Event) -> None:
        self.events.append(event)
        if self.event_tape is not None:
            self.event_tape.append(event.tick, event.time, event.kind, event.detail,
                                   event.source, event.name, event.window)
        self.safety.on_event(event)        # a link loss may trip an interlock
        if self.scenario is not None:
            self.scenario.on_event(event)  # trips and phases may arm scenario steps
            self._scenario_moved()
        if event.kind in ("trip", "estop", "reset") and self._told is not None:
            latched = [s.name for s, on in zip(self.safety.specs, self.safety.latched,
                                               strict=True) if on]
            self._link_state(event.tick, "tripped" if latched else "running",
                             latched[0] if latched else "")

    def _link_state(self, k: int, state: str, detail: str = "") -> None:
        """Tell the link the rig's run state when it changed."""
        if self._tell_link is not None and (state, detail) != self._told:
            self._told = (state, detail)
            self._tell_link(k, state, detail)

    def _apply_command(self, k: int, command: Command) -> None:
        """Act on one operator command; every command becomes an event."""
        a = command.args
        if command.kind == "stop":
            why = str(a.get("reason", ""))
            self.request_stop(f"operator stop: {why}" if why else "operator stop")
            self._event(k, "operator_stop", why)
        elif command.kind == "estop":
            self.safety.estop(k)
        elif command.kind == "reset":
            self.safety.reset(k, a.get("interlock"), by=str(a.get("source") or "operator"))
        elif command.kind == "inject_fault":
            self.faults.inject(k, a)
        elif command.kind == "clear_fault":
            self.faults.clear(k, a)
        elif command.kind == "set_reference":
            name = a.get("name")
            try:
                value = float(a.get("value"))  # type: ignore[arg-type]
            except (TypeError, ValueError):
                value = math.nan
            if name in self.ref_names and math.isfinite(value):
                self.ref_override[self.ref_names.index(name)] = value
                self.any_override = True
                self._event(k, "reference_set", f"{name} = {value:g}", name=name)
            else:
                self._event(k, "command_refused", f"set_reference {a!r}: unknown name or "
                                                  "non-finite value", name=command.kind)
        elif command.kind == "mark_phase":
            phase = str(a.get("name", ""))
            self._event(k, "phase", phase, name=phase)
        else:
            self._event(k, "command_refused", f"{command.kind}: not available in this run",
                        name=command.kind)

    def run(self) -> RunOutcome:
        """Run every tick; whatever happens, end the tape and return the outcome.

        A stage that ends the run raises _RunEnds with the outcome class and reason;
        an error from the model, controller or link ends it as a fault. Both are caught
        here, in the one place that closes the run.
        """
        wall_start = self.clock.now_ns()
        ended, reason = COMPLETED, "duration reached"
        report: RealtimeReport | None = None
        try:
            if self.link is not None:   # first: a link's worker process must not inherit
                self.link.open()        # the loop's real-time core and scheduling
            with _maybe_realtime(self.realtime, self.tick_ns) as report:
                if report is not None and self._own_clock:
                    self.clock.spin_ns = report.spin_ns   # type: ignore[attr-defined]
                self._prime()           # after the real-time set-up: right before tick 0
                self._ticks()
        except _RunEnds as end:
            ended, reason = end.ended, end.reason
        except (Exception, SystemExit) as exc:  # the one stop path for model,
            # controller and link errors (a model module calling exit() among them)
            self._event(self.done, "error", "".join(
                traceback.format_exception_only(type(exc), exc)).strip())
            ended, reason = FAULT, f"{type(exc).__name__}: {exc}"
        finally:
            loop_end = self.clock.now_ns() if self.loop_start else 0
            ended, reason, rules, health = self._close(ended, reason)
        wall_s = (self.clock.now_ns() - wall_start) / 1e9
        return RunOutcome(self.done, ended, reason, self.events, self.lateness,
                          self.work_time, self.overruns, self.skipped, wall_s, report,
                          health, rules, self.answered,
                          max(0, loop_end - self.loop_start) / 1e9,
                          self.stretch.ticks if self.stretch is not None else 0)

    # -- before tick 0 and the loop ------------------------------------------------------

    def _prime(self) -> None:
        """What the controller sees before tick 0: the output at x0 with the safe input,
        sent with the rig's "running" state, so its answer is there at tick 0 as the
        built-in controller's is (docs/protocol.md, tick stamps). Sent after the
        real-time set-up (which can take a second or more to lock a large process's
        memory), so the controller never waits through it between the two."""
        self.cmd[:] = self.safe_u
        self.stepper.u[:] = self.safe_u
        self.stepper.output_only(0.0)
        if self.sensor_chain is not None:
            self.sensor_chain.apply(-1, self.stepper.y, self.sent)
        else:
            self.sent[:] = self.stepper.y
        if self.link is not None:
            self._link_state(-1, "running")
            self.link.send(-1, -self.rig.tick, self.sent)

    def _ticks(self) -> None:
        """The tick loop: pacing, then the stages of one tick in their fixed order."""
        clock, tick = self.clock, self.rig.tick
        pace = self._wait_for_deadline if self.realtime else self._wait_for_tape_room
        # the stages as local names: this loop runs up to tens of kHz
        take_orders, controller_command = self._take_orders, self._controller_command
        plant_input, plant_step = self._plant_input, self._plant_step
        sense_and_send, record = self._sense_and_send, self._record
        self._start = clock.now_ns() + START_LEAD_NS
        self.loop_start = self._start if self.realtime else clock.now_ns()
        # wall-clock UTC of tick 0: its deadline in real time, the loop start if fast
        self.tick0_unix_ns = time.time_ns() + (START_LEAD_NS if self.realtime else 0)
        if self.on_tick0 is not None:       # in the lead before tick 0's deadline
            self.on_tick0(self.tick0_unix_ns)
        stretch, n_ticks = self.stretch, self.rig.n_ticks
        paced_until = k = 0
        while k < n_ticks:
            if self.stop_requested:
                raise _RunEnds(STOPPED, self.stop_why)
            if k >= paced_until:
                paced_until = pace(k)
            if k >= self.orders_due:
                take_orders(k)
            if stretch is not None and stretch.ready():
                end = min(paced_until, self.orders_due, n_ticks)
                k = stretch.run(k, end)
                if k == end:
                    continue
            t = k * tick
            fresh = controller_command(k, t)
            forced = plant_input(k)
            plant_step(k, t, forced)
            sense_and_send(k, t)
            record(k, t, fresh)
            k += 1

    # -- pacing: real time or as fast as the recorder keeps up ---------------------------

    def _wait_for_deadline(self, k: int) -> int:
        """Real time: sleep to tick k's slot; count lateness, overruns and skipped slots.
        A streak of late ticks is a safety cause; on_overrun = 'stop' ends the run.
        The next tick to pace: the next one."""
        clock, tick_ns = self.clock, self.tick_ns
        deadline = self._start + self._slot * tick_ns
        clock.sleep_until_ns(deadline)
        self._began = began = clock.now_ns()
        self._late = late = began - deadline
        self.lateness.add(late)
        if late >= tick_ns:
            self.overruns += 1
            self._streak += 1
            rig = self.rig
            if self._streak == rig.safety.overrun_streak:
                self.safety.cause(k, "overruns", f"{self._streak} ticks in a row started late")
            if rig.on_overrun == "stop":
                self._event(k, "overrun", f"tick started {late / 1e6:.3f} ms late; "
                                          "on_overrun = 'stop'")
                raise _RunEnds(FAULT, "real time not held: a tick started late and "
                                      "on_overrun = 'stop'")
            if rig.on_overrun == "skip":
                missed = late // tick_ns
                self._slot += missed
                self.skipped += missed
        elif self._streak:
            if self._streak >= self.rig.safety.overrun_streak:
                self.safety.clear_cause("overruns")
            self._streak = 0
        self._slot += 1
        return k + 1

    def _wait_for_tape_room(self, k: int) -> int:
        """Fast mode: never outrun the recorder. The next tick to pace: the first that
        would not fit in the room the tape has now (waited for when there is none)."""
        room = self.tape.free()
        if room <= 0:
            self.tape.wait_for_room()   # returns early if the recorder stops
            problem = self.tape.recorder_error()
            if problem != RECORDER_OK:
                raise _RunEnds(FAULT, self._recorder_stopped(k, problem))
            room = self.tape.free()
        return k + max(room, 1)

    # -- the stages of tick k --------------------------------------------------------------

    def _take_orders(self, k: int) -> None:
        """Operator commands (and the recorder's health) every few ms of plant time,
        fault expiry, and the scenario steps due at tick k; then the next tick any of
        them is due (``orders_due``; a trip or a watched condition may bring a scenario
        step forward, see _scenario_moved)."""
        if k % self.poll_every == 0:
            problem = self.tape.recorder_error()
            if problem != RECORDER_OK:
                raise _RunEnds(FAULT, self._recorder_stopped(k, problem))
            if self.commands is not None:
                for command in self.commands.take():
                    self._apply_command(k, command)
        faults = self.faults
        if faults.on and k >= faults.next_end:
            faults.expire(k)
        scenario = self.scenario
        if scenario is not None and k >= scenario.next_tick:
            for command in scenario.due(k):
                self._apply_command(k, command)
        due = (k // self.poll_every + 1) * self.poll_every
        if faults.on and faults.next_end < math.inf:
            due = min(due, math.ceil(faults.next_end))
        self.orders_due = min(due, scenario.next_tick) if scenario is not None else due

    def _scenario_moved(self) -> None:
        """A scenario step was armed mid-tick: take orders when it falls due."""
        self.orders_due = min(self.orders_due, self.scenario.next_tick)  # type: ignore[union-attr]

    def _controller_command(self, k: int, t: float) -> bool:
        """1. The references r(t_k), then the command: the link's newest (after link
        faults) or the built-in controller's. Whether it is fresh."""
        r, cmd, faults, link = self.r, self.cmd, self.faults, self.link
        for i, value in self.ref_values:
            r[i] = value(t)
        if self.any_override:
            np.copyto(r, self.ref_override, where=~np.isnan(self.ref_override))
        if link is not None:
            fresh = link.receive(k, t, cmd)
            self.answered += fresh
            for ev in link.drain_events():
                self._record_event(ev)
        else:
            self.controller.compute(  # type: ignore[union-attr]
                t, faults.delivered if faults.link_out_on else self.sent, r, cmd)
            fresh = True
        if faults.link_in_on:
            fresh = faults.incoming(k, t, cmd, fresh)
        if not fresh and not self.hold_on_silence:
            cmd[...] = self.safe_u
        return fresh

    def _plant_input(self, k: int) -> bool:
        """2. Actuator chain and faults, 3. safety: a non-finite command never reaches
        the plant (u keeps last tick's good value); a latched stop forces the safe
        inputs. Whether they were forced (the demanded u is kept for the limits)."""
        cmd, u = self.cmd, self.stepper.u
        if not math.isfinite(cmd.dot(cmd)):  # NaN/inf anywhere (or |v| > 1e154)
            self._event(k, "non_finite_input", f"command {cmd.tolist()}; last good input held")
        elif self.actuator_chain is not None:
            self.actuator_chain.apply(k, cmd, u)
        else:
            u[...] = cmd
        if self.faults.actuator_on:
            self.faults.actuator(k, u)
        forced = self.safety.forcing
        if forced:
            self.demand[...] = u
            self.safety.force(u)
        return forced

    def _plant_step(self, k: int, t: float, forced: bool) -> None:
        """4. y_k and x_{k+1} from (x_k, u_k), both already in the record; x moves to
        x_{k+1} only after the record. The limits judge the demanded input; a trip in
        this tick steps again with the safe inputs, so safety acts in its cause's tick."""
        stepper, safety = self.stepper, self.safety
        if self.faults.plant_on:
            self.faults.plant(k)
        stepper.step(t)
        self.y_rec[...] = stepper.y
        if safety.checking:
            u = stepper.u
            if forced:
                u[...] = self.demand
            if safety.check(k):
                safety.force(u)
                stepper.step(t)
                self.y_rec[...] = stepper.y
            elif forced:
                safety.force(u)

    def _sense_and_send(self, k: int, t: float) -> None:
        """5. Sensor chain and faults, 6. the values to the link (through link faults)."""
        sent, faults = self.sent, self.faults
        if self.sensor_chain is not None:
            self.sensor_chain.apply(k, self.stepper.y, sent)
        else:
            sent[...] = self.stepper.y
        if faults.sensor_on:
            faults.sensor(k, t, sent)
        if faults.link_out_on:
            faults.outgoing(k, t, sent, self.link)
        elif self.link is not None:
            self.link.send(k, t, sent)

    def _record(self, k: int, t: float, fresh: bool) -> None:
        """7. One row on the tape, then x moves on (unless frozen). A non-finite state,
        a trip that stops, or a tape the recorder fell behind on ends the run here."""
        row, stepper, safety = self.row, self.stepper, self.safety
        row[1] = t
        row[4] = 1.0 if fresh else 0.0
        if self.realtime:
            row[2] = self._late / 1e9
            work = self.clock.now_ns() - self._began
            self.work_time.add(work)
            row[3] = work / 1e9
            if self.tape.free() <= 0:
                self._event(k, "tape_overflow", "recorder fell a full ring behind")
                raise _RunEnds(FAULT, "tape overflow: the recorder fell a full ring behind")
        x_next = stepper.x_next
        finite = math.isfinite(x_next.dot(x_next))  # a dot is half a sum's cost
        if not finite:
            safety.cause(k, "non_finite", f"x = {x_next.tolist()}")
        self.tape.append(row)
        self.done = k + 1
        if not safety.freezing:
            stepper.commit()
        if self.scenario is not None and self.scenario.watching:
            self.scenario.after_record(k, row)
            self._scenario_moved()
        if not finite:
            self._event(k, "non_finite_state", f"x = {stepper.x_next.tolist()}")
            raise _RunEnds(FAULT, "model error: plant state became NaN or infinite")
        if safety.stop_reason:
            raise _RunEnds(TRIPPED, safety.stop_reason)

    # -- after the last tick ---------------------------------------------------------------

    def _close(self, ended: str, reason: str) -> tuple[str, str, list[RuleResult],
                                                        dict[str, float]]:
        """Drain and close the link, end the tape, judge the acceptance rules; the
        outcome class and reason they settle, the rules, and the link's health."""
        link, done = self.link, self.done
        health: dict[str, float] = {k: v for k, v in self.faults.health().items() if v}
        try:
            if link is not None:
                health.update(link.health())
                for ev in link.drain_events():
                    self._record_event(ev)
            self.safety.finish(done)
            self.tape.end()
            problem = self.tape.wait_drained()   # a record the recorder lost is incomplete
            if problem != RECORDER_OK and ended != FAULT:
                ended, reason = FAULT, self._recorder_stopped(done, problem)
            facts = RunFacts(self.rig.n_ticks, done, link is not None,
                             self.answered if link else done, int(health.get("link_lost", 0)),
                             self.realtime, self.overruns, self.skipped,
                             tuple(self.safety.trips), int(health.get("rehearsed_losses", 0)),
                             sum(e.kind == "non_finite_input" for e in self.events))
            outcome = settle(ended, reason, judge(self.rig.acceptance, facts,
                                                  self.expected_trips))
            for rule in outcome.rules if ended == COMPLETED else ():  # they decide it
                if rule.passed is False:
                    self._event(done, "rule_failed", f"{rule.rule}: {rule.measured} "
                                                     f"(needs {rule.needed})", name=rule.rule)
            ended, reason = outcome.ended, outcome.reason
            if self._told is not None:
                self._link_state(done, "fault" if ended == FAULT else "ended", ended)
        finally:
            if link is not None:
                link.close()
        self._event(done, "run_end", f"{ended}: {reason}")
        if self.event_tape is not None:
            self.event_tape.end()
        return ended, reason, outcome.rules, health

    def _recorder_stopped(self, k: int, problem: int) -> str:
        """Record why the recorder stopped; the reason the run ends with."""
        if problem == RECORDER_DIED:
            self._event(k, "recorder_died", "the recorder process ended during the run; "
                                            "run stopped, the rig writes the rest itself")
            return "run record: the recorder process died"
        what = "disk full" if problem == RECORDER_DISK_FULL else "write error"
        self._event(k, "record_failed", f"the recorder cannot write the run record ({what}); "
                                        "run stopped")
        return f"run record cannot be written ({what})"


class _NoRealtime:
    def __enter__(self) -> None:
        return None

    def __exit__(self, *exc: object) -> None:
        return None


def _maybe_realtime(enabled: bool,
                    tick_ns: int) -> AbstractContextManager[RealtimeReport | None]:
    return realtime_process(tick_ns) if enabled else _NoRealtime()
