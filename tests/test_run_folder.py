"""A run folder stands alone and is read as data.

The shipped tank rehearsal is run from a copy of configs/, the copy is deleted and the
folder moved elsewhere (what another machine sees); check, replay, report, export and
verify then work from the folder alone. A folder whose model module writes a marker
file when imported is opened by every read-only command: no marker, while
``check --trust-model`` (which must build the model) does write it, so the marker
could have shown up. Replay runs as a real dearpygui window under Xvfb (fixture from
tests/conftest.py) and its screenshot is checked.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import subprocess
import sys
import tomllib
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import pytest
from test_gui import check_screenshot

from plantrig.sim import (
    ModelNotLoaded,
    RigFileError,
    load_rig,
    load_rig_as_data,
    model_module,
    rig_from_record,
    run_folder_of,
    verify_folder,
)
from plantrig.sim.records._manifest import write_manifest
from plantrig.sim.records._sources import point_module_at

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ROOT / "configs"
RIG = Path("rehearsals") / "tank_guarded.toml"
SCENARIO = Path("rehearsals") / "heater_stuck_on.toml"
MODEL = Path("tank_model.py")
GUARD_S = 240.0          # a hang guard only; nothing here measures time
# the console script, as a user runs it: its folder, not the working folder, is on sys.path
PLANTRIG = str(Path(sys.executable).with_name("plantrig"))


def plantrig(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([PLANTRIG, *args], cwd=cwd, capture_output=True, text=True,
                          timeout=GUARD_S)


def at_once(*jobs: Callable[[], Any]) -> list[Any]:
    """Run the jobs (each its commands one after another) at the same time; their results."""
    with ThreadPoolExecutor(max_workers=len(jobs)) as pool:
        return [f.result() for f in [pool.submit(job) for job in jobs]]


@pytest.fixture(scope="module")
def received(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The tank rehearsal's run folder, as another machine receives it.

    Run from a copy of the three source files, which is then deleted, and moved away:
    nothing the folder could point back to exists any more.
    """
    bench = tmp_path_factory.mktemp("bench")
    for rel in (RIG, SCENARIO, MODEL):
        (bench / "configs" / rel).parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(CONFIGS / rel, bench / "configs" / rel)
    done = plantrig("run", f"configs/{RIG}", "--scenario", f"configs/{SCENARIO}",
                    "--out", "runs", cwd=bench)
    assert done.returncode == 0, done.stdout + done.stderr
    [folder] = [p for p in (bench / "runs").iterdir() if p.is_dir()]
    shutil.rmtree(bench / "configs")
    away = tmp_path_factory.mktemp("elsewhere") / "received" / folder.name
    away.parent.mkdir()
    shutil.move(folder, away)
    return away


def made(folder: Path, name: str) -> bool:
    """A report or export file somewhere in the folder (where they go is not tested here)."""
    return any(path.is_file() for path in folder.rglob(name))


def copy_of(folder: Path, tmp_path: Path) -> Path:
    return Path(shutil.copytree(folder, tmp_path / "copy" / folder.name))


def test_rig_copy_names_the_module_beside_it_and_nothing_else_changes(received):
    original = (CONFIGS / RIG).read_bytes().decode().splitlines(keepends=True)
    copied = (received / "rig.toml").read_bytes().decode().splitlines(keepends=True)
    assert len(copied) == len(original)
    changed = [(a, b) for a, b in zip(original, copied, strict=True) if a != b]
    assert changed == [('module = "../tank_model.py"\n', 'module = "tank_model.py"\n')]
    assert (received / "tank_model.py").read_bytes() == (CONFIGS / MODEL).read_bytes()
    assert (received / "scenario.toml").read_bytes() == (CONFIGS / SCENARIO).read_bytes()

    sources = json.loads((received / "sources.json").read_text())
    files = sources["files"]
    assert {name: entry["role"] for name, entry in files.items()} == {
        "rig.toml": "rig", "tank_model.py": "model", "scenario.toml": "scenario"}
    for name, rel in (("rig.toml", RIG), ("tank_model.py", MODEL), ("scenario.toml", SCENARIO)):
        data = (CONFIGS / rel).read_bytes()
        assert files[name]["sha256"] == hashlib.sha256(data).hexdigest()
        assert files[name]["bytes"] == len(data)
        assert Path(files[name]["original"]).name == rel.name
    assert files["rig.toml"]["copy_sha256"] == hashlib.sha256(
        (received / "rig.toml").read_bytes()).hexdigest()
    assert files["rig.toml"]["rewritten"] == {
        "plant.module": {"from": "../tank_model.py", "to": "tank_model.py"}}
    listed = json.loads((received / "manifest.json").read_text())["files"]
    assert {"sources.json", "rig.toml", "tank_model.py", "scenario.toml"} <= set(listed)
    assert verify_folder(received).ok


