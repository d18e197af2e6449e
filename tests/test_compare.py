"""plantrig compare on real run folders (fast runs of the shipped rigs).

Two runs of the same rig must match bit for bit (exit 0); a changed gain must not
(exit 1), and the deviations must equal what numpy computes from the two records read
independently (plantrig.sim.read_run); runs of different rigs are refused with what
differs (exit 2); a rehearsal's trip is paired with its time difference.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from plantrig.cli import main
from plantrig.sim import read_run
from plantrig.sim.records._compare import compare_runs, pair_events

ROOT = Path(__file__).resolve().parents[1]
CONVEYOR = ROOT / "configs" / "conveyor.toml"
TANK = ROOT / "configs" / "tank.toml"
GUARDED = ROOT / "configs" / "rehearsals" / "conveyor_guarded.toml"
STUCK = ROOT / "configs" / "rehearsals" / "belt_sensor_stuck.toml"


def run(tmp: Path, rig: Path, *extra: str) -> Path:
    out = tmp / f"runs{len(list(tmp.glob('runs*')))}"
    code = main(["run", str(rig), "--fast", "--out", str(out), *extra])
    assert code in (0, 3, 4), code
    (folder,) = [p for p in out.iterdir() if p.is_dir()]
    return folder


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    tmp = tmp_path_factory.mktemp("compare")
    return {"a": run(tmp, CONVEYOR), "b": run(tmp, CONVEYOR),
            "gain": run(tmp, CONVEYOR, "--set", "controller.loops[0].kp=40"),
            "slow": run(tmp, CONVEYOR, "--set", "rig.tick=0.002"),
            "tank": run(tmp, TANK, "--duration", "2")}


def compare(tmp_path: Path, a: Path, b: Path, *extra: str,
            capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str, Path | None]:
    code = main(["compare", str(a), str(b), "--out", str(tmp_path), *extra])
    out, err = capsys.readouterr()
    folders = [p for p in tmp_path.iterdir() if p.is_dir()] if tmp_path.exists() else []
    return code, out, err, folders[0] if folders else None


def test_same_rig_twice_is_bit_for_bit(runs: dict[str, Path], tmp_path: Path,
                                       capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _, folder = compare(tmp_path, runs["a"], runs["b"], capsys=capsys)
    assert code == 0
    assert "aligned by tick" in out and "0 beyond tolerance" in out
    assert folder is not None
    doc = json.loads((folder / "comparison.json").read_text())
    assert doc["agree"] and all(s["bit_identical"] for s in doc["signals"])
    assert {s["signal"] for s in doc["signals"]} >= {"y:belt_speed", "x:current", "u:voltage",
                                                     "cmd:voltage", "sent:belt_speed",
                                                     "ref:speed_setpoint"}
    assert doc["outcomes"]["a"]["ended"] == doc["outcomes"]["b"]["ended"] == "completed"


def test_changed_gain_differs_and_numbers_match_numpy(
        runs: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _, folder = compare(tmp_path, runs["a"], runs["gain"], "--tol",
                                   "y:*=0.01", capsys=capsys)
    assert code == 1 and "runs DIFFER: signals beyond tolerance" in out
    assert folder is not None
    a, b = read_run(runs["a"]), read_run(runs["gain"])
    with open(folder / "deviations.csv") as f:
        rows = {r["signal"]: r for r in csv.DictReader(f)}
    for column in ("y:belt_speed", "x:motor_speed", "u:voltage"):
        d = np.abs(a[column] - b[column])
        assert float(rows[column]["max_abs"]) == pytest.approx(d.max(), rel=1e-12)
        assert float(rows[column]["rms"]) == pytest.approx(np.sqrt(np.mean(d * d)),
                                                           rel=1e-12)
        assert float(rows[column]["t_max_abs"]) == pytest.approx(a.t[np.argmax(d)])
        scale = np.abs(a[column]).max()
        assert float(rows[column]["max_rel"]) == pytest.approx(d.max() / scale, rel=1e-12)
    # y has an absolute tolerance of 0.01: the first tick beyond is the first d > 0.01
    d = np.abs(a["y:belt_speed"] - b["y:belt_speed"])
    first = int(np.argmax(d > 0.01))
    assert int(rows["y:belt_speed"]["first_beyond_tick"]) == first
    # before the set point's first step (0.2 s, configs/conveyor.toml) nothing can differ
    assert a.t[first] > 0.2
    assert rows["ref:speed_setpoint"]["bit_identical"] == "True"
    for name in ("index.html", "events.csv", "plots/y_belt_speed.png"):
        assert (folder / name).stat().st_size > 0
    assert "y_belt_speed.png" in (folder / "index.html").read_text()


def test_tolerance_wide_enough_agrees(runs: dict[str, Path], tmp_path: Path,
                                      capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _, _ = compare(tmp_path, runs["a"], runs["gain"], "--rel", "0.5",
                              "--no-plots", capsys=capsys)
    assert code == 0 and "runs agree" in out


def test_tolerance_file(runs: dict[str, Path], tmp_path: Path,
                        capsys: pytest.CaptureFixture[str]) -> None:
    good = tmp_path / "tol.toml"
    good.write_text('[default]\nrel = 0.5\n[signals."x:motor_speed"]\nabs = 1.0\n')
    code, out, _, _ = compare(tmp_path / "o1", runs["a"], runs["gain"], "--tolerances",
                              str(good), "--no-plots", capsys=capsys)
    assert code == 1 and "BEYOND x:motor_speed" in out
    bad = tmp_path / "bad.toml"
    bad.write_text('[default]\nabss = 0.1\n[signals."y:*"]\nrel = -1\n')
    code, _, err, folder = compare(tmp_path / "o2", runs["a"], runs["b"], "--tolerances",
                                   str(bad), capsys=capsys)
    assert code == 2 and folder is None
    assert f"{bad}: default.abss: unknown key" in err
    assert f"{bad}: signals.y:*.rel: expected a number >= 0, found int -1" in err
    code, _, err, _ = compare(tmp_path / "o3", runs["a"], runs["b"], "--tol", "y:*=x",
                              capsys=capsys)
    assert code == 2 and "expected SIGNAL=ABS" in err


def test_different_rigs_are_refused(runs: dict[str, Path], tmp_path: Path,
                                    capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err, folder = compare(tmp_path, runs["a"], runs["tank"], capsys=capsys)
    assert code == 2 and folder is None and out == ""
    assert "not of compatible rigs" in err
    assert "y signals differ: only in A ['y:belt_speed', 'y:motor_current'], only in B " \
           "['y:level', 'y:temperature']" in err
    code, _, err, _ = compare(tmp_path, runs["a"], tmp_path, capsys=capsys)
    assert code == 2 and "not a finished run folder" in err


def test_different_ticks_are_resampled(runs: dict[str, Path]) -> None:
    c = compare_runs(runs["a"], runs["slow"], envelopes=False)
    assert c.alignment.startswith("resampled: on the 0.002 s grid of B")
    assert c.ticks_compared == 1500
    a, b = read_run(runs["a"]), read_run(runs["slow"])
    # tick j of the 2 ms run meets tick 2j of the 1 ms run (same plant time)
    d = np.abs(a["y:belt_speed"][::2] - b["y:belt_speed"])
    y = next(s for s in c.signals if s.signal == "y:belt_speed")
    assert y.max_abs == pytest.approx(d.max(), rel=1e-12)


def test_rehearsal_events_side_by_side(tmp_path: Path,
                                       capsys: pytest.CaptureFixture[str]) -> None:
    a = run(tmp_path, GUARDED, "--scenario", str(STUCK))
    b = run(tmp_path, GUARDED, "--scenario", str(STUCK), "--set",
            "controller.loops[0].ki=300")
    capsys.readouterr()
    c = compare_runs(a, b, envelopes=False)
    trips_a = [e for e in read_run(a).events if e["kind"] == "trip"]
    trips_b = [e for e in read_run(b).events if e["kind"] == "trip"]
    assert trips_a and trips_b
    pair = next(p for p in c.events if p.kind == "trip")
    assert pair.what == trips_a[0]["name"] == "belt_overspeed"
    assert pair.t_a == trips_a[0]["time"] and pair.t_b == trips_b[0]["time"]
    assert pair.dt == pytest.approx(trips_b[0]["time"] - trips_a[0]["time"])
    phases = [p for p in c.events if p.kind == "phase"]
    assert {p.what for p in phases} >= {"surge", "sensor_stuck"}
    assert all(p.dt == 0 for p in phases if p.what in ("surge", "sensor_stuck"))
    assert c.outcomes["a"]["verdicts"] and set(c.outcomes["a"]["verdicts"]) == set(
        c.outcomes["b"]["verdicts"])


def test_events_pair_by_their_name_not_their_wording() -> None:
    """Two faults named by the engine's default "<kind>:<target>" share the text before
    their first colon, and B words its details otherwise: each still meets its own."""
    def ev(t: float, kind: str, name: str, detail: str) -> dict[str, object]:
        return {"tick": round(t * 1000), "time": t, "kind": kind, "detail": detail,
                "name": name}

    a = [ev(0.1, "fault_injected", "sensor_bias:level", "sensor_bias:level: sensor_bias on "
                                                        "level (value=0.1), until cleared"),
         ev(0.2, "fault_injected", "sensor_bias:flow", "sensor_bias:flow: sensor_bias on "
                                                       "flow (value=0.1), until cleared"),
         ev(0.5, "trip", "high_level", "high_level: limit level_high: ...; inputs to safe "
                                       "values")]
    b = [ev(0.1, "fault_injected", "sensor_bias:flow", "flow biased"),
         ev(0.2, "fault_injected", "sensor_bias:level", "level biased"),
         ev(0.5, "trip", "high_level", "tank too full")]
    got = {(p.kind, p.what): (p.t_a, p.t_b) for p in pair_events(a, b, 0.0)}
    assert got == {("fault_injected", "sensor_bias:level"): (0.1, 0.2),
                   ("fault_injected", "sensor_bias:flow"): (0.2, 0.1),
                   ("trip", "high_level"): (0.5, 0.5)}


def test_a_comparison_read_in_parts_equals_one_read_whole(
        runs: dict[str, Path], monkeypatch: pytest.MonkeyPatch) -> None:
    """Long runs are compared a part at a time; parts of a few plot buckets give the same
    figures and bands as one part (the tick and the resampled alignment)."""
    import plantrig.sim.records._compare as module

    for a, b in ((runs["a"], runs["gain"]), (runs["a"], runs["slow"])):
        whole = compare_runs(a, b)
        # a few buckets a part: 17 ticks is 8 buckets of 2 ticks (16, rounded down to
        # whole buckets) on the 3000-tick grid, 17 of 1 on the 1500-tick one; both
        # grids end in a short part
        monkeypatch.setattr(module, "PART_TICKS", 17)
        parts = compare_runs(a, b)
        monkeypatch.undo()
        assert [s.signal for s in parts.signals] == [s.signal for s in whole.signals]
        for p, w in zip(parts.signals, whole.signals, strict=True):
            assert (p.max_abs, p.t_max_abs, p.first_beyond_tick, p.ticks_beyond,
                    p.bit_identical, p.scale) == (w.max_abs, w.t_max_abs,
                                                  w.first_beyond_tick, w.ticks_beyond,
                                                  w.bit_identical, w.scale)
            assert p.rms == pytest.approx(w.rms, rel=1e-12)
            for field in ("t", "a_lo", "a_hi", "b_lo", "b_hi", "d_hi"):
                np.testing.assert_array_equal(getattr(parts.envelopes[p.signal], field),
                                              getattr(whole.envelopes[w.signal], field))
