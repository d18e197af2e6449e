"""Limits and interlocks: a trip in the very tick a limit is crossed, latching, the reset
rules, the E-stop, the other causes, the actions, and rig-file mistakes.

The plant is a first-order lag x' = -2 x + 2 u, y = x, sampled with exact ZOH:
x_{k+1} = a x_k + (1 - a) u_k with a = exp(-2 dt) (Franklin, Powell & Workman, Digital
Control of Dynamic Systems, 3rd ed., section 4.3.3), driven open loop so u is known.
"""

from __future__ import annotations

import dataclasses
import math
import queue
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from plantrig.sim import (
    Command,
    CommandInbox,
    Engine,
    MemoryTape,
    RigFileError,
    VirtualClock,
    build_rig,
    simulate,
    tick_columns,
)

DT = 0.01
A = math.exp(-2 * DT)


def lag_rig(tmp_path: Path, *, limits: list | None = None, interlocks: list | None = None,
            reference: dict | None = None, duration: float = 2.0, extra: dict | None = None,
            inputs: list | None = None, mode: str = "fast") -> Any:
    doc: dict[str, Any] = {
        "rig": {"name": "lag", "tick": DT, "duration": duration, "mode": mode},
        "plant": {"kind": "lti", "A": [[-2.0]], "B": [[2.0] * len(inputs or [0])],
                  "C": [[1.0]], "states": [{"name": "x"}],
                  "inputs": inputs or [{"name": "u", "safe": -0.25}],
                  "outputs": [{"name": "y"}]},
        "references": [reference or {"name": "r", "kind": "ramp", "rate": 1.0}],
        "controller": {"kind": "open_loop", "drive": {"u": "r"}},
        "limits": limits or [], "interlocks": interlocks or [],
    }
    doc.update(extra or {})
    return build_rig(doc, tmp_path / "lag.toml")


def kinds(data: Any) -> list[str]:
    return [e.kind for e in data.outcome.events]


class AtTicks:
    """A command queue whose commands appear at given ticks (stands in for an operator)."""

    def __init__(self, tape: MemoryTape, script: dict[int, Command]) -> None:
        self.tape, self.script = tape, dict(script)

    def get_nowait(self) -> Command:
        k = self.tape.written
        if k in self.script:
            return self.script.pop(k)
        raise queue.Empty


def run_with(rig: Any, script: dict[int, Command], **kw: Any) -> tuple[Any, Any, list[str]]:
    cols = tick_columns(rig)[0]
    tape = MemoryTape(cols, rig.n_ticks)
    engine = Engine(rig, tape, commands=CommandInbox(AtTicks(tape, script)), **kw)
    return engine.run(), tape.rows, cols


def test_trip_in_the_tick_an_input_limit_is_crossed(tmp_path: Path) -> None:
    # u_k = r(t_k) = t_k; trip_high 0.5 is first exceeded at the tick with t > 0.5
    rig = lag_rig(tmp_path, limits=[{"name": "u_high", "signal": "u", "warn_high": 0.3,
                                     "trip_high": 0.5}],
                  interlocks=[{"name": "guard", "on": ["limit:u_high"]}])
    data = simulate(rig)
    t, u, trip = data.t, data["u:u"], data["trip:guard"]
    k = int(np.flatnonzero(t > 0.5 + 1e-12)[0])
    assert trip[k - 1] == 0 and np.all(trip[k:] == 1)             # latched from tick k
    assert u[k - 1] == pytest.approx(t[k - 1]) and np.all(u[k:] == -0.25)   # safe value
    assert data["limit:u_high"][k] == 2
    warn = int(np.flatnonzero(t > 0.3 + 1e-12)[0])
    assert data["limit:u_high"][warn - 1] == 0 and data["limit:u_high"][warn] == 1
    trip_event = next(e for e in data.outcome.events if e.kind == "trip")
    assert trip_event.tick == k and trip_event.time == pytest.approx(k * DT)
    assert trip_event.detail.startswith("guard: limit u_high: u:u = ")
    # in words, the bound's key in brackets to find it in the rig file
    assert "above its trip limit 0.5 (trip_high); inputs to safe values" in trip_event.detail
    warned = next(e for e in data.outcome.events if e.kind == "limit_warn")
    assert warned.detail.endswith("above its warning limit 0.3 (warn_high)")


