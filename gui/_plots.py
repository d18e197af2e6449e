"""Which plots the dashboard offers: each plant output (true) with its reference and
what the controller reads of it, each controller command with the plant input
(applied) it became, and each watched state (a ``[[limits]]`` entry on ``x:``) that no
other plot shows.

A reference is drawn with the output its control loop measures (the rig's PID loops
say which); a reference no loop names goes with the first output of the same unit,
else gets a plot of its own. Every plot whose signal a limit watches carries that
limit's warn and trip lines; a signal no limit watches shows its rig range instead.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from plantrig.gui._columns import ColumnGroups
from plantrig.sim import SIGNAL_LABELS, Rig

MAX_PLOTS = 8


@dataclass(frozen=True)
class LimitLine:
    """One horizontal line of a limit: its value, its level (1 warn, 2 trip), its label."""

    value: float
    level: int
    label: str


@dataclass(frozen=True)
class PlotSpec:
    """One plot: a title, the columns drawn, the band (rig min/max) of its signal and
    the limits that watch it (``watched``: the limit names, ``lines``: their bounds)."""

    key: str
    title: str
    series: tuple[str, ...]
    low: float = -math.inf
    high: float = math.inf
    lines: tuple[LimitLine, ...] = ()
    watched: tuple[str, ...] = ()

    @property
    def shows_range(self) -> bool:
        """Rig range lines only where no limit says more."""
        return not self.lines and math.isfinite(self.low) and math.isfinite(self.high)


def limit_lines(column: str, limits: Sequence[Any]) -> tuple[tuple[LimitLine, ...],
                                                              tuple[str, ...]]:
    """The warn and trip lines of every limit watching ``column``, and their names.

    A warn bound equal to its trip bound (a limit with trip bounds only warns at them)
    is drawn once, as the trip line.
    """
    lines: list[LimitLine] = []
    names: list[str] = []
    for spec in limits:
        if spec.column != column:
            continue
        names.append(spec.name)
        for side, trip, warn in (("high", spec.trip_high, spec.warn_high),
                                 ("low", spec.trip_low, spec.warn_low)):
            if math.isfinite(trip):
                lines.append(LimitLine(trip, 2, f"{spec.name} trip {side} {trip:g}"))
            if math.isfinite(warn) and warn != trip:
                lines.append(LimitLine(warn, 1, f"{spec.name} warn {side} {warn:g}"))
    return tuple(lines), tuple(names)


def plot_specs(groups: ColumnGroups, rig: Rig) -> list[PlotSpec]:
    limits = tuple(getattr(rig, "limits", ()))
    pairs = rig.loop_pairs()
    unplaced = [c.name for c in groups.group("ref") if c.name not in pairs.values()]
    specs: list[PlotSpec] = []

    def add(key: str, title: str, series: tuple[str, ...], low: float = -math.inf,
            high: float = math.inf) -> None:
        lines, names = limit_lines(key, limits)
        specs.append(PlotSpec(key, title, series, low, high, lines, names))

    for out in groups.group("y"):
        refs = [pairs[out.name]] if out.name in pairs else []
        for name in list(unplaced):
            if groups[f"ref:{name}"].unit == out.unit and not refs:
                refs.append(name)
                unplaced.remove(name)
        series = [f"ref:{r}" for r in refs if f"ref:{r}" in groups] + [out.key]
        if f"sent:{out.name}" in groups:
            series.append(f"sent:{out.name}")
        add(out.key, f"{out.name} [{out.unit}]", tuple(series), out.low, out.high)
    for name in unplaced:
        c = groups[f"ref:{name}"]
        add(c.key, f"{name} [{c.unit}] (reference)", (c.key,))
    for inp in groups.group("u"):
        drawn = tuple(k for k in (f"cmd:{inp.name}", inp.key) if k in groups)
        add(inp.key, f"{inp.name} [{inp.unit}] actuator", drawn, inp.low, inp.high)
    watched_states = [s.column for s in limits if s.column.startswith("x:")
                      and s.column in groups]
    states = [key for i, key in enumerate(watched_states) if key not in watched_states[:i]]
    room = MAX_PLOTS - len(states)
    specs = specs[:max(room, 0)]
    for key in states:                    # watched states are never cut for space
        c = groups[key]
        add(key, f"{c.name} [{c.unit}] {SIGNAL_LABELS['x']}", (key,), c.low, c.high)
    return specs

