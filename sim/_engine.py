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

Anything the model, the controller or a link raises ends the run through one stop path
that records the error as an event; every row recorded up to then is kept.
"""

from __future__ import annotations

import math
import time
import traceback
from contextlib import AbstractContextManager
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
from numpy.typing import NDArray

from plantrig.sim._chains import build_chains
from plantrig.sim._clock import SPIN_NS, Clock, WallClock
from plantrig.sim._commands import COMMAND_POLL_S, Command, CommandInbox
from plantrig.sim._contracts import ControllerLink, Event, SignalChain
from plantrig.sim._controllers import Controller, OpenLoop, Pid, PidLoops, StateFeedback
from plantrig.sim._faults import Faults
from plantrig.sim._interlocks import ESTOP, Safety
from plantrig.sim._outcome import (
    COMPLETED,
    FAULT,
    STOPPED,
    TRIPPED,
    RuleResult,
    RunFacts,
    judge,
    settle,
)
from plantrig.sim._plant import Stepper, make_stepper
from plantrig.sim._realtime import RealtimeReport, realtime_process
from plantrig.sim._rigfile import Rig
from plantrig.sim._scenario import Scenario, ScenarioRunner
from plantrig.sim._tape import RECORDER_DIED, RECORDER_DISK_FULL, RECORDER_OK, EventTape
from plantrig.sim._timing import FINE_NS, DurationHistogram

Vector = NDArray[np.float64]
START_LEAD_NS = 5_000_000
META_COLUMNS = ("seq", "t", "lateness", "exec_time", "fresh")


class TapeLike(Protocol):
    def append(self, row: Vector) -> None: ...
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
    s = spec.settings
    inputs = [i.name for i in rig.inputs]
    outputs = [o.name for o in rig.outputs]
    refs = [r.name for r in rig.references]
    if spec.kind == "pid":
        loops = []
        for ls in s["loops"]:
            drive = inputs.index(ls["drive"])
            lo = ls["drive_low"] if ls["drive_low"] is not None else rig.inputs[drive].min
            hi = ls["drive_high"] if ls["drive_high"] is not None else rig.inputs[drive].max
            loops.append(Pid(measure=outputs.index(ls["measure"]), drive=drive,
                             reference=refs.index(ls["reference"]), kp=ls["kp"], ki=ls["ki"],
                             kd=ls["kd"], dt=rig.tick, derivative_lag=ls["derivative_lag"],
                             drive_low=lo, drive_high=hi, windup=ls["windup"],
                             unwind_time=ls["unwind_time"]))
        return loops[0] if len(loops) == 1 else PidLoops(loops)  # one call less per tick
    if spec.kind == "state_feedback":
        order = [refs.index(r) for r in s["references"]]
        n_matrix = np.zeros((len(inputs), len(refs)))
        n_matrix[:, order] = s["N"]
        return StateFeedback(s["K"], n_matrix, np.array([i.min for i in rig.inputs]),
                             np.array([i.max for i in rig.inputs]))
    if spec.kind == "open_loop":
        return OpenLoop([(inputs.index(i), refs.index(r)) for i, r in s["drive"].items()])
    return None


@dataclass
class RunOutcome:
    """How a run ended and what its timing was."""

    ticks: int
    ended: str                     # an outcome class of sim/_outcome.py
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

    @property
    def exit_code(self) -> int:
        """The exit code of the outcome class (sim/_outcome.py)."""
        from plantrig.sim._outcome import EXIT_CODES
        return EXIT_CODES[self.ended]

    def timing(self, tick: float) -> dict[str, float | int | str | None]:
        """Timing statistics for the summary (lateness only means something in real time;
        quantiles to the histogram's resolution, sim/_timing.py)."""
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
            "cpu": self.realtime.cpu if self.realtime else None,
        }


