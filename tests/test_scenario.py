"""Scenario files: when steps fire, determinism, verdicts against python-control's
step_info on a recorded run, the command line's table and exit code, file mistakes, and
the demo rehearsals."""

from __future__ import annotations

import dataclasses
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import control
import numpy as np
import pytest

from plantrig.sim import (
    RigFileError,
    ScenarioFileError,
    build_rig,
    build_scenario,
    evaluate,
    load_rig,
    load_scenario,
    read_run,
    run_to_folder,
    simulate,
)

REPO = Path(__file__).resolve().parents[1]
REHEARSALS = REPO / "configs" / "rehearsals"
CONVEYOR = REPO / "configs" / "conveyor.toml"
DT = 0.01


def lag_rig(tmp_path: Path, **extra: Any) -> Any:
    doc: dict[str, Any] = {
        "rig": {"name": "lag", "tick": DT, "duration": 2.0, "seed": 2},
        "plant": {"kind": "lti", "A": [[-2.0]], "B": [[2.0]], "C": [[1.0]],
                  "states": [{"name": "x"}], "inputs": [{"name": "u", "safe": 0.0}],
                  "outputs": [{"name": "y", "unit": "m"}]},
        "references": [{"name": "r", "kind": "constant", "value": 0.0}],
        "controller": {"kind": "pid", "loops": [{"measure": "y", "drive": "u",
                                                 "reference": "r", "kp": 3.0, "ki": 4.0}]},
        "limits": [{"name": "high", "signal": "y", "trip_high": 0.9}],
        "interlocks": [{"name": "guard", "on": ["limit:high"]}],
    }
    doc.update(extra)
    return build_rig(doc, tmp_path / "lag.toml")


def scenario(tmp_path: Path, rig: Any, steps: list, verdicts: list | None = None,
             head: dict | None = None) -> Any:
    return build_scenario({"scenario": head or {"name": "s"}, "steps": steps,
                           "verdicts": verdicts or []}, tmp_path / "s.toml", rig)


def step_events(data: Any) -> dict[str, int]:
    return {e.detail.split(":")[0]: e.tick for e in data.outcome.events
            if e.kind == "scenario_step"}


def test_steps_fire_at_their_ticks(tmp_path: Path) -> None:
    # the interlock freezes the plant, so y stays above the trip bound once it trips
    rig = lag_rig(tmp_path, interlocks=[{"name": "guard", "on": ["limit:high"],
                                         "action": "freeze"}])
    sc = scenario(tmp_path, rig, [
        {"name": "go", "at": 0.105, "set_reference": {"r": 1.2}, "phase": "up"},
        {"name": "seen", "when": "y:y >= 0.5", "expect": "u:u > 0"},
        {"name": "later", "when": "y:y >= 0.5", "delay": 0.1, "phase": "later"},
        {"name": "after_up", "on_phase": "up", "phase": "after_up"},
        {"name": "tripped", "on_trip": "guard", "delay": 0.05, "reset": "guard"},
        {"name": "end", "at": 1.5, "stop": True}])
    data = simulate(rig, scenario=sc)
    fired = step_events(data)
    y = data["y:y"]
    crossed = int(np.flatnonzero(y >= 0.5)[0])
    trip = next(e.tick for e in data.outcome.events if e.kind == "trip")
    assert fired["go"] == 11                      # first tick with t >= 0.105
    assert fired["after_up"] == 12                # the phase is seen in tick 11
    assert fired["seen"] == crossed + 1           # a condition in tick k fires at k + 1
    assert fired["later"] == crossed + 10         # 0.1 s after the tick it held
    assert fired["tripped"] == trip + 5
    assert fired["end"] == 150 and data.outcome.ended == "stopped"
    assert data["ref:r"][10] == 0.0 and np.all(data["ref:r"][11:] == 1.2)
    # the reset came while y was still above the trip bound: refused, saying why
    refused = next(e for e in data.outcome.events if e.kind == "reset_refused")
    assert refused.tick == fired["tripped"] and "cause still present: limit high" in \
        refused.detail
    verdicts = evaluate(sc, data.columns, data.units, data.rows, data.outcome.events, DT)
    (seen,) = [v for v in verdicts if v.criterion == "expect"]
    assert seen.passed and seen.measured == data["u:u"][fired["seen"]]