def test_trip_in_the_tick_an_output_limit_is_crossed_and_the_step_is_repeated(
        tmp_path: Path) -> None:
    rig = lag_rig(tmp_path, limits=[{"signal": "y", "trip_high": 0.4}],
                  interlocks=[{"name": "guard", "on": ["limit:y"]}])
    data = simulate(rig)
    free = simulate(lag_rig(tmp_path, limits=[{"signal": "y", "warn_high": 0.4}]))
    # without the interlock the same run is identical up to the first y above 0.4
    k = int(np.flatnonzero(free["y:y"] > 0.4)[0])
    assert data["trip:guard"][k - 1] == 0 and data["trip:guard"][k] == 1
    np.testing.assert_array_equal(data["y:y"][:k + 1], free["y:y"][:k + 1])
    # tick k's step ran with the safe input: x_{k+1} = a x_k + (1 - a) u_safe
    x_k = free["y:y"][k]
    assert data["u:u"][k] == -0.25
    assert data["y:y"][k + 1] == pytest.approx(A * x_k + (1 - A) * -0.25, rel=1e-12)


def test_state_limit_and_rate_limit(tmp_path: Path) -> None:
    # r steps from 0 to 1 at 1 s: u jumps by 1 in one tick, a rate of 1 / DT = 100 /s
    step = {"name": "r", "kind": "step", "at": 1.0, "to": 1.0}
    rig = lag_rig(tmp_path, reference=step, limits=[
        {"name": "u_rate", "signal": "u:u", "rate_warn": 10.0, "rate_trip": 50.0},
        {"name": "x_low", "signal": "x:x", "trip_low": -0.1}],
        interlocks=[{"name": "slew", "on": ["limit:u_rate"]},
                    {"name": "low", "on": ["limit:x_low"]}])
    data = simulate(rig)
    k = int(np.flatnonzero(data.t >= 1.0 - 1e-12)[0])
    assert data["trip:slew"][k - 1] == 0 and data["trip:slew"][k] == 1
    assert "changing faster than its trip rate 50 /s (rate_trip)" in next(
        e.detail for e in data.outcome.events if e.kind == "trip")
    # forced to -0.25 the lag heads for -0.25 and crosses x = -0.1 (its own interlock)
    x = data["x:x"]
    j = int(np.flatnonzero(x < -0.1)[0])
    assert data["trip:low"][j] == 1 and data["trip:low"][j - 1] == 0


def test_latched_until_reset_and_reset_refused_while_the_cause_persists(
        tmp_path: Path) -> None:
    # r rises to 1 at 1 s then back to 0; the trip band is exceeded during [0.6, 1.4]
    tri = {"name": "r", "kind": "table", "points": [[0.0, 0.0], [1.0, 1.0], [2.0, 0.0]]}
    rig = lag_rig(tmp_path, reference=tri, duration=3.0,
                  limits=[{"name": "u_high", "signal": "u", "trip_high": 0.6}],
                  interlocks=[{"name": "guard", "on": ["limit:u_high"]}])
    outcome, rows, cols = run_with(rig, {
        80: Command("reset", {"interlock": "guard"}),   # cause present: refused
        200: Command("reset"),                           # r = 0: accepted
        210: Command("reset")})                          # nothing latched
    trip = rows[:, cols.index("trip:guard")]
    limit = rows[:, cols.index("limit:u_high")]
    events = [(e.kind, e.tick, e.detail) for e in outcome.events]
    first = next(t for k, t, _ in events if k == "trip")
    cleared = int(np.flatnonzero((np.arange(len(limit)) > first) & (limit == 0))[0])
    assert np.all(trip[first:200] == 1)           # latched long after the cause cleared
    assert cleared < 200
    refused = [d for k, t, d in events if k == "reset_refused"]
    assert refused[0].startswith("guard: cause still present: limit u_high: u:u = ")
    assert refused[1] == "nothing is latched"
    resets = [(t, d) for k, t, d in events if k == "reset"]
    assert resets == [(200, "guard: reset by operator")]
    assert np.all(trip[200:] == 0)
    # every trip, reset and refused reset carries its tick and time
    for e in outcome.events:
        assert e.time == pytest.approx(e.tick * DT)


def test_estop_is_an_interlock_with_a_column(tmp_path: Path) -> None:
    rig = lag_rig(tmp_path)
    outcome, rows, cols = run_with(rig, {10: Command("estop"), 30: Command("reset")})
    assert cols[-1] == "trip:estop"
    trip, u = rows[:, cols.index("trip:estop")], rows[:, cols.index("u:u")]
    assert not trip[:10].any() and trip[10:30].all() and not trip[30:].any()
    assert np.all(u[10:30] == -0.25) and u[30] == pytest.approx(0.3)
    assert [(e.kind, e.tick) for e in outcome.events][:2] == [("estop", 10), ("reset", 30)]


