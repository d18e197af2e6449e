"""Signal plots of a run record, shared by the report and ``plantrig plot``.

One panel per quantity, in the dashboard's words and colours (gui/_theme.py's palette):
the plant's true value thick and blue, the controller's side (what it reads, what it
commands) thin and orange, the reference in ink over the value it drives. On every
watched signal the limit's warn lines (amber, dashed) and trip lines (red) are drawn;
trips are marked where they happened (a red line and the interlock's name) with the
time the interlock stayed latched as a bar along the top; injected faults (amber) and
disturbances (teal, hatched) are shaded from the run's events, each with its name.

Limits and control loops come from the folder's rig.toml read as data (its model
module is never imported); a rig file this version cannot read leaves the panels
without limit lines and says so.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim import (
    SIGNAL_LABELS,
    LimitSpec,
    RigFileError,
    RunRecord,
    decimate_minmax,
    load_rig_as_data,
)

# the dashboard's palette (gui/_theme.py), as matplotlib colours
INK = "#1a1c20"
INK_SOFT = "#585c64"
PLANT_BLUE = "#1648a8"
CONTROLLER_ORANGE = "#de7600"
ATTENTION = "#d68400"
ALARM = "#aa141c"
DISTURBANCE = "#00606c"
GRID = "#d8d4ca"
PLOT_POINTS = 4000           # per trace; a min/max envelope beyond this keeps the peaks
STYLE = {"ref": (INK, 1.0, (0, (4, 2))), "y": (PLANT_BLUE, 1.8, "-"),
         "u": (PLANT_BLUE, 1.8, "-"), "x": (PLANT_BLUE, 1.8, "-"),
         "sent": (CONTROLLER_ORANGE, 0.9, "-"), "cmd": (CONTROLLER_ORANGE, 0.9, "-"),
         "d": (DISTURBANCE, 1.2, "-")}


@dataclass
class Window:
    """A time span to shade: an injected fault or a disturbance, from the events."""

    name: str
    kind: str            # "fault" or "disturbance" (the event's window field)
    start: float
    end: float
    detail: str = ""


@dataclass
class Trip:
    time: float
    name: str            # the interlock (or "E-stop")
    detail: str


@dataclass
class Panel:
    """One plot: its traces (column names) and the columns whose limits it draws."""

    title: str
    columns: list[str]


@dataclass
class PlotContext:
    """What the plots need beside the columns: limits, loops, windows and trips."""

    record: RunRecord
    limits: list[LimitSpec] = field(default_factory=list)
    loops: dict[str, str] = field(default_factory=dict)   # output name -> reference name
    windows: list[Window] = field(default_factory=list)
    trips: list[Trip] = field(default_factory=list)
    rig_note: str = ""     # why limits or loops are unknown, if they are


def label(column: str) -> str:
    """A column in the project's signal words: "plant output (true) belt_speed"."""
    prefix, _, name = column.partition(":")
    if prefix in SIGNAL_LABELS:
        return f"{SIGNAL_LABELS[prefix]} {name}"
    return {"fault": f"fault {name}", "trip": f"interlock {name} latched",
            "limit": f"limit {name} state"}.get(prefix, column)


def context(record: RunRecord) -> PlotContext:
    """Limits and loops from the folder's rig.toml (as data), windows and trips from the
    events (and from any fault: columns the record has)."""
    ctx = PlotContext(record)
    rig_path = record.folder / "rig.toml"
    if rig_path.is_file():
        try:
            rig = load_rig_as_data(rig_path)
            ctx.limits = list(rig.limits)
            ctx.loops.update(rig.loop_pairs())
        except RigFileError as exc:
            ctx.rig_note = (f"rig.toml cannot be read by this version ({exc.issues[0]}): "
                            "no limit lines or loops")
    else:
        ctx.rig_note = "no rig.toml in the folder: no limit lines or loops"
    end = float(record.t[-1]) + _step(record) if len(record.rows) else 0.0
    ctx.windows = windows_from_events(record.events, end)
    for column in record.names("fault"):
        for a, b in spans(record.t, record[column] != 0):
            ctx.windows.append(Window(column.partition(":")[2], "fault", a, b))
    ctx.trips = [Trip(float(ev["time"]), str(ev.get("name", "")) if ev["kind"] == "trip"
                      else "E-stop", str(ev.get("detail", ""))) for ev in record.events
                 if ev["kind"] in ("trip", "estop")]
    return ctx


