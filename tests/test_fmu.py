"""FMU plants: FMUs of our own, built at test time (tests/fmu_build.py), against the
Python version of the same equations; clear rig-file mistakes for a bad FMU."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from fmu_build import PARAMETERS, build_fmu

from plantrig.sim import RigFileError, load_rig, load_rig_as_data, simulate

# the conveyor drive's equations in Python (configs/conveyor.toml's header), with the
# FMU's parameter names: the reference the FMU must match
PYTHON_MODEL = '''
import numpy as np


def f(t, x, u, p):
    i, w, v = x
    return np.array([(u[0] - p["R"] * i - p["Ke"] * w) / p["L"],
                     (p["Ke"] * i - p["bm"] * w - p["bc"] * (w - p["g"] * v)) / p["Jm"],
                     (p["g"] * p["bc"] * (w - p["g"] * v) - p["bl"] * v) / p["M"]])


def h(t, x, u, p):
    return np.array([x[2], x[0]])
'''

RIG = """
[rig]
tick = 0.001
duration = 0.4

[plant]
{plant}
x0 = [0.5, 10.0, 0.05]
states = [{{ name = "current" }}, {{ name = "motor_speed" }}, {{ name = "belt_speed" }}]
inputs = [{{ name = "voltage" }}]
outputs = [{{ name = "belt_speed" }}, {{ name = "motor_current" }}]

[plant.params]
{params}

[[references]]
name = "v"
kind = "sine"
low = -6.0
high = 12.0
hz = 3.0

[controller]
kind = "open_loop"
drive = {{ voltage = "v" }}
"""


@pytest.fixture(scope="module")
def fmu_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("fmu")
    build_fmu(folder)
    (folder / "conveyor_model.py").write_text(PYTHON_MODEL)
    return folder


def rig_file(folder: Path, plant: str, params: dict[str, float], name: str) -> Path:
    path = folder / name
    path.write_text(RIG.format(plant=plant, params="\n".join(f"{k} = {v!r}"
                                                             for k, v in params.items())))
    return path


def python_twin(folder: Path, params: dict[str, float], substeps: int) -> np.ndarray:
    plant = ('kind = "ode"\nmodule = "conveyor_model.py"\ndynamics = "f"\noutput = "h"\n'
             f'method = "rk4"\nsubsteps = {substeps}')
    all_params = {**dict(PARAMETERS), **params}
    return simulate(load_rig(rig_file(folder, plant, all_params, "python.toml"))).rows


@pytest.mark.parametrize("params", [{}, {"R": 2.0, "bl": 30.0}], ids=["defaults", "set"])
def test_model_exchange_matches_the_python_equations(fmu_dir: Path,
                                                     params: dict[str, float]) -> None:
    plant = 'kind = "fmu"\nfile = "conveyor.fmu"\ninterface = "model_exchange"\nsubsteps = 2'
    rig = load_rig(rig_file(fmu_dir, plant, params, "me.toml"))
    rows = simulate(rig).rows
    ref = python_twin(fmu_dir, params, 2)
    scale = np.max(np.abs(ref), axis=0)
    assert np.max(np.abs(rows - ref) / np.where(scale > 0, scale, 1)) < 1e-10
    if params:   # the rig's parameters reached the FMU: the response differs from defaults
        assert np.max(np.abs(ref - python_twin(fmu_dir, {}, 2))) > 1e-3


def test_co_simulation_matches_the_python_equations(fmu_dir: Path) -> None:
    # the FMU's doStep takes cs_substeps RK4 substeps (tests/fmu/conveyor.c)
    plant = 'kind = "fmu"\nfile = "conveyor.fmu"\ninterface = "co_simulation"'
    rows = simulate(load_rig(rig_file(fmu_dir, plant, {"cs_substeps": 3.0, "R": 1.5},
                                      "cs.toml"))).rows
    ref = python_twin(fmu_dir, {"R": 1.5}, 3)
    scale = np.max(np.abs(ref), axis=0)
    assert np.max(np.abs(rows - ref) / np.where(scale > 0, scale, 1)) < 1e-10


@pytest.mark.parametrize(("build", "plant", "key", "said"), [
    ({}, 'kind = "fmu"\nfile = "absent.fmu"', "plant.file", "found no file"),
    ({"platform": "win64", "name": "win.fmu"}, 'kind = "fmu"\nfile = "win.fmu"', "plant.file",
     "expected a binary for this platform (linux64), found binaries for win64"),
    ({"voltage_causality": "output", "name": "causal.fmu"},
     'kind = "fmu"\nfile = "causal.fmu"', "plant.inputs[0].name",
     "expected 'voltage' to have causality input, found output"),
    ({}, 'kind = "fmu"\nfile = "conveyor.fmu"\nvariables = { motor_current = "motor_curent" }',
     "plant.variables.motor_current", "did you mean 'motor_current'?"),
    ({}, 'kind = "fmu"\nfile = "conveyor.fmu"\ninterface = "cosim"', "plant.interface",
     "expected one of"),
])
def test_bad_fmu_is_a_rig_file_mistake(fmu_dir: Path, build: dict[str, str], plant: str,
                                       key: str, said: str) -> None:
    if build:
        build_fmu(fmu_dir, **build)
    path = rig_file(fmu_dir, plant, {}, "bad.toml")
    proc = subprocess.run([sys.executable, "-m", "plantrig", "check", str(path)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert "Traceback" not in proc.stderr
    assert f"{path}: {key}: " in proc.stderr and said in proc.stderr, proc.stderr


def test_unknown_parameter_names_the_known_ones(fmu_dir: Path) -> None:
    with pytest.raises(RigFileError, match=r"plant.params.Rr: expected a parameter of "
                                           r"conveyor.fmu .*did you mean 'R'\?"):
        load_rig(rig_file(fmu_dir, 'kind = "fmu"\nfile = "conveyor.fmu"', {"Rr": 1.0},
                          "param.toml"))


def test_reading_as_data_never_loads_the_fmu(tmp_path: Path) -> None:
    (tmp_path / "conveyor.fmu").write_bytes(b"not a zip: loading this would fail")
    rig = load_rig_as_data(rig_file(tmp_path, 'kind = "fmu"\nfile = "conveyor.fmu"', {},
                                    "data.toml"))
    assert rig.plant.shape == (3, 1, 2)


def test_check_names_the_fmu_and_run_copies_it(fmu_dir: Path, tmp_path: Path) -> None:
    path = rig_file(fmu_dir, 'kind = "fmu"\nfile = "conveyor.fmu"', {}, "run.toml")
    check = subprocess.run([sys.executable, "-m", "plantrig", "check", str(path)],
                           capture_output=True, text=True, timeout=120)
    assert check.returncode == 0, check.stderr
    import hashlib
    digest = hashlib.sha256((fmu_dir / "conveyor.fmu").read_bytes()).hexdigest()
    assert f"model FMU {fmu_dir / 'conveyor.fmu'} (SHA-256 {digest})" in check.stdout
    assert "model exchange FMU conveyor.fmu" in check.stdout
    run = subprocess.run([sys.executable, "-m", "plantrig", "run", str(path), "--fast",
                          "--out", str(tmp_path)], capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    folder = next(p for p in tmp_path.iterdir() if p.is_dir())
    assert (folder / "conveyor.fmu").read_bytes() == (fmu_dir / "conveyor.fmu").read_bytes()
    sources = json.loads((folder / "sources.json").read_text())
    assert sources["files"]["conveyor.fmu"]["sha256"] == digest
    assert 'file = "conveyor.fmu"' in (folder / "rig.toml").read_text()