def test_folder_alone_checks_replays_reports_exports_and_verifies(received, xvfb,
                                                                  tmp_path):
    folder = copy_of(received, tmp_path)
    elsewhere = tmp_path / "cwd"
    elsewhere.mkdir()
    done = plantrig("verify", str(folder), cwd=elsewhere)
    assert done.returncode == 0, done.stdout + done.stderr

    done = plantrig("check", "--trust-model", str(folder / "rig.toml"), cwd=elsewhere)
    assert done.returncode == 0, done.stdout + done.stderr
    module_line = done.stdout.splitlines()[0]
    digest = hashlib.sha256((folder / "tank_model.py").read_bytes()).hexdigest()
    assert str(folder / "tank_model.py") in module_line and digest in module_line
    assert f"{folder / 'rig.toml'}: ok" in done.stdout

    shot = tmp_path / "replay.png"
    # the replay only reads the folder: it runs beside the report and the export
    replayed, (reported, exported) = at_once(
        lambda: plantrig("replay", str(folder), "--screenshot", str(shot), cwd=elsewhere),
        lambda: (plantrig("report", str(folder), cwd=elsewhere),
                 plantrig("export", str(folder), "--csv", "--mat", cwd=elsewhere)))
    assert replayed.returncode == 0, replayed.stdout + replayed.stderr
    regions = json.loads(shot.with_suffix(".regions.json").read_text())
    check_screenshot(shot, regions, {"plot.0": "y", "plot.2": "u"})

    assert reported.returncode == 0, reported.stdout + reported.stderr
    assert made(folder, "report.html") and made(folder, "report.pdf")
    assert exported.returncode == 0, exported.stdout + exported.stderr
    assert made(folder, "ticks.csv") and made(folder, "run.mat")
    done = plantrig("verify", str(folder), cwd=elsewhere)
    assert done.returncode == 0, done.stdout + done.stderr


MARKER_CODE = "\nimport pathlib as _p\n_p.Path({path!r}).write_text('imported')\n"


def plant_code(folder: Path, marker: Path) -> None:
    """What a hostile sender does: code that runs on import, a fresh manifest over it."""
    with open(folder / "tank_model.py", "a", encoding="utf-8") as f:
        f.write(MARKER_CODE.format(path=str(marker)))
    for name in ("numpy.py", "h5py.py", "sitecustomize.py", "dearpygui.py"):
        (folder / name).write_text(MARKER_CODE.format(path=str(marker) + "." + name))
    write_manifest(folder)


