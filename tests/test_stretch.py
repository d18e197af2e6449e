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
inject = { name = "stuck", kind = "sensor_stuck", target = "belt_speed", value = 0.3, \
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
    # the fault (0.3 s) and the E-stop (0.2 s) ran in Python; the rest in C
    assert ticks - 600 <= with_c[2] < ticks - 400


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
