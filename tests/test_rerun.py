"""plantrig rerun: the recorded commands fed to the plant again.

With the rig unchanged the rerun's x, y, u and sensor values (sent:*) equal the
recording bit for bit: on a fast run, on every shipped rehearsal, on a real-time run
over a pty with the reference controller in another process, and on a run over a real
mosquitto broker. A changed plant gets the very same commands (cmd:* identical) and
answers differently. A model module that came with the folder needs --trust-model.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hil_helpers import controller_closing

from plantrig.cli import main
from plantrig.sim import read_run

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ROOT / "configs"
REHEARSALS = CONFIGS / "rehearsals"
PLANTRIG = str(Path(sys.executable).with_name("plantrig"))
GUARD_S = 240.0          # a hang guard only; nothing here measures time
REPLAYED = ("x", "y", "u", "sent", "cmd")


def only(out: Path) -> Path:
    (folder,) = [p for p in out.iterdir() if p.is_dir()]
    return folder


def assert_bit_for_bit(original: Path, rerun: Path) -> None:
    a, b = read_run(original), read_run(rerun)
    assert len(a.t) == len(b.t) and len(a.t) > 0
    for prefix in REPLAYED:
        for column in a.names(prefix):
            assert np.array_equal(a[column], b[column], equal_nan=True), column
    summary = json.loads((rerun / "summary.json").read_text())
    assert summary["rerun"]["of"] == str(original.resolve())
    assert summary["mode"] == "fast"


def rerun(folder: Path, out: Path, *extra: str) -> tuple[int, Path | None]:
    code = main(["rerun", str(folder), "--out", str(out), *extra])
    return code, only(out) if out.exists() and any(out.iterdir()) else None


def test_fast_run_reruns_bit_for_bit(tmp_path: Path) -> None:
    assert main(["run", str(CONFIGS / "conveyor.toml"), "--fast", "--out",
                 str(tmp_path / "a")]) == 0
    original = only(tmp_path / "a")
    code, again = rerun(original, tmp_path / "r")
    assert code == 0 and again is not None
    assert_bit_for_bit(original, again)
    assert (again / "rig.toml").read_bytes() == (original / "rig.toml").read_bytes()
    assert main(["compare", str(original), str(again), "--out", str(tmp_path / "c"),
                 "--no-plots"]) == 0


@pytest.mark.parametrize("rig,scenario", [
    ("conveyor_guarded", "belt_sensor_stuck"),
    ("conveyor_guarded", "link_lost"),
    ("tank_guarded", "heater_stuck_on"),
])
def test_every_shipped_rehearsal_reruns_bit_for_bit(tmp_path: Path, rig: str,
                                                    scenario: str) -> None:
    main(["run", str(REHEARSALS / f"{rig}.toml"), "--fast", "--scenario",
          str(REHEARSALS / f"{scenario}.toml"), "--out", str(tmp_path / "a")])
    original = only(tmp_path / "a")
    code, again = rerun(original, tmp_path / "r", "--trust-model")
    assert again is not None
    assert code == json.loads((original / "summary.json").read_text())["exit_code"]
    assert_bit_for_bit(original, again)
    a, b = read_run(original), read_run(again)
    kinds = ("trip", "reset", "fault_injected", "fault_cleared", "link_lost", "phase")
    assert [(e["tick"], e["kind"]) for e in a.events if e["kind"] in kinds] == \
        [(e["tick"], e["kind"]) for e in b.events if e["kind"] in kinds]
    # the record says which link losses a fault made, so a rerun never reads the wording
    links = [e for e in a.events if e["kind"] in ("link_lost", "link_restored")]
    assert all(e.get("source") == "rehearsed" for e in links)
    assert len(links) == (2 if scenario == "link_lost" else 0)


def test_operator_commands_are_read_from_the_event_names() -> None:
    """A reset and a phase are replayed for the name their event carries, whatever its
    detail says; a refused reset of no interlock replays as a reset of every latch."""
    from plantrig.sim import Command
    from plantrig.sim.records._rerun import operator_commands

    events = [{"tick": 10, "time": 0.01, "kind": "estop", "detail": "pressed", "name": "estop"},
              {"tick": 20, "time": 0.02, "kind": "reset", "detail": "released at last",
               "name": "belt_overspeed"},
              {"tick": 30, "time": 0.03, "kind": "reset_refused", "detail": "x: nothing"},
              {"tick": 40, "time": 0.04, "kind": "phase", "detail": "a moment",
               "name": "surge"}]
    assert operator_commands(events) == [
        (10, Command("estop")), (20, Command("reset", {"interlock": "belt_overspeed"})),
        (30, Command("reset")), (40, Command("mark_phase", {"name": "surge"}))]


def test_model_module_from_a_folder_needs_trust(tmp_path: Path,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["run", str(CONFIGS / "tank.toml"), "--fast", "--duration", "1", "--out",
                 str(tmp_path / "a")]) == 0
    original = only(tmp_path / "a")
    capsys.readouterr()
    code, again = rerun(original, tmp_path / "r")
    err = capsys.readouterr().err
    assert code == 2 and again is None
    assert "came with the run folder" in err and "--trust-model" in err
    # the user's own plant instead of the folder's: no trust needed
    code, again = rerun(original, tmp_path / "r2", "--plant", str(CONFIGS / "tank.toml"))
    assert code == 0 and again is not None
    assert_bit_for_bit(original, again)


def test_changed_plant_gets_the_same_commands(tmp_path: Path) -> None:
    """The what-if: the belt's friction raised; the commands are the recorded ones."""
    assert main(["run", str(CONFIGS / "conveyor.toml"), "--fast", "--out",
                 str(tmp_path / "a")]) == 0
    original = only(tmp_path / "a")
    code, again = rerun(original, tmp_path / "r", "--set", "plant.A[2][2]=-30.0")
    assert code == 0 and again is not None
    a, b = read_run(original), read_run(again)
    assert np.array_equal(a["cmd:voltage"], b["cmd:voltage"])
    assert not np.array_equal(a["y:belt_speed"], b["y:belt_speed"])
    summary = json.loads((again / "summary.json").read_text())
    assert summary["rerun"]["changes"] == ["plant.A[2][2]=-30.0"]
    sources = json.loads((again / "sources.json").read_text())
    assert sources["files"]["rig.toml"]["overrides"] == ["plant.A[2][2]=-30.0"]
    assert main(["compare", str(original), str(again), "--out", str(tmp_path / "c"),
                 "--no-plots"]) == 1