def test_only_the_listed_inputs_are_forced(tmp_path: Path) -> None:
    rig = lag_rig(tmp_path, inputs=[{"name": "u", "safe": 0.0}, {"name": "w", "safe": 7.0}],
                  limits=[{"signal": "y", "trip_high": 0.2}],
                  interlocks=[{"name": "guard", "on": ["limit:y"], "inputs": ["w"]}],
                  extra={"controller": {"kind": "open_loop", "drive": {"u": "r", "w": "r"}}})
    data = simulate(rig)
    k = int(np.flatnonzero(data["trip:guard"] == 1)[0])
    assert np.all(data["u:w"][k:] == 7.0)
    np.testing.assert_allclose(data["u:u"][k:], data.t[k:])      # u keeps following r


def test_freeze_holds_the_state_and_stop_ends_the_run(tmp_path: Path) -> None:
    limits = [{"signal": "y", "trip_high": 0.3}]
    frozen = simulate(lag_rig(tmp_path, limits=limits, interlocks=[
        {"name": "guard", "on": ["limit:y"], "action": "freeze"}]))
    k = int(np.flatnonzero(frozen["trip:guard"] == 1)[0])
    x = frozen["x:x"]
    assert np.all(x[k:] == x[k])
    stopped = simulate(lag_rig(tmp_path, limits=limits, interlocks=[
        {"name": "guard", "on": ["limit:y"], "action": "stop"}]))
    assert stopped.rows.shape[0] == k + 1
    assert stopped.outcome.ended == "tripped" and "guard" in stopped.outcome.reason


def test_link_lost_from_a_link_fault_trips_the_watchdog_interlock(tmp_path: Path) -> None:
    rig = lag_rig(tmp_path, interlocks=[{"name": "watchdog", "on": ["link_lost"]}],
                  extra={"safety": {"watchdog_timeout": 0.05}})
    outcome, rows, cols = run_with(rig, {0: Command("inject_fault", {
        "kind": "link_drop", "target": "from_controller", "duration": 0.5})})
    lost = next(e for e in outcome.events if e.kind == "link_lost")
    trip = next(e for e in outcome.events if e.kind == "trip")
    # the last command got through at tick -1 (before the run): at tick 5 the silence
    # (6 ticks, 60 ms) first exceeds the 50 ms timeout (sim/engine/_watchdog.py)
    assert lost.tick == 5 and trip.tick == lost.tick
    assert trip.detail.startswith("watchdog: link lost (link_lost): ")
    fresh = rows[:, cols.index("fresh")]
    assert not fresh[:50].any() and fresh[50:].all()
    assert any(e.kind == "link_restored" and e.tick == 50 for e in outcome.events)


def test_a_streak_of_overruns_trips(tmp_path: Path) -> None:
    tick_ns = int(DT * 1e9)
    for streak, tripped in ((3, True), (4, False)):
        rig = lag_rig(tmp_path, mode="realtime", interlocks=[
            {"name": "late", "on": ["overruns"]}], extra={"safety": {"overrun_streak": streak}})
        rig = dataclasses.replace(rig, on_overrun="catch_up")
        # tick 20 starts 3.5 ticks late; catching up, 21 and 22 are 2.5 and 1.5 late, 23 on
        # time (half a tick late): three overruns in a row
        clock = VirtualClock(delays_ns={20: int(3.5 * tick_ns)})
        tape = MemoryTape(tick_columns(rig)[0], rig.n_ticks)
        outcome = Engine(rig, tape, clock=clock).run()
        assert outcome.overruns == 3
        trips = [e.tick for e in outcome.events if e.kind == "trip"]
        assert trips == ([22] if tripped else [])
        if tripped:
            u = tape.rows[:, tape.columns.index("u:u")]
            assert u[21] != -0.25 and u[22] == -0.25