def windows_from_events(events: list[dict[str, Any]], end: float) -> list[Window]:
    """Each fault_injected event opens a window of its ``window`` kind ("fault" or
    "disturbance") that its fault_cleared event (same ``name``) closes, else the end of
    the run. Events as sim.read_run gives them: an old record's get their fields there."""
    open_: dict[str, Window] = {}
    out: list[Window] = []
    for ev in events:
        name = str(ev.get("name", ""))
        if ev["kind"] == "fault_injected":
            if name in open_:          # injected again: the earlier one ends here
                open_.pop(name).end = float(ev["time"])
            window = Window(name, str(ev.get("window") or "fault"), float(ev["time"]), end,
                            str(ev.get("detail", "")))
            open_[name] = window
            out.append(window)
        elif ev["kind"] == "fault_cleared" and name in open_:
            open_.pop(name).end = float(ev["time"])
    return out


def spans(t: NDArray[np.float64], active: NDArray[np.bool_]) -> list[tuple[float, float]]:
    """(start, end) times of the runs of True in ``active``."""
    if not active.any():
        return []
    edges = np.flatnonzero(np.diff(np.concatenate([[0], active.astype(np.int8), [0]])))
    step = float(t[1] - t[0]) if len(t) > 1 else 0.0
    return [(float(t[a]), float(t[b - 1]) + step) for a, b in zip(edges[::2], edges[1::2],
                                                                  strict=True)]


def _step(record: RunRecord) -> float:
    """The tick (from the summary: a record thinned for display has wider steps)."""
    tick = (record.summary.get("rig") or {}).get("tick_s")
    if tick:
        return float(tick)
    t = record.t
    return float(t[1] - t[0]) if len(t) > 1 else 0.0


def standard_panels(ctx: PlotContext) -> list[Panel]:
    """The report's panels: each output with what the controller read and the reference
    that drives it, each input with the controller's command, each state, and each
    disturbance that acted."""
    r = ctx.record
    panels = []
    for column in r.names("y"):
        name = column.partition(":")[2]
        ref = ctx.loops.get(name)
        cols = ([f"ref:{ref}"] if ref and f"ref:{ref}" in r else []) + [column] + (
            [f"sent:{name}"] if f"sent:{name}" in r else [])
        panels.append(Panel(f"{name}: plant output and what the controller read", cols))
    driven = set(ctx.loops.values())
    for column in r.names("ref"):
        if column.partition(":")[2] not in driven:
            panels.append(Panel(label(column), [column]))
    for column in r.names("u"):
        name = column.partition(":")[2]
        cols = ([f"cmd:{name}"] if f"cmd:{name}" in r else []) + [column]
        panels.append(Panel(f"{name}: controller command and plant input", cols))
    for column in r.names("x"):
        panels.append(Panel(label(column), [column]))
    for column in r.names("d"):
        if len(r.rows) and np.any(r[column] != 0):
            panels.append(Panel(label(column), [column]))
    return panels


def panels_for(ctx: PlotContext, signals: list[str]) -> list[Panel]:
    """Panels for ``plantrig plot``: a bare name gets the report's panel for it (output,
    then input, state, reference, disturbance); a column ("x:belt_speed") is drawn
    alone; columns joined by commas share one panel. Raises KeyError naming what is
    unknown."""
    r = ctx.record
    standard = standard_panels(ctx)
    out = []
    for signal in signals:
        parts = [p.strip() for p in signal.split(",") if p.strip()]
        if len(parts) == 1 and ":" not in parts[0]:
            name = parts[0]
            found = next((p for prefix in ("y", "u", "x", "ref", "d") for p in standard
                          if f"{prefix}:{name}" in p.columns), None)
            if found is None and any(f"{p}:{name}" in r for p in SIGNAL_LABELS):
                found = Panel(name, [f"{p}:{name}" for p in SIGNAL_LABELS
                                     if f"{p}:{name}" in r][:1])
            if found is None:
                raise KeyError(name)
            out.append(found)
            continue
        for part in parts:
            if part not in r:
                raise KeyError(part)
        out.append(Panel(", ".join(label(p) for p in parts), parts))
    return out


def known_signals(record: RunRecord) -> list[str]:
    """Signal columns a person may plot (not the bookkeeping columns)."""
    return [c for c in record.columns if c.partition(":")[0] in SIGNAL_LABELS]


def limits_on(ctx: PlotContext, columns: list[str]) -> list[LimitSpec]:
    return [lim for lim in ctx.limits if lim.column in columns]