def test_not_a_run_folder(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["rerun", str(tmp_path), "--out", str(tmp_path / "r")]) == 2
    assert "not a finished run folder" in capsys.readouterr().err


def demo(tmp_path: Path, *args: str) -> Path:
    proc = subprocess.run([PLANTRIG, "demo", *args, "--out", str(tmp_path / "a")],
                          capture_output=True, text=True, timeout=GUARD_S)
    assert "Traceback" not in proc.stderr, proc.stderr
    original = only(tmp_path / "a")
    summary = json.loads((original / "summary.json").read_text())
    assert summary["mode"] == "realtime"
    assert summary["ticks_recorded"] == summary["ticks_planned"]
    assert summary["link"]["frames_in"] > 0        # the controller did answer
    # its closing lines, in the one form: it heard the rig run and end (MQTT too)
    states = controller_closing(proc.stdout)["states"].split()
    assert "running/0" in states and states[-1].startswith(("ended/", "fault/")), states
    return original


def test_realtime_pty_run_reruns_bit_for_bit(tmp_path: Path) -> None:
    original = demo(tmp_path, "--rig", str(CONFIGS / "conveyor_hil.toml"))
    code, again = rerun(original, tmp_path / "r")
    assert again is not None
    assert_bit_for_bit(original, again)
    fresh = read_run(original)["fresh"]
    assert np.array_equal(fresh, read_run(again)["fresh"])


def test_mqtt_run_reruns_bit_for_bit(tmp_path: Path) -> None:
    original = demo(tmp_path, "--mqtt")
    code, again = rerun(original, tmp_path / "r")
    assert again is not None
    assert_bit_for_bit(original, again)
