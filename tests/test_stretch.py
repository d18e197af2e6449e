"""Plain ticks in C (sim/engine/_stretch.py): the same record, bit for bit, as every tick
in Python, with the features that leave a stretch (faults, E-stop, overrides, scenario
steps, non-finite commands) acting in the same ticks."""

from __future__ import annotations

import queue
from pathlib import Path

import numpy as np
import pytest

from plantrig.sim import (
    CommandInbox,
    Engine,
    MemoryTape,
    Tape,
    TapeReader,
    build_rig,
    load_rig,
    load_scenario,
    simulate,
    tick_columns,
)

REPO = Path(__file__).resolve().parents[1]
CONVEYOR = REPO / "configs" / "conveyor.toml"
GUARDED = REPO / "configs" / "rehearsals" / "conveyor_guarded.toml"


def run_both_ways(rig, scenario=None):  # type: ignore[no-untyped-def]
    """(rows, events, ticks the C stretches ran) with stretches, then without."""
    results = []
    for stretches in (True, False):
        data = simulate(rig, scenario=scenario, stretches=stretches)
        outcome = data.outcome
        events = [(e.tick, e.kind, e.detail, e.source, e.name) for e in outcome.events]
        ran = outcome.ticks_in_c
        assert outcome.timing(rig.tick)["ticks_in_c"] == ran
        results.append((data.rows, events, ran, outcome.ended))
    return results


def assert_same(with_c, python) -> None:  # type: ignore[no-untyped-def]
    assert with_c[0].shape == python[0].shape
    assert with_c[0].tobytes() == python[0].tobytes()
    assert with_c[1] == python[1]
    assert with_c[3] == python[3]
    assert python[2] == 0


def test_shipped_conveyor_runs_in_stretches_bit_for_bit() -> None:
    rig = load_rig(CONVEYOR)
    with_c, python = run_both_ways(rig)
    assert_same(with_c, python)
    assert with_c[2] == rig.n_ticks         # every tick of a plain run is a C tick


def test_only_a_run_with_something_to_poll_cuts_its_stretches_every_5_ms(
        tmp_path: Path) -> None:
    # an in-memory run has no inbox and no recorder process: its stretches end only
    # at its orders (1024 ticks at most, the scratch); a run with either looks every 5 ms
    rig = load_rig(CONVEYOR)
    columns, _ = tick_columns(rig)
    quiet = Engine(rig, MemoryTape(columns, rig.n_ticks))
    inbox = Engine(rig, MemoryTape(columns, rig.n_ticks), commands=CommandInbox(queue.Queue()))
    ring = Tape(tmp_path / "ring.tape", columns, capacity=64)
    recorded = Engine(rig, ring)
    assert (quiet.poll_every, inbox.poll_every, recorded.poll_every) == (1024, 5, 5)
    assert quiet.stretch is not None and len(quiet.stretch.out) == 1024
    ring.close()


def test_features_that_leave_a_stretch_act_in_the_same_ticks(tmp_path: Path) -> None:
    scenario_file = tmp_path / "mixed.toml"
    scenario_file.write_text("""
[scenario]
name = "mixed"

[[steps]]
at = 0.5
inject = { name = "noisy", kind = "sensor_noise", target = "belt_speed", std = 0.01, \
           duration = 0.3 }

[[steps]]
at = 1.0
set_reference = { speed_setpoint = 0.6 }

[[steps]]
at = 1.2
phase = "later"

[[steps]]
at = 1.5
estop = true

[[steps]]
at = 1.7
reset = "all"

[[steps]]
at = 2.5
stop = true
""")
    rig = load_rig(CONVEYOR)
    scenario = load_scenario(scenario_file, rig)
    with_c, python = run_both_ways(rig, scenario)
    assert_same(with_c, python)
    kinds = {kind for _, kind, *_ in python[1]}
    assert {"fault_injected", "fault_cleared", "estop", "reset", "phase"} <= kinds
    ticks = python[0].shape[0]
    # the noise (0.3 s: numpy's generator draws it) ran in Python; the rest in C
    assert ticks - 310 <= with_c[2] <= ticks - 300


