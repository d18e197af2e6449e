"""A rig file read as data only: its model module is located, never imported.

Run folders travel, so a rig.toml inside one may name a module that came with the
folder from someone else. Reading such a record (replay, the dashboard) needs the
names, units, ranges, loops and limits, never the model's code: an ODE plant here is a
placeholder whose functions refuse to run, and the model summary comes from the
record (summary.json, run_start.json, run.h5).
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from plantrig.sim.config._checker import RigFileError, RigIssue
from plantrig.sim.config._rig_document import read_rig_document
from plantrig.sim.config._rigfile import ControllerSpec, Rig, Signal, build_rig_document
from plantrig.sim.model._plant import OdePlant

# Files only plantrig writes, into every run folder at its start; either marks a record.
RUN_FOLDER_MARKERS = ("run_start.json", "sources.json")
ODE_ONLY_KEYS = ("module", "dynamics", "output", "params", "method", "substeps", "file",
                 "interface", "variables")
CODE_KINDS = ("ode", "fmu")    # plants whose model is code (a Python module, an FMU binary)


class ModelNotLoaded(RuntimeError):
    """The rig was read as data; its model's code was deliberately not imported."""


def _refuse(*_: Any) -> Any:
    raise ModelNotLoaded("this rig was read as data: its model module was not imported "
                         "(use the recorded values, or load_rig to run the model)")


def load_rig_as_data(path: str | Path) -> Rig:
    """Read and check a rig file as load_rig does, without importing an ODE model or
    loading an FMU.

    The returned Rig's plant has the right shape and parameters; calling its dynamics
    or output raises ModelNotLoaded.
    """
    path = Path(path)
    document = read_rig_document(path)
    doc = document.doc
    plant_t = doc.get("plant")
    if not (isinstance(plant_t, dict) and plant_t.get("kind") in CODE_KINDS):
        return build_rig_document(document, path)
    counts = [len(plant_t.get(group, [])) if isinstance(plant_t.get(group), list) else 0
              for group in ("states", "inputs", "outputs")]
    n, m, p = counts
    stand_in = {k: v for k, v in plant_t.items() if k not in ODE_ONLY_KEYS}
    stand_in.update(kind="lti", A=np.zeros((n, n)).tolist(), B=np.zeros((n, m)).tolist(),
                    C=np.zeros((p, n)).tolist(), D=np.zeros((p, m)).tolist())
    rig = build_rig_document(dataclasses.replace(document, doc={**doc, "plant": stand_in}),
                             path)
    params = plant_t.get("params", {})
    method = plant_t.get("method", "rk4")
    substeps = plant_t.get("substeps", 1)
    plant = OdePlant(_refuse, _refuse, n, m, p, dict(params) if isinstance(params, dict)
                     else {})
    return dataclasses.replace(rig, plant=plant,
                               method=method if isinstance(method, str) else "rk4",
                               substeps=substeps if isinstance(substeps, int) else 1)


def rig_from_record(folder: str | Path) -> Rig:
    """The rig as far as the record itself says (run_start.json): name, tick, the signals
    with units and ranges, whether a link was used.

    For a rig.toml this version cannot read (written by another plantrig version): no
    loops, limit thresholds or references, and a plant that refuses to run.
    """
    folder = Path(folder)
    start_path = folder / "run_start.json"
    try:
        start = json.loads(start_path.read_text(encoding="utf-8"))
        rig_info, columns = start["rig"], start["columns"]
        tick, duration = float(rig_info["tick_s"]), float(rig_info["duration_s"])
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise RigFileError([RigIssue(str(start_path), "", f"cannot read the recorded rig: "
                                                          f"{type(exc).__name__}: {exc}")]) \
            from None
    groups: dict[str, list[Signal]] = {"x": [], "u": [], "y": []}
    for column in columns:
        prefix, _, name = str(column.get("name", "")).partition(":")
        if prefix in groups and name:
            groups[prefix].append(Signal(
                name, str(column.get("unit") or ""), _bound(column.get("min"), -math.inf),
                _bound(column.get("max"), math.inf), str(column.get("description") or "")))
    summary_path = folder / "summary.json"
    summary: dict[str, Any] = {}
    if summary_path.is_file():
        try:
            summary = json.loads(summary_path.read_text(encoding="utf-8"))
        except ValueError:
            summary = {}
    n, m, p = (len(groups[k]) for k in ("x", "u", "y"))
    return Rig(path=folder / "rig.toml", text="", name=str(rig_info.get("name", folder.name)),
               description="", tick=tick, duration=duration,
               mode=str(start.get("mode", "fast")), seed=0, on_overrun="skip",
               plant=OdePlant(_refuse, _refuse, n, m, p), x0=np.zeros(n), method="rk4",
               substeps=1, states=tuple(groups["x"]), inputs=tuple(groups["u"]),
               outputs=tuple(groups["y"]), references=(),
               controller=ControllerSpec("external" if summary.get("link") else "recorded"))


def _bound(value: Any, default: float) -> float:
    return float(value) if isinstance(value, int | float) else default


def model_module(path: str | Path) -> Path | None:
    """The Python file an ODE rig file names as its model (resolved), or None."""
    path = Path(path)
    doc = read_rig_document(path).doc
    plant_t = doc.get("plant")
    if not (isinstance(plant_t, dict) and plant_t.get("kind") == "ode"
            and isinstance(plant_t.get("module"), str)):
        return None
    return (path.parent / plant_t["module"]).resolve()


def run_folder_of(path: str | Path) -> Path | None:
    """The run folder that holds ``path`` (a file or folder), or None."""
    for folder in Path(path).resolve().parents:
        if any((folder / marker).is_file() for marker in RUN_FOLDER_MARKERS) or \
                _plantrig_manifest(folder / "manifest.json"):
            return folder
    return None


def _plantrig_manifest(path: Path) -> bool:
    """A manifest.json of ours (the name alone is common elsewhere)."""
    try:
        return path.is_file() and b'"plantrig manifest"' in path.read_bytes()[:4096]
    except OSError:
        return False