def draw_panel(ax: Any, ctx: PlotContext, panel: Panel) -> None:
    """One panel: traces, limit lines, fault and disturbance windows, trip marks."""
    r = ctx.record
    t = r.t
    values: list[float] = []
    for column in panel.columns:
        colour, width, style = STYLE.get(column.partition(":")[0], (INK, 1.0, "-"))
        tt, vv = decimate_minmax(t, r[column], PLOT_POINTS // 2)   # every spike kept
        ax.plot(tt, vv, color=colour, lw=width, ls=style, label=label(column),
                zorder=3 if column.startswith(("sent", "cmd", "ref")) else 2)
        finite = vv[np.isfinite(vv)]
        if finite.size:
            values += [float(finite.min()), float(finite.max())]
    for lim in limits_on(ctx, panel.columns):
        for value, what, colour, style in (
                (lim.trip_high, "trip", ALARM, "-"), (lim.trip_low, "trip", ALARM, "-"),
                (lim.warn_high, "warn", ATTENTION, (0, (5, 3))),
                (lim.warn_low, "warn", ATTENTION, (0, (5, 3)))):
            if not math.isfinite(value) or (what == "warn" and value in (lim.trip_high,
                                                                          lim.trip_low)):
                continue
            ax.axhline(value, color=colour, lw=1.0, ls=style, zorder=1)
            # each label on the side of its line away from the band's inside, so a warn
            # line close to its trip line never writes over the trip's label
            outward = (what == "trip") == (value in (lim.trip_high, lim.warn_high))
            ax.annotate(f"{lim.name} {what} {value:g}", (1.0, value),
                        xycoords=("axes fraction", "data"),
                        xytext=(-3, 2 if outward else -2), textcoords="offset points",
                        ha="right", va="bottom" if outward else "top", fontsize=6.5,
                        color=colour)
            values.append(value)
    if values:
        lo, hi = min(values), max(values)
        span = (hi - lo) or max(abs(hi), 1.0)
        # headroom on top for the trip names and the latched bar above the highest line
        ax.set_ylim(lo - 0.1 * span, hi + 0.16 * span)
    shade_windows(ax, ctx)
    mark_trips(ax, ctx)
    unit = r.unit(panel.columns[-1]) if panel.columns else ""
    ax.set_ylabel(f"[{unit}]" if unit else "", fontsize=8)
    ax.set_title(panel.title, fontsize=8.5, loc="left")
    ax.grid(True, lw=0.4, color=GRID)
    ax.tick_params(labelsize=7)
    legend_beside(ax)


def legend_beside(ax: Any) -> None:
    """The panel's legend to the right of its axes, one entry per label: inside, it hid
    the start of the traces (a reference step, a rise) under its box."""
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        unique = dict(zip(labels, handles, strict=True))
        ax.legend(unique.values(), unique.keys(), fontsize=6.5, loc="upper left",
                  bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, framealpha=0.85)


def shade_windows(ax: Any, ctx: PlotContext) -> None:
    for w in ctx.windows:
        if w.kind == "disturbance":
            ax.axvspan(w.start, w.end, facecolor=DISTURBANCE, alpha=0.10, hatch="//",
                       edgecolor=DISTURBANCE, lw=0, zorder=0,
                       label=f"disturbance {w.name}")
        else:
            ax.axvspan(w.start, w.end, color=ATTENTION, alpha=0.22, lw=0, zorder=0,
                       label=f"fault {w.name}")


def mark_trips(ax: Any, ctx: PlotContext) -> None:
    """A red line where each trip happened, and the latched time as a bar on top."""
    r = ctx.record
    lo, hi = ax.get_xlim()
    for trip in ctx.trips:
        ax.axvline(trip.time, color=ALARM, lw=1.3, zorder=4)
        # under the latched bar (on it, red on red was hard to read), on the side of the
        # line toward the middle (a late trip's name ran into the limit labels)
        right = trip.time > (lo + hi) / 2
        ax.annotate(f"trip {trip.name}", (trip.time, 1.0),
                    xycoords=("data", "axes fraction"), xytext=(-2 if right else 2, -7),
                    textcoords="offset points", ha="right" if right else "left", va="top",
                    fontsize=6.5, color=ALARM, weight="bold", zorder=5,
                    bbox={"boxstyle": "square,pad=0.1", "fc": "white", "ec": "none",
                          "alpha": 0.8})
    for column in r.names("trip"):
        for a, b in spans(r.t, r[column] != 0):
            ax.axvspan(a, b, ymin=0.965, ymax=1.0, color=ALARM, alpha=0.55, lw=0, zorder=4,
                       label="interlock latched (trip to reset)")


def plot_signals(ctx: PlotContext, panels: list[Panel], out: Path | None = None,
                 title: str = "", size: tuple[float, float] | None = None) -> Any:
    """A figure of ``panels`` stacked on one time axis; saved to ``out`` (.png or .svg)
    when given. Returns the figure (the caller closes it)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n = max(1, len(panels))
    fig, axes = plt.subplots(n, 1, figsize=size or (10, 1.0 + 2.4 * n), sharex=True,
                             squeeze=False)
    for ax, panel in zip(axes[:, 0], panels, strict=True):
        draw_panel(ax, ctx, panel)
    axes[-1, 0].set_xlabel("plant time [s]", fontsize=8)
    if title:
        fig.suptitle(title, fontsize=10, x=0.02, ha="left")
    fig.tight_layout(rect=(0, 0, 1, 0.97 if title else 1))
    if out is not None:
        fig.savefig(out, dpi=110)
    return fig