def test_the_same_scenario_twice_fast_gives_identical_records(tmp_path: Path) -> None:
    rig = lag_rig(tmp_path, disturbances=[{"name": "push", "B": [1.0]}])
    sc = scenario(tmp_path, rig, [
        {"at": 0.1, "set_reference": {"r": 0.5}},
        {"at": 0.3, "inject": {"name": "n", "kind": "sensor_noise", "target": "y",
                               "std": 0.02, "duration": 0.5}},
        {"at": 0.4, "inject": {"name": "d", "kind": "link_drop", "target": "both",
                               "probability": 0.3, "seed": 9}},
        {"at": 0.6, "inject": {"name": "p", "kind": "disturbance", "target": "push",
                               "value": 0.4}},
        {"at": 0.8, "set_parameter": {"target": "A[0,0]", "factor": 1.5}},
        {"when": "y:y > 0.45", "clear": "all"}])
    a, b = simulate(rig, scenario=sc), simulate(rig, scenario=sc)
    assert a.rows.tobytes() == b.rows.tobytes()
    assert a.outcome.events == b.outcome.events
    assert "fault_cleared" in [e.kind for e in a.outcome.events]


def test_verdicts_match_step_info_on_a_recorded_run(tmp_path: Path) -> None:
    # the conveyor's speed step 0 -> 0.8 m/s at 0.2 s, judged from the run folder and
    # by python-control's step_info (control/timeresp.py) on the same recorded samples
    rig = load_rig(CONVEYOR)
    common = {"signal": "y:belt_speed", "start": 0.2, "stop": 1.6, "final": 0.8}
    sc = scenario(tmp_path, rig, [{"at": 0.2, "phase": "step"}], [
        {"name": "rise", "criterion": "rise_time", "max": 1.0, **common},
        {"name": "settle", "criterion": "settling_time", "max": 1.0, "band_pct": 2.0,
         **common},
        {"name": "over", "criterion": "overshoot", "max": 50.0, **common},
        {"name": "sse", "criterion": "steady_state_error", "signal": "y:belt_speed",
         "reference": "ref:speed_setpoint", "stop": 1.5, "tail": 0.2, "max": 1.0},
        {"name": "rms", "criterion": "tracking_rms", "signal": "y:belt_speed",
         "reference": "speed_setpoint", "start": "step", "stop": 1.6, "max": 1.0},
        {"name": "worst", "criterion": "tracking_max", "signal": "y:belt_speed",
         "reference": "ref:speed_setpoint", "start": 0.5, "stop": 1.6, "max": 1.0}])
    folder, _, summary = run_to_folder(rig, tmp_path / "runs", scenario=sc)
    measured = {v["name"]: v["measured"] for v in json.loads(
        (folder / "verdicts.json").read_text())}
    assert summary["verdicts"][0]["name"] == "rise" and (folder / "scenario.toml").exists()
    ticks = read_run(folder)
    t, y = ticks["t"], ticks["y:belt_speed"]
    w = (t >= 0.2 - DT / 20) & (t <= 1.6 + 1e-9)
    info = control.step_info(y[w], T=t[w] - 0.2, yfinal=0.8, SettlingTimeThreshold=0.02,
                             RiseTimeLimits=(0.1, 0.9))
    assert measured["rise"] == pytest.approx(info["RiseTime"], abs=1e-12)
    assert measured["settle"] == pytest.approx(info["SettlingTime"], abs=1e-12)
    assert measured["over"] == pytest.approx(info["Overshoot"], abs=1e-9)
    r = ticks["ref:speed_setpoint"]
    tail = (t >= 1.3 - 1e-9) & (t <= 1.5 + 1e-9)
    assert measured["sse"] == pytest.approx(abs(0.8 - y[tail].mean()), abs=1e-12)
    e = (y - r)[w]
    assert measured["rms"] == pytest.approx(np.sqrt(np.mean(e * e)), abs=1e-12)
    late = (t >= 0.5 - 1e-9) & (t <= 1.6 + 1e-9)
    assert measured["worst"] == pytest.approx(np.abs(y - r)[late].max(), abs=1e-12)