def test_sensor_and_actuator_faults_and_forced_inputs_run_in_c(tmp_path: Path) -> None:
    # every sensor and actuator fault that is one operation on one value, some of them
    # overlapping, held values taken when injected, and an E-stop forcing safe inputs
    steps = [(0.2, "sensor_bias", "belt_speed", "bias = 0.05, duration = 0.3"),
             (0.3, "sensor_gain", "motor_current", "gain = 1.1, duration = 0.5"),
             (0.6, "sensor_drift", "belt_speed", "rate = 0.1, duration = 0.4"),
             (1.1, "sensor_spike", "belt_speed", "amplitude = 0.2, duration = 0.01"),
             (1.2, "sensor_dropout", "motor_current", "value = -1.0, duration = 0.1"),
             (1.3, "sensor_stuck", "belt_speed", "duration = 0.2"),
             (1.6, "actuator_effectiveness", "voltage", "factor = 0.8, duration = 0.3"),
             (1.8, "actuator_saturation", "voltage", "low = -5.0, high = 5.0, duration = 0.4"),
             (2.3, "actuator_stuck", "voltage", "duration = 0.1")]
    text = '[scenario]\nname = "ops"\n' + "".join(
        f'[[steps]]\nat = {at}\ninject = {{ name = "f{i}", kind = "{kind}", '
        f'target = "{target}", {params} }}\n' for i, (at, kind, target, params)
        in enumerate(steps))
    text += "[[steps]]\nat = 2.5\nestop = true\n[[steps]]\nat = 2.7\nreset = \"all\"\n"
    (tmp_path / "ops.toml").write_text(text)
    rig = load_rig(CONVEYOR)
    scenario = load_scenario(tmp_path / "ops.toml", rig)
    with_c, python = run_both_ways(rig, scenario)
    assert_same(with_c, python)
    kinds = [kind for _, kind, *_ in python[1]]
    assert kinds.count("fault_injected") == kinds.count("fault_cleared") == len(steps)
    assert {"estop", "reset"} <= set(kinds)
    columns = tick_columns(rig)[0]
    sent, y = (python[0][:, columns.index(f"{w}:belt_speed")] for w in ("sent", "y"))
    assert (sent[200:500] == y[200:500] + 0.05).all()            # the faults did act
    u = python[0][:, columns.index("u:voltage")]
    assert (np.abs(u[1800:2200]) <= 5.0).all() and (u[2500:2700] == 0.0).all()
    assert with_c[2] == rig.n_ticks                               # all of them in C


def test_faults_that_act_only_where_they_start_and_end_stay_in_c(tmp_path: Path) -> None:
    # a load surge (a disturbance) and a parameter step change the plant once, at their
    # start and end: the ticks between run in C; a drifting parameter changes it every
    # 0.1 s, so its ticks run in Python
    scenario_file = tmp_path / "plant_faults.toml"
    scenario_file.write_text("""
[scenario]
name = "plant_faults"

[[steps]]
at = 0.4
inject = { name = "surge", kind = "disturbance", target = "belt_load", value = 8.0, \
           duration = 0.8 }

[[steps]]
at = 1.6
inject = { name = "slip", kind = "plant_step", target = "A[0,0]", factor = 1.1, \
           duration = 0.7 }

[[steps]]
at = 3.0
inject = { name = "wear", kind = "plant_drift", target = "A[2,2]", rate = 0.2, \
           update = 0.1, duration = 0.5 }
""")
    rig = load_rig(GUARDED)
    scenario = load_scenario(scenario_file, rig)
    with_c, python = run_both_ways(rig, scenario)
    assert_same(with_c, python)
    rows = python[0]
    columns = tick_columns(rig)[0]
    load = rows[:, columns.index("d:belt_load")]
    assert (load[400:1200] == 8.0).all() and not load[1200:].any()
    kinds = [kind for _, kind, *_ in python[1]]
    assert kinds.count("fault_injected") == kinds.count("fault_cleared") == 3
    assert with_c[2] == rig.n_ticks - 500          # every tick but the drift's


def two_loop_rig(tmp_path: Path, kp: float = 4.0, span: float = 2.0,
                 limits: list | None = None):  # type: ignore[no-untyped-def]
    """Two coupled lags, each under its own loop: one with filtered derivative and
    conditional integration, one without anti-windup, both reaching their limits."""
    return build_rig({
        "limits": limits or [],
        "rig": {"name": "two_loops", "tick": 0.002, "duration": 2.0, "mode": "fast"},
        "plant": {"kind": "lti", "A": [[-3.0, 0.5], [0.8, -1.5]],
                  "B": [[2.0, 0.0], [0.3, 1.0]], "C": [[1.0, 0.0], [0.0, 1.0]],
                  "D": [[0.0, 0.0], [0.1, 0.0]],
                  "states": [{"name": "a"}, {"name": "b"}],
                  "inputs": [{"name": "ua", "min": -span, "max": span},
                             {"name": "ub", "min": -span, "max": span}],
                  "outputs": [{"name": "ya"}, {"name": "yb"}]},
        "references": [{"name": "ra", "kind": "sine", "low": -1.5, "high": 1.5, "hz": 1.3},
                       {"name": "rb", "kind": "ramp", "from": 0.0, "at": 0.3, "rate": 2.0,
                        "to": 3.0}],
        "controller": {"kind": "pid", "loops": [
            {"measure": "ya", "drive": "ua", "reference": "ra", "kp": kp, "ki": 9.0,
             "kd": 0.05, "derivative_lag": 0.01, "windup": "freeze"},
            {"measure": "yb", "drive": "ub", "reference": "rb", "kp": kp / 2, "ki": 4.0,
             "windup": "off"}]},
    }, tmp_path / "two_loops.toml")