def test_read_only_commands_never_import_code_from_the_folder(received, xvfb,
                                                              tmp_path):
    # two copies, each with its own marker, so the commands run in two lines at once and
    # a marker still names the line that wrote it
    folders, markers = [], []
    for line in ("a", "b"):
        folders.append(Path(shutil.copytree(received, tmp_path / line / received.name)))
        markers.append(tmp_path / f"marker-{line}")
        plant_code(folders[-1], markers[-1])

    def no_marker(after: str, marker: Path) -> None:
        planted = sorted(p.name for p in tmp_path.glob(f"{marker.name}*"))
        assert planted == [], f"{after} ran code from the folder: {planted}"

    shot = tmp_path / "replay.png"
    key = tmp_path / "key"
    assert plantrig("keygen", "--out", str(key), cwd=tmp_path).returncode == 0

    def run_in(folder: Path, marker: Path, runs: list[tuple[tuple[str, ...], int]]) -> None:
        for args, code in runs:          # from inside the folder too: no cwd imports
            done = plantrig(*args, cwd=folder)
            assert done.returncode == code, f"{args}: {done.stdout}{done.stderr}"
            no_marker(args[0], marker)

    a, b = folders
    at_once(lambda: run_in(a, markers[0], [
                (("report", str(a)), 0),
                (("recover", str(a)), 2)]),                 # ended cleanly: nothing to do
            lambda: run_in(b, markers[1], [
                (("verify", str(b)), 0),
                (("replay", str(b), "--screenshot", str(shot)), 0),
                (("export", str(b), "--csv", "--mat"), 0),
                (("sign", str(b), "--key", f"{key}.private.pem"), 0),
                (("verify", str(b), "--public-key", f"{key}.public.pem"), 0),
                (("compare", str(b), str(received), "--out", str(tmp_path / "cmp")), 0)]))
    assert shot.is_file()
    assert sorted(p.name for p in tmp_path.glob("marker*")) == []
    folder, marker = a, markers[0]

    done = plantrig("check", str(folder / "rig.toml"), cwd=folder)
    assert done.returncode == 2
    assert "came with the run folder" in done.stderr and "--trust-model" in done.stderr
    no_marker("check", marker)
    # the control: building the model does run its code, so the marker can appear
    done = plantrig("check", "--trust-model", str(folder / "rig.toml"), cwd=tmp_path)
    assert done.returncode == 0, done.stdout + done.stderr
    assert marker.read_text() == "imported"


def test_old_folder_whose_module_path_points_nowhere_still_replays(received, xvfb,
                                                                    tmp_path):
    """Folders written before the copy was rewritten name '../tank_model.py'."""
    folder = copy_of(received, tmp_path)
    rig = folder / "rig.toml"
    rig.write_text(rig.read_text().replace('module = "tank_model.py"',
                                           'module = "../tank_model.py"'))
    (folder / "sources.json").unlink()
    write_manifest(folder)
    shot = tmp_path / "replay.png"
    done = plantrig("replay", str(folder), "--screenshot", str(shot), cwd=tmp_path)
    assert done.returncode == 0, done.stdout + done.stderr
    regions = json.loads(shot.with_suffix(".regions.json").read_text())
    check_screenshot(shot, regions, {"plot.0": "y"})


def test_folder_whose_rig_file_this_version_cannot_read_replays_from_the_record(
        received, xvfb, tmp_path):
    """Another plantrig version wrote it: the rig file has a key this one does not know."""
    folder = copy_of(received, tmp_path)
    rig = folder / "rig.toml"
    rig.write_text(rig.read_text().replace("[rig]\n", "[rig]\nkey_of_a_later_version = 1\n"))
    write_manifest(folder)
    shot = tmp_path / "replay.png"
    done = plantrig("replay", str(folder), "--screenshot", str(shot), cwd=tmp_path)
    assert done.returncode == 0, done.stdout + done.stderr
    assert "warning:" in done.stderr and "key_of_a_later_version" in done.stderr
    assert "run_start.json" in done.stderr
    regions = json.loads(shot.with_suffix(".regions.json").read_text())
    check_screenshot(shot, regions, {"plot.0": "y", "plot.2": "u"})


def test_rig_from_the_record_has_the_signals_of_the_rig_file(received):
    recorded, data = rig_from_record(received), load_rig_as_data(received / "rig.toml")
    assert (recorded.name, recorded.tick, recorded.duration) == (
        data.name, data.tick, data.duration)
    for group in ("states", "inputs", "outputs"):
        assert [(s.name, s.unit, s.min, s.max) for s in getattr(recorded, group)] == [
            (s.name, s.unit, s.min, s.max) for s in getattr(data, group)], group
    assert recorded.plant.shape == data.plant.shape
    assert recorded.controller.kind != "external"          # built-in PI loops, no link
    with pytest.raises(ModelNotLoaded):
        recorded.plant.output(0.0, recorded.x0, [0.0, 0.0], {})


