"""What a run used that the rig file cannot say: the device under test, the port, baud
rate or broker really connected, the software it ran on, and the wall-clock time of
tick 0.

The copied rig.toml says what the file asked for (``port = "/dev/ttyUSB0"``); a run
started with ``--port /dev/ttyACM1`` used another one. These facts are recorded at run
time, in ``run_start.json`` before the first tick and in ``summary.json`` after the
last, so the record says what really happened.
"""

from __future__ import annotations

import datetime as _dt
import importlib.metadata
import json
import platform
import socket
import subprocess
from pathlib import Path
from typing import Any

from plantrig.sim.config._dut import DutSpec
from plantrig.sim.records._manifest import write_atomic
from plantrig.sim.records._records import RUN_START


def run_info_of(run_info: dict[str, Any] | None, link: Any, dut: DutSpec) -> dict[str, Any]:
    """``run_info`` as given, with the rig file's device under test as "dut", the
    software as "environment" and the link's own ``describe()`` as "link_used", unless
    the caller said them already."""
    info = dict(run_info or {})
    if "dut" not in info and dut.named:
        info["dut"] = dut.as_dict()
    info.setdefault("environment", environment())
    describe = getattr(link, "describe", None)
    if "link_used" not in info and callable(describe):
        info["link_used"] = describe()
    return info


def add_to_run_start(folder: Path, info: dict[str, Any], sync: bool = True) -> None:
    """Add ``info`` to the folder's run_start.json (atomically, before the first tick)."""
    if not info:
        return
    path = Path(folder) / RUN_START
    start = json.loads(path.read_text())
    start.update(info)
    write_atomic(path, (json.dumps(start, indent=2) + "\n").encode(), sync=sync)


def note_tick0(folder: Path, unix_ns: int) -> None:
    """Add tick 0's UTC time to run_start.json as the loop starts, so a run whose rig is
    killed (rebuilt by plantrig recover) still says when tick 0 began. Replaced by
    rename but not synced: it runs in the lead before tick 0's deadline, and the page
    cache outlives a killed process. A note that cannot be written (a full disk) is left
    out: the summary still says it, and the run is not stopped for it."""
    try:
        add_to_run_start(folder, {"tick0_utc": utc_of(unix_ns)}, sync=False)
    except OSError:
        pass


def utc_of(unix_ns: int | None) -> str | None:
    """ISO 8601 UTC, to the microsecond, of a time.time_ns() value."""
    if unix_ns is None:
        return None
    return _dt.datetime.fromtimestamp(unix_ns / 1e9, _dt.UTC).isoformat(
        timespec="microseconds")


def environment() -> dict[str, str | None]:
    """Host, Python and library versions, and the git commit of the plantrig source when
    it runs from a git checkout (None otherwise; "+ local changes" when it differs)."""
    from plantrig import __version__

    env: dict[str, str | None] = {"plantrig": __version__, "host": socket.gethostname(),
                                  "python": platform.python_version()}
    for package in ("numpy", "scipy", "h5py"):
        try:
            env[package] = importlib.metadata.version(package)
        except importlib.metadata.PackageNotFoundError:
            env[package] = None
    env["git_commit"] = _git_commit(Path(__file__).resolve().parent)
    return env


def _git_commit(where: Path) -> str | None:
    try:
        head = subprocess.run(["git", "-C", str(where), "rev-parse", "HEAD"],
                              capture_output=True, text=True, timeout=5)
        if head.returncode != 0:
            return None
        changed = subprocess.run(["git", "-C", str(where), "status", "--porcelain",
                                  "--untracked-files=no"], capture_output=True, text=True,
                                 timeout=5)
    except (OSError, subprocess.TimeoutExpired):
        return None
    return head.stdout.strip() + (" + local changes" if changed.stdout.strip() else "")
