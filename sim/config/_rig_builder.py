"""Rigs from Python, and any rig written back to a rig file.

A notebook user hands ``rig_from_python`` a plant (a LinearPlant or DiscretePlant, or a
scipy.signal / python-control system), the signal names, a controller and references;
it writes them as a rig document and checks that with build_rig, so the Rig is exactly
what the same rig file would give, with the same messages for the same mistakes (the
"file" in them is ``file``, "<python>" unless given). ``write_rig`` saves a rig as a rig
file that load_rig reads back to an equal Rig (the round trip is tested for every
shipped rig and for rigs built here).
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import tomli_w

from plantrig.sim.config._controller_settings import ControllerSpec, controller_table
from plantrig.sim.config._rigfile import NamedReference, Rig, Signal, build_rig
from plantrig.sim.model._plant import DiscretePlant, LinearPlant, from_state_space_object
from plantrig.sim.model._references import Ramp, Sine, Step, Table

PYTHON_FILE = "<python>"
PATH_KEYS = {"ode": "module", "fmu": "file"}   # plant keys naming a file beside the rig


def rig_from_python(name: str, *, plant: Any, tick: float, duration: float,
                    inputs: Sequence[str | Signal | Mapping[str, Any]],
                    outputs: Sequence[str | Signal | Mapping[str, Any]],
                    states: Sequence[str | Signal | Mapping[str, Any]] = (),
                    controller: ControllerSpec | Mapping[str, Any] | None = None,
                    references: Sequence[NamedReference | Mapping[str, Any]] = (),
                    x0: Sequence[float] | None = None, mode: str = "fast", seed: int = 0,
                    description: str = "", sections: Mapping[str, Any] | None = None,
                    file: str | Path = PYTHON_FILE) -> Rig:
    """A checked Rig without a TOML file (raises RigFileError like load_rig).

    ``controller`` defaults to {"kind": "external"} only when ``sections`` has a link;
    else it is required. ``sections`` holds any other rig-file tables by name (limits,
    interlocks, safety, link, sensors, actuators, disturbances, acceptance, dut), as the
    rig file would write them.
    """
    system = plant if isinstance(plant, LinearPlant | DiscretePlant) else \
        from_state_space_object(plant)
    if isinstance(system, LinearPlant):
        plant_t: dict[str, Any] = {"kind": "lti"}
        matrices = (system.A, system.B, system.C, system.D)
    else:
        plant_t = {"kind": "discrete_lti", "dt": float(system.dt)}
        matrices = (system.Ad, system.Bd, system.C, system.D)
    for key, matrix in zip(("A", "B", "C", "D"), matrices, strict=True):
        plant_t[key] = np.asarray(matrix, dtype=np.float64).tolist()
    n = np.shape(matrices[0])[0]
    named_states = list(states) or [f"x{i + 1}" for i in range(n)]
    plant_t.update(states=[_signal(s) for s in named_states], inputs=[_signal(s) for s in inputs],
                   outputs=[_signal(s) for s in outputs])
    if x0 is not None:
        plant_t["x0"] = [float(v) for v in x0]
    doc: dict[str, Any] = {
        "rig": {"name": name, "description": description, "tick": float(tick),
                "duration": float(duration), "mode": mode, "seed": int(seed)},
        "plant": plant_t,
        "references": [_reference(r) for r in references],
    }
    sections = dict(sections or {})
    if controller is None:
        controller = {"kind": "external"} if "link" in sections else {}
    doc["controller"] = _controller(controller)
    doc.update(sections)
    return build_rig(doc, Path(file), tomli_w.dumps(doc))


def write_rig(rig: Rig, path: str | Path) -> Path:
    """Save ``rig`` as a rig file at ``path``: its checked text as written (comments
    kept), a plant module or FMU named relative to the old place pointed at absolutely."""
    path = Path(path)
    doc = tomllib.loads(rig.text)
    plant_t = doc.get("plant", {})
    key = PATH_KEYS.get(plant_t.get("kind", ""))
    text = rig.text
    if key and key in plant_t and not Path(plant_t[key]).is_absolute():
        plant_t[key] = str((Path(rig.path).parent / plant_t[key]).resolve())
        if path.resolve().parent != Path(rig.path).resolve().parent:
            text = tomli_w.dumps(doc)
    path.write_text(text, encoding="utf-8")
    return path


def _signal(s: str | Signal | Mapping[str, Any]) -> dict[str, Any]:
    if isinstance(s, str):
        return {"name": s}
    if isinstance(s, Signal):
        out = {"name": s.name, "unit": s.unit, "description": s.description,
               "safe": s.safe}
        out.update({k: v for k, v in (("min", s.min), ("max", s.max)) if np.isfinite(v)})
        return out
    return dict(s)


def _reference(r: NamedReference | Mapping[str, Any]) -> dict[str, Any]:
    if not isinstance(r, NamedReference):
        return dict(r)
    w = r.waveform
    out: dict[str, Any] = {"name": r.name, "unit": r.unit}
    if isinstance(w, Step):
        out.update(kind="step", at=w.at, to=w.to, **{"from": w.from_})
    elif isinstance(w, Ramp):
        out.update(kind="ramp", at=w.at, rate=w.rate, **{"from": w.from_})
        if np.isfinite(w.to):
            out["to"] = w.to
    elif isinstance(w, Sine):
        out.update(kind="sine", low=w.low, high=w.high, hz=w.hz, phase_deg=w.phase_deg)
    elif isinstance(w, Table):
        out.update(kind="table", between=w.between,
                   points=[[float(t), float(v)] for t, v in zip(w.times, w.values, strict=True)])
    else:
        raise TypeError(f"reference {r.name!r}: {type(w).__name__} is not a waveform a rig "
                        "file can hold (Step, Ramp, Sine, Table)")
    return out


def _controller(spec: ControllerSpec | Mapping[str, Any]) -> dict[str, Any]:
    return controller_table(spec) if isinstance(spec, ControllerSpec) else dict(spec)
