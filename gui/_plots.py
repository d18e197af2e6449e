"""Which plots the dashboard offers: each plant output (true) with its reference and
what the controller reads of it, and each controller command with the plant input
(applied) it became.

A reference is drawn with the output its control loop measures (the rig's PID loops
say which); a reference no loop names goes with the first output of the same unit,
else gets a plot of its own.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from plantrig.gui._columns import ColumnGroups
from plantrig.sim import Rig

MAX_PLOTS = 8


@dataclass(frozen=True)
class PlotSpec:
    """One plot: a title, the columns drawn, and the band (rig min/max) of its signal."""

    key: str
    title: str
    series: tuple[str, ...]
    low: float = -math.inf
    high: float = math.inf


def _loop_pairs(rig: Rig) -> dict[str, str]:
    """Output name -> reference name, from the built-in controller's loops."""
    loops = rig.controller.settings.get("loops", []) if rig.controller.kind == "pid" else []
    return {str(loop["measure"]): str(loop["reference"]) for loop in loops}


def plot_specs(groups: ColumnGroups, rig: Rig) -> list[PlotSpec]:
    pairs = _loop_pairs(rig)
    unplaced = [c.name for c in groups.group("ref") if c.name not in pairs.values()]
    specs: list[PlotSpec] = []
    for out in groups.group("y"):
        refs = [pairs[out.name]] if out.name in pairs else []
        for name in list(unplaced):
            if groups[f"ref:{name}"].unit == out.unit and not refs:
                refs.append(name)
                unplaced.remove(name)
        series = [f"ref:{r}" for r in refs if f"ref:{r}" in groups] + [out.key]
        if f"sent:{out.name}" in groups:
            series.append(f"sent:{out.name}")
        specs.append(PlotSpec(out.key, f"{out.name} [{out.unit}]", tuple(series),
                              out.low, out.high))
    for name in unplaced:
        c = groups[f"ref:{name}"]
        specs.append(PlotSpec(c.key, f"{name} [{c.unit}] (reference)", (c.key,)))
    for inp in groups.group("u"):
        drawn = tuple(k for k in (f"cmd:{inp.name}", inp.key) if k in groups)
        specs.append(PlotSpec(inp.key, f"{inp.name} [{inp.unit}] actuator", drawn,
                              inp.low, inp.high))
    return specs[:MAX_PLOTS]