def test_rig_read_as_data_matches_the_loaded_rig_but_cannot_run_its_model(tmp_path):
    marker = tmp_path / "marker"
    shutil.copyfile(CONFIGS / "tank.toml", tmp_path / "tank.toml")
    source = (CONFIGS / MODEL).read_text() + MARKER_CODE.format(path=str(marker))
    (tmp_path / "tank_model.py").write_text(source)
    data = load_rig_as_data(tmp_path / "tank.toml")
    assert not marker.exists()
    loaded = load_rig(tmp_path / "tank.toml")
    assert marker.exists()                       # load_rig does import it
    for field in ("name", "tick", "duration", "states", "inputs", "outputs", "references",
                  "controller", "limits", "interlocks", "method", "substeps"):
        assert getattr(data, field) == getattr(loaded, field), field
    assert data.plant.shape == loaded.plant.shape and data.plant.params == loaded.plant.params
    with pytest.raises(ModelNotLoaded):
        data.plant.dynamics(0.0, data.x0, [0.0, 0.0], data.plant.params)
    assert model_module(tmp_path / "tank.toml") == (tmp_path / "tank_model.py").resolve()
    assert model_module(CONFIGS / "conveyor.toml") is None            # an LTI plant
    assert run_folder_of(tmp_path / "tank_model.py") is None
    (tmp_path / "manifest.json").write_text('{"format": "something else"}')
    assert run_folder_of(tmp_path / "tank_model.py") is None          # not ours
    (tmp_path / "run_start.json").write_text("{}")
    assert run_folder_of(tmp_path / "tank_model.py") == tmp_path.resolve()


@pytest.mark.parametrize("before, after", [
    ('[plant]\nkind = "ode"\nmodule = "../m.py"\n',
     '[plant]\nkind = "ode"\nmodule = "m.py"\n'),
    ("[plant]\r\nkind = 'ode'\r\nmodule = '../models/m.py'  # the model\r\n",
     "[plant]\r\nkind = 'ode'\r\nmodule = \"m.py\"  # the model\r\n"),
    ('[ plant ] # table\nmodule="/abs/m.py"\n[plant.params]\nmodule = "kept"\n',
     '[ plant ] # table\nmodule="m.py"\n[plant.params]\nmodule = "kept"\n'),
    ('plant.module = "sub/m.py"\nplant.kind = "ode"\n[rig]\nname = "x"\n',
     'plant.module = "m.py"\nplant.kind = "ode"\n[rig]\nname = "x"\n'),
])
def test_module_key_rewritten_and_every_other_byte_kept(before, after):
    assert point_module_at(before.encode(), "m.py", Path("rig.toml")) == after.encode()


@pytest.mark.parametrize("text", [
    'plant = { kind = "ode", module = "../m.py" }\n',          # inline table
    '[plant]\nmodule = """../m.py"""\n',                       # multi-line string
])
def test_module_key_it_cannot_rewrite_is_a_clear_rig_error(text):
    with pytest.raises(RigFileError) as err:
        point_module_at(text.encode(), "m.py", Path("rig.toml"))
    assert "plant.module" in str(err.value) and "rig.toml" in str(err.value)


def test_check_of_a_shipped_rig_prints_the_module_it_loads():
    done = plantrig("check", str(CONFIGS / "tank.toml"), cwd=ROOT)
    assert done.returncode == 0, done.stderr
    digest = hashlib.sha256((CONFIGS / MODEL).read_bytes()).hexdigest()
    assert done.stdout.splitlines()[0] == (
        f"loading model module {(CONFIGS / MODEL).resolve()} (SHA-256 {digest}): "
        "this runs its code")
    assert tomllib.loads((CONFIGS / "tank.toml").read_text())["plant"]["kind"] == "ode"
