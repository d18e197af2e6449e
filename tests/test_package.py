"""Package shape: the public surface is what it claims, io/ never shadows the stdlib."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

import plantrig
import plantrig.gui
import plantrig.io
import plantrig.sim

REPO = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("module", [plantrig.sim, plantrig.io, plantrig.gui],
                         ids=["sim", "io", "gui"])
def test_exports_are_what_they_claim(module: object) -> None:
    # after trio's test_exports: every name in __all__ exists and is not private
    names = getattr(module, "__all__", [])
    for name in names:
        assert not name.startswith("_")
        assert hasattr(module, name), name
    assert len(names) == len(set(names))


def test_sim_imports_nothing_of_io_or_gui() -> None:
    code = ("import sys, plantrig.sim; "
            "bad = [m for m in sys.modules if m.startswith(('plantrig.io', 'plantrig.gui'))]; "
            "print(bad); sys.exit(1 if bad else 0)")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60)
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_io_folder_never_shadows_the_standard_library() -> None:
    # run from the repository root, where a folder named io/ sits on sys.path[0]
    code = "import io, sys; print(io.__name__, getattr(io, '__file__', 'frozen')); " \
           "import plantrig.io; print(plantrig.io.__name__)"
    proc = subprocess.run([sys.executable, "-c", code], cwd=REPO, capture_output=True,
                          text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    first = proc.stdout.splitlines()[0]
    assert str(REPO / "io") not in first
    assert hasattr(__import__("io"), "BytesIO")


# libraries only some commands need; each loads where it is used
HEAVY = {"scipy", "h5py", "matplotlib", "dask", "distributed", "pyarrow", "pymodbus",
         "aiomqtt", "paho", "serial", "tqdm", "cryptography", "dearpygui", "fmpy", "control"}
LOADED_AT_EXIT = ("import atexit, sys; atexit.register(lambda: print(' '.join("
                  "{m.split('.')[0] for m in sys.modules}), file=sys.stderr)); ")


def packages_loaded(code: str, *args: str) -> set[str]:
    """The top-level packages a fresh interpreter holds when ``code`` has run."""
    proc = subprocess.run([sys.executable, "-c", LOADED_AT_EXIT + code, *args], cwd=REPO,
                          capture_output=True, text=True, timeout=60)
    assert "Traceback" not in proc.stderr, proc.stderr
    return set(proc.stderr.split("\n")[-2].split())


def test_help_and_check_load_only_what_they_need() -> None:
    cli = "from plantrig.cli import main; sys.exit(main(sys.argv[1:]))"
    assert packages_loaded(cli, "--help") & (HEAVY | {"numpy"}) == set()
    assert packages_loaded(cli, "check", "configs/tank.toml") & HEAVY == set()
    # an LTI rig's summary builds its stepper, which discretises with scipy's expm
    # (docs/performance.md, start-up); no other heavy library
    for rig in ("conveyor.toml", "conveyor_hil.toml", "conveyor_mqtt.toml",
                "conveyor_modbus.toml"):
        loaded = packages_loaded(cli, "check", f"configs/{rig}") & (HEAVY - {"scipy"})
        assert (rig, loaded) == (rig, set())


def test_link_workers_load_no_simulator() -> None:
    # the worker processes start as `python -m plantrig.io._mqtt_worker` (and _modbus_):
    # plantrig.io's names load on first use, so nothing of the rig model comes along
    code = "import plantrig.io._mqtt_worker, plantrig.io._modbus_worker"
    assert packages_loaded(code) & {"numpy", "scipy"} == set()


def test_every_subcommand_has_help() -> None:
    from plantrig.cli import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    for name in sub.choices:  # type: ignore[union-attr]
        proc = subprocess.run([sys.executable, "-m", "plantrig", name, "--help"],
                              capture_output=True, text=True, timeout=60)
        assert proc.returncode == 0 and "usage: plantrig" in proc.stdout, name


def test_version() -> None:
    proc = subprocess.run([sys.executable, "-m", "plantrig", "--version"], capture_output=True,
                          text=True, timeout=60)
    assert proc.stdout.strip() == f"plantrig {plantrig.__version__}"