def test_pid_loops_with_each_windup_rule_match(tmp_path: Path) -> None:
    rig = two_loop_rig(tmp_path)
    with_c, python = run_both_ways(rig)
    assert_same(with_c, python)
    assert with_c[2] == rig.n_ticks
    u = python[0][:, tick_columns(rig)[0].index("u:ub")]
    assert u.max() == 2.0                   # the loops do reach their limits


@pytest.mark.parametrize("many", [False, True], ids=["loop screen", "numpy screen"])
def test_limits_screened_in_c_warn_in_the_same_ticks(tmp_path: Path, many: bool) -> None:
    # warn bands and rates the sine reference crosses now and then: those ticks go to
    # Python (warn events), the others stay in C; with 16 limits or more the bank screens
    # with numpy instead of a loop (sim/safety/_limits.py), so both are followed
    limits = [{"name": "ya_band", "signal": "y:ya", "warn_low": -0.5, "warn_high": 0.6},
              {"name": "ya_rate", "signal": "y:ya", "rate_warn": 4.0},
              {"name": "ub_high", "signal": "u:ub", "warn_high": 1.9}]
    if many:
        limits += [{"name": f"b_{i}", "signal": "x:b", "warn_low": -5.0 - i,
                    "warn_high": 5.0 + i, "rate_warn": 50.0 + i} for i in range(15)]
    rig = two_loop_rig(tmp_path, limits=limits)
    with_c, python = run_both_ways(rig)
    assert_same(with_c, python)
    warned = {name for _, kind, _, _, name in python[1] if kind == "limit_warn"}
    assert {"ya_band", "ya_rate", "ub_high"} <= warned, python[1]
    assert 100 < with_c[2] < rig.n_ticks   # both kinds of tick ran


def test_limits_judge_the_demanded_input_while_it_is_forced(tmp_path: Path) -> None:
    # under an E-stop the plant gets the safe input (0) while the limits judge what the
    # loop demands, as the Python tick does: the demand leaving its band warns then too
    rig = two_loop_rig(tmp_path, limits=[{"name": "ua_band", "signal": "u:ua",
                                          "warn_low": -1.2, "warn_high": 1.2}])
    (tmp_path / "estop.toml").write_text('[scenario]\nname = "estop"\n[[steps]]\n'
                                         'at = 0.5\nestop = true\n[[steps]]\nat = 1.5\n'
                                         'reset = "all"\n')
    with_c, python = run_both_ways(rig, load_scenario(tmp_path / "estop.toml", rig))
    assert_same(with_c, python)
    u = python[0][:, tick_columns(rig)[0].index("u:ua")]
    assert (u[251:750] == 0.0).all()
    warned = [tick for tick, kind, *_ in python[1] if kind == "limit_warn"]
    assert any(250 < tick < 750 for tick in warned), python[1]
    assert 100 < with_c[2] < rig.n_ticks


@pytest.mark.parametrize("scenario", [None, "belt_sensor_stuck", "link_lost"])
def test_guarded_conveyor_rehearsals_match(scenario: str | None) -> None:
    rehearsals = REPO / "configs" / "rehearsals"
    rig = load_rig(rehearsals / "conveyor_guarded.toml")
    loaded = load_scenario(rehearsals / f"{scenario}.toml", rig) if scenario else None
    with_c, python = run_both_ways(rig, loaded)
    assert_same(with_c, python)
    assert with_c[2] > 0


@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning")
def test_a_command_too_large_to_use_is_left_to_the_python_tick(tmp_path: Path) -> None:
    # kp 1e200 makes commands whose square overflows: the Python tick holds the last good
    # input and records why; the C tick must hand each such tick over, not take it
    rig = two_loop_rig(tmp_path, kp=1e200, span=1e300)
    with_c, python = run_both_ways(rig)
    assert_same(with_c, python)
    assert any(kind == "non_finite_input" for _, kind, *_ in python[1])


def test_ring_tape_takes_blocks_across_its_wrap(tmp_path: Path) -> None:
    columns = ["seq", "t", "v"]
    tape = Tape(tmp_path / "ring.tape", columns, capacity=7)
    reader = TapeReader(tmp_path / "ring.tape", acknowledge=True)
    seen = []
    written = 0
    for size in (3, 5, 6, 1, 7):
        block = np.zeros((size, 3))
        block[:, 1] = np.arange(written, written + size) * 0.5
        block[:, 2] = -block[:, 1]
        tape.append_rows(block)
        written += size
        seen.append(reader.read_new())
        reader.release()
        assert tape.free() == 7
    rows = np.concatenate(seen)
    assert tape.written == written == len(rows)
    np.testing.assert_array_equal(rows[:, 0], np.arange(written))
    np.testing.assert_array_equal(rows[:, 1], np.arange(written) * 0.5)
    np.testing.assert_array_equal(rows[:, 2], -rows[:, 1])
    reader.close()
    tape.close()