def test_cli_prints_the_table_and_exits_3_when_a_criterion_fails(tmp_path: Path) -> None:
    strict = tmp_path / "strict.toml"
    strict.write_text('[scenario]\nname = "strict"\n\n[[steps]]\nat = 0.2\nphase = "step"\n\n'
                      '[[verdicts]]\nname = "too strict"\ncriterion = "rise_time"\n'
                      'signal = "y:belt_speed"\nstart = 0.2\nstop = 1.6\nfinal = 0.8\n'
                      'max = 0.001\n\n[[verdicts]]\ncriterion = "no_unexpected_trip"\n')
    proc = subprocess.run([sys.executable, "-m", "plantrig", "run", str(CONVEYOR),
                           "--scenario", str(strict), "--out", str(tmp_path / "runs")],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 3, proc.stderr
    assert "too strict" in proc.stdout and "FAIL" in proc.stdout
    assert "1 of 2 criteria passed" in proc.stdout
    (folder,) = [p for p in (tmp_path / "runs").iterdir() if p.is_dir()]
    verdicts = json.loads((folder / "verdicts.json").read_text())
    assert [v["passed"] for v in verdicts] == [False, True]
    assert set(verdicts[0]) >= {"name", "criterion", "measured", "limit", "unit", "passed"}


def test_scenario_file_mistakes_are_reported_together(tmp_path: Path) -> None:
    rig = lag_rig(tmp_path)
    bad = {"scenario": {"name": "bad", "duraton": 1.0, "allow_trips": ["gaurd"]},
           "steps": [{"at": 1.0, "when": "y:y > 1"},
                     {"when": "y:yy > 1", "phase": "p"},
                     {"at": 0.5, "inject": {"kind": "sensor_bias", "target": "y"}},
                     {"at": 0.5, "set_reference": {"rr": 1.0}, "reset": "gard"},
                     {"on_trip": "nope", "expect": "u:u ~ 3"},
                     {"at": 0.2, "inject": {"name": "offset", "kind": "sensor_bias",
                                            "target": "y", "bias": 0.1}},
                     {"at": 0.6, "clear": "ofset"},
                     {"at": 0.7, "inject": {"kind": "sensor_noise", "target": "y",
                                            "std": 0.1, "seed": -1}}],
           "verdicts": [{"criterion": "rise_tim"},
                        {"criterion": "trip_within", "interlock": "guard", "fault": "f",
                         "max": 10.0},
                        {"criterion": "band", "signal": "y", "start": "nowhere"}]}
    with pytest.raises(ScenarioFileError) as err:
        build_scenario(bad, tmp_path / "bad.toml", rig)
    text = str(err.value)
    for needle in ("scenario.duraton: unknown key; did you mean 'duration'?",
                   "scenario.allow_trips[0]: expected one of the interlocks (estop, guard), "
                   "found string 'gaurd'; did you mean 'guard'?",
                   "steps[0]: expected exactly one trigger (at, when, on_trip, on_phase), "
                   "found at, when",
                   "steps[0]: expected at least one action",
                   "steps[1].when: no tick column 'y:yy'; did you mean 'y:y'?",
                   "steps[2].inject.bias: missing (expected a number",
                   "steps[3].set_reference.rr: expected one of the references (r), found "
                   "string 'rr'",
                   "steps[3].reset: expected one of the interlocks (all, estop, guard), found "
                   "string 'gard'; did you mean 'guard'?",
                   "steps[4].on_trip: expected one of the interlocks",
                   "steps[4].expect: expected '<column> <op> <number>'",
                   "steps[6].clear: expected one of the faults the scenario injects (all, "
                   "offset), found string 'ofset'; did you mean 'offset'?",
                   "steps[7].inject.seed: expected a whole number >= 0, found -1",
                   "verdicts[0].criterion: expected one of the criteria",
                   "did you mean 'rise_time'?",
                   "verdicts[1].fault: expected one of the faults the scenario injects",
                   "verdicts[2].start: expected one of the phases the scenario marks (p), "
                   "found string 'nowhere'",
                   "verdicts[2]: expected `low`, `high` or both"):
        assert needle in text, needle
    assert isinstance(err.value, RigFileError)
    assert all(i.file.endswith("bad.toml") for i in err.value.issues)


@pytest.mark.parametrize(("rig_name", "scenario_name"), [
    ("conveyor_guarded", "belt_sensor_stuck"),
    ("tank_guarded", "heater_stuck_on"),
    ("conveyor_guarded", "link_lost"),
])
def test_demo_rehearsals_pass_and_repeat_exactly(rig_name: str, scenario_name: str) -> None:
    rig = load_rig(REHEARSALS / f"{rig_name}.toml")
    sc = load_scenario(REHEARSALS / f"{scenario_name}.toml", rig)
    a, b = simulate(rig, scenario=sc), simulate(rig, scenario=sc)
    assert a.rows.tobytes() == b.rows.tobytes()
    verdicts = evaluate(sc, a.columns, a.units, a.rows, a.outcome.events, rig.tick)
    assert verdicts and all(v.passed for v in verdicts), [v for v in verdicts if not v.passed]
    assert any(e.kind == "trip" for e in a.outcome.events)
    # verdicts read the events' names (fault, interlock, phase, step), never their wording
    reworded = [dataclasses.replace(e, detail="worded otherwise: x") for e in a.outcome.events]
    assert evaluate(sc, a.columns, a.units, a.rows, reworded, rig.tick) == verdicts