class Engine:
    """Runs one rig for its duration, in real time or as fast as possible."""

    def __init__(self, rig: Rig, tape: TapeLike, *, realtime: bool | None = None,
                 clock: Clock | None = None, link: ControllerLink | None = None,
                 actuator_chain: SignalChain | None = None,
                 sensor_chain: SignalChain | None = None,
                 commands: CommandInbox | None = None,
                 event_tape: EventTape | None = None,
                 scenario: Scenario | None = None) -> None:
        self.rig = rig
        self.commands = commands
        self.event_tape = event_tape
        self.tape = tape
        self.realtime = rig.mode == "realtime" if realtime is None else realtime
        self.clock = clock or WallClock()
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
        # the link's optional state(tick, state, detail) (sim/_contracts.py), told on changes
        self._tell_link = getattr(link, "state", None)
        self._told: tuple[str, str] | None = None

    def request_stop(self, why: str = "stop requested") -> None:
        """Ask the loop to end at the next tick boundary (from a signal handler, say);
        the first reason given is the one recorded."""
        if not self.stop_requested:
            self.stop_why = why
        self.stop_requested = True

    def _event(self, tick: int, kind: str, detail: str = "", source: str = "") -> None:
        self._record_event(Event(tick, tick * self.rig.tick, kind, detail, source))

    def _record_event(self, event: Event) -> None:
        self.events.append(event)
        if self.event_tape is not None:
            self.event_tape.append(event.tick, event.time, event.kind, event.detail,
                                   event.source)
        self.safety.on_event(event)        # a link loss may trip an interlock
        if self.scenario is not None:
            self.scenario.on_event(event)  # trips and phases may arm scenario steps
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
                self._event(k, "reference_set", f"{name} = {value:g}")
            else:
                self._event(k, "command_refused", f"set_reference {a!r}: unknown name or "
                                                  "non-finite value")
        elif command.kind == "mark_phase":
            self._event(k, "phase", str(a.get("name", "")))
        else:
            self._event(k, "command_refused", f"{command.kind}: not available in this run")

    def run(self) -> RunOutcome:
        """Run every tick; whatever happens, end the tape and return the outcome."""
        rig = self.rig
        n_ticks = rig.n_ticks
        tick_ns = int(round(rig.tick * 1e9))
        lateness, work_time = DurationHistogram(), DurationHistogram()
        overruns = skipped = done = answered = 0
        ended, reason = COMPLETED, "duration reached"
        report: RealtimeReport | None = None
        self.cmd[:] = self.safe_u
        # what the controller sees before tick 0: the output at x0 with the safe input
        self.stepper.u[:] = self.safe_u
        self.stepper.output_only(0.0)
        if self.sensor_chain is not None:
            self.sensor_chain.apply(-1, self.stepper.y, self.sent)
        else:
            self.sent[:] = self.stepper.y
        ref_values = [(i, r.waveform.value) for i, r in enumerate(rig.references)]
        stepper, row, tape, clock = self.stepper, self.row, self.tape, self.clock
        controller, link = self.controller, self.link
        actuator, sensor = self.actuator_chain, self.sensor_chain
        cmd, r, u, sent, y_rec = self.cmd, self.r, stepper.u, self.sent, self.y_rec
        hold_on_silence = rig.on_link_silence == "hold"
        poll_every = max(1, int(round(COMMAND_POLL_S / rig.tick)))
        override = self.ref_override
        safety, faults, scenario = self.safety, self.faults, self.scenario
        demand = np.zeros(len(rig.inputs))     # u before the safe values, for the limits
        streak, streak_trip = 0, rig.safety.overrun_streak
        wall_start = clock.now_ns()
        loop_start = loop_end = 0
        try:
            if link is not None:
                link.open()
                self._link_state(-1, "running")
                # prime: the values before tick 0, so the controller's answer is there at
                # tick 0 as the built-in controller's is (docs/protocol.md, tick stamps)
                link.send(-1, -rig.tick, sent)
            room = tape.free()
            realtime, commands = self.realtime, self.commands
            with _maybe_realtime(realtime, tick_ns) as report:
                start = clock.now_ns() + START_LEAD_NS
                loop_start = start if realtime else clock.now_ns()
                # wall-clock UTC of tick 0: its deadline in real time, the loop start if fast
                self.tick0_unix_ns = time.time_ns() + (START_LEAD_NS if realtime else 0)
                slot = 0
                for k in range(n_ticks):
                    if self.stop_requested:
                        ended, reason = STOPPED, self.stop_why
                        break
                    t = k * rig.tick
                    if realtime:
                        deadline = start + slot * tick_ns
                        clock.sleep_until_ns(deadline)
                        began = clock.now_ns()
                        late = began - deadline
                        lateness.add(late)
                        if late >= tick_ns:
                            overruns += 1
                            streak += 1
                            if streak == streak_trip:
                                safety.cause(k, "overruns", f"{streak} ticks in a row started "
                                                            "late")
                            if rig.on_overrun == "stop":
                                self._event(k, "overrun", f"tick started {late / 1e6:.3f} ms "
                                                          "late; on_overrun = 'stop'")
                                ended, reason = FAULT, "real time not held: a tick " \
                                                       "started late and on_overrun = 'stop'"
                                break
                            if rig.on_overrun == "skip":
                                missed = late // tick_ns
                                slot += missed
                                skipped += missed
                        elif streak:
                            if streak >= streak_trip:
                                safety.clear_cause("overruns")
                            streak = 0
                        slot += 1
                    else:
                        began = 0
                        room -= 1
                        if room < 0:
                            tape.wait_for_room()   # returns early if the recorder stops
                            room = tape.free() - 1
                    if k % poll_every == 0 or room < 0:  # slow checks, every 5 ms of plant time
                        problem = tape.recorder_error()
                        if problem != RECORDER_OK:
                            ended, reason = FAULT, self._recorder_stopped(k, problem)
                            break
                        if commands is not None:
                            for command in commands.take():
                                self._apply_command(k, command)
                    if faults.on and k >= faults.next_end:
                        faults.expire(k)
                    if scenario is not None and k >= scenario.next_tick:
                        for command in scenario.due(k):
                            self._apply_command(k, command)
                    # 1. read link / built-in controller
                    for i, value in ref_values:
                        r[i] = value(t)
                    if self.any_override:
                        np.copyto(r, override, where=~np.isnan(override))
                    if link is not None:
                        fresh = link.receive(k, t, cmd)
                        answered += fresh
                        for ev in link.drain_events():
                            self._record_event(ev)
                    else:
                        controller.compute(  # type: ignore[union-attr]
                            t, faults.delivered if faults.link_out_on else sent, r, cmd)
                        fresh = True
                    if faults.link_in_on:
                        fresh = faults.incoming(k, t, cmd, fresh)
                    if not fresh and not hold_on_silence:
                        cmd[:] = self.safe_u
                    # 2. actuator chain, 3. safety: a non-finite command never reaches the
                    #    plant (u keeps last tick's good value); a latched stop forces the
                    #    safe state
                    if not math.isfinite(cmd.dot(cmd)):  # NaN/inf anywhere (or |v| > 1e154)
                        self._event(k, "non_finite_input",
                                    f"command {cmd.tolist()}; last good input held")
                    elif actuator is not None:
                        actuator.apply(k, cmd, u)
                    else:
                        u[:] = cmd
                    if faults.actuator_on:
                        faults.actuator(k, u)
                    forced = safety.forcing
                    if forced:
                        demand[:] = u
                        safety.force(u)
                    # 4. plant step: y_k and x_{k+1} from (x_k, u_k), both already in the
                    #    record; x moves to x_{k+1} only after the record (commit below)
                    if faults.plant_on:
                        faults.plant(k)
                    stepper.step(t)
                    y_rec[:] = stepper.y
                    if safety.checking:
                        if forced:
                            u[:] = demand          # input limits judge what was asked for
                        if safety.check(k):
                            # tripped in this tick: the same step again, with the safe inputs
                            safety.force(u)
                            stepper.step(t)
                            y_rec[:] = stepper.y
                        elif forced:
                            safety.force(u)
                    # 5. sensor chain, 6. write link
                    if sensor is not None:
                        sensor.apply(k, stepper.y, sent)
                    else:
                        sent[:] = stepper.y
                    if faults.sensor_on:
                        faults.sensor(k, t, sent)
                    if faults.link_out_on:
                        faults.outgoing(k, t, sent, link)
                    elif link is not None:
                        link.send(k, t, sent)
                    # 7. record
                    row[1] = t
                    row[4] = 1.0 if fresh else 0.0
                    if realtime:
                        row[2] = late / 1e9
                        work = clock.now_ns() - began
                        work_time.add(work)
                        row[3] = work / 1e9
                        if tape.free() <= 0:
                            self._event(k, "tape_overflow", "recorder fell a full ring behind")
                            ended, reason = FAULT, "tape overflow: the recorder fell a full " \
                                                   "ring behind"
                            done = k
                            break
                    x_next = stepper.x_next
                    finite = math.isfinite(x_next.dot(x_next))  # a dot is half a sum's cost
                    if not finite:
                        safety.cause(k, "non_finite", f"x = {stepper.x_next.tolist()}")
                    tape.append(row)
                    done = k + 1
                    if not safety.freezing:
                        stepper.commit()
                    if scenario is not None and scenario.watching:
                        scenario.after_record(k, row)
                    if not finite:
                        self._event(k, "non_finite_state", f"x = {stepper.x_next.tolist()}")
                        ended, reason = FAULT, "model error: plant state became NaN or infinite"
                        break
                    if safety.stop_reason:
                        ended, reason = TRIPPED, safety.stop_reason
                        break
        except Exception as exc:  # the one stop path for model, controller and link errors
            self._event(done, "error", "".join(
                traceback.format_exception_only(type(exc), exc)).strip())
            ended, reason = FAULT, f"{type(exc).__name__}: {exc}"
        finally:
            loop_end = clock.now_ns() if loop_start else 0
            health: dict[str, float] = {k: v for k, v in faults.health().items() if v}
            try:
                if link is not None:
                    health.update(link.health())
                    for ev in link.drain_events():
                        self._record_event(ev)
                self.safety.finish(done)
                tape.end()
                problem = tape.wait_drained()   # a record the recorder lost is not complete
                if problem != RECORDER_OK and ended != FAULT:
                    ended, reason = FAULT, self._recorder_stopped(done, problem)
                facts = RunFacts(n_ticks, done, link is not None, answered if link else done,
                                 int(health.get("link_lost", 0)), self.realtime, overruns,
                                 skipped, tuple(self.safety.trips))
                outcome = settle(ended, reason, judge(rig.acceptance, facts,
                                                      self.expected_trips))
                for rule in outcome.rules if ended == COMPLETED else ():  # they decide it
                    if rule.passed is False:
                        self._event(done, "rule_failed", f"{rule.rule}: {rule.measured} "
                                                         f"(needs {rule.needed})")
                ended, reason = outcome.ended, outcome.reason
                if self._told is not None:
                    self._link_state(done, "fault" if ended == FAULT else "ended", ended)
            finally:
                if link is not None:
                    link.close()
            self._event(done, "run_end", f"{ended}: {reason}")
            if self.event_tape is not None:
                self.event_tape.end()
        wall_s = (clock.now_ns() - wall_start) / 1e9
        return RunOutcome(done, ended, reason, self.events, lateness, work_time, overruns,
                          skipped, wall_s, report, health, outcome.rules, answered,
                          max(0, loop_end - loop_start) / 1e9)

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
    return realtime_process(tick_ns, SPIN_NS) if enabled else _NoRealtime()