def test_non_finite_state_trips_and_ends_the_run(tmp_path: Path) -> None:
    model = tmp_path / "blow.py"
    model.write_text("import numpy as np\n"
                     "def f(t, x, u, p):\n    return np.array([np.inf if t > 0.3 "
                     "else -x[0]])\n"
                     "def h(t, x, u, p):\n    return x.copy()\n")
    doc = {"rig": {"tick": DT, "duration": 1.0},
           "plant": {"kind": "ode", "module": "blow.py", "dynamics": "f", "output": "h",
                     "x0": [1.0], "states": [{"name": "x"}], "inputs": [{"name": "u"}],
                     "outputs": [{"name": "y"}]},
           "controller": {"kind": "open_loop", "drive": {}},
           "interlocks": [{"name": "model", "on": ["non_finite"], "action": "stop"}]}
    rig = build_rig(doc, tmp_path / "blow.toml")
    data = simulate(rig)
    assert data.outcome.ended == "fault"
    assert data["trip:model"][-1] == 1 and data["trip:model"][:-1].sum() == 0
    assert kinds(data)[-3:] == ["trip", "non_finite_state", "run_end"]


def test_rig_file_safety_mistakes_are_reported_together(tmp_path: Path) -> None:
    with pytest.raises(RigFileError) as err:
        lag_rig(tmp_path, limits=[
            {"name": "a", "signal": "yy", "trip_high": 1.0},
            {"name": "b", "signal": "y", "warn_high": 2.0, "trip_high": 1.0, "rate_trp": 3},
            {"name": "c", "signal": "q:y"},
            {"name": "d", "signal": "y", "trip_low": 1.0, "trip_high": 0.5}],
            interlocks=[{"name": "estop", "on": ["limit:b"]},
                        {"name": "g", "on": ["limit:bb", "link_lots"], "action": "halt",
                         "inputs": ["uu"]}])
    text = str(err.value)
    for needle in ("limits[0].signal: no state, input or output named 'yy'; did you mean 'y'?",
                   "limits[1].warn_high: expected inside trip_high (1.0), found 2.0",
                   "limits[1].rate_trp: unknown key; did you mean 'rate_trip'?",
                   "limits[2].signal: expected a prefix x: (state), u: (input) or y: (output)",
                   "limits[2]: expected at least one of warn_low",
                   "limits[3].trip_high: expected more than trip_low (1.0), found 0.5",
                   "interlocks[0].name: 'estop' is the built-in E-stop interlock",
                   "interlocks[1].on[0]: expected one of",
                   "did you mean 'limit:b'?",
                   "interlocks[1].on[1]:", "did you mean 'link_lost'?",
                   "interlocks[1].action: expected one of safe_inputs, freeze, stop, found "
                   "string 'halt'",
                   "interlocks[1].inputs[0]: expected one of the plant inputs (u), found "
                   "string 'uu'; "
                   "did you mean 'u'?",
                   "limits[3]: limit 'd' has a trip bound but no interlock lists"):
        assert needle in text, needle
    assert all(i.file.endswith("lag.toml") for i in err.value.issues)


def test_a_name_shared_by_a_state_and_an_output_must_be_qualified(tmp_path: Path) -> None:
    with pytest.raises(RigFileError) as err:
        build_rig({"rig": {"tick": DT, "duration": 1.0},
                   "plant": {"kind": "lti", "A": [[-1.0]], "B": [[1.0]], "C": [[1.0]],
                             "states": [{"name": "v"}], "inputs": [{"name": "u"}],
                             "outputs": [{"name": "v"}]},
                   "controller": {"kind": "open_loop", "drive": {}},
                   "limits": [{"signal": "v", "warn_high": 1.0}]}, tmp_path / "v.toml")
    assert "limits[0].signal: 'v' names more than one signal; write one of 'y:v', 'x:v'" \
        in str(err.value)


def test_warnings_beyond_the_first_twenty_are_counted(tmp_path: Path) -> None:
    # a sine around the warn bound enters the warn band once per period: 25 times
    sine = {"name": "r", "kind": "sine", "low": -1.0, "high": 1.0, "hz": 12.5}
    rig = lag_rig(tmp_path, reference=sine, limits=[{"name": "u_warn", "signal": "u",
                                                     "warn_high": 0.5}])
    data = simulate(rig)
    warns = [e for e in data.outcome.events if e.kind == "limit_warn"]
    entries = int(np.sum(np.diff((data["limit:u_warn"] == 1).astype(int)) == 1)
                  + (data["limit:u_warn"][0] == 1))
    assert entries == 25 and len(warns) == 21
    assert "further warnings of this limit are counted only" in warns[19].detail
    assert warns[20].detail == "u_warn: 25 warnings in all, the first 20 itemised"
