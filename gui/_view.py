"""The dashboard window: widgets built once, then each Snapshot copied into them.

Every dearpygui call of the dashboard happens here, on the thread that created the
view (dearpygui is not thread-safe). Button callbacks are plain methods (``on_estop``,
``on_inject_fault``, ...) that read the form and call the Operator, so a test presses
a button by calling the callback the button holds.

Layout: the caution banner across the top; one status line that says the run's real
state (running / tripped by what since when / stopped / ended / replay); three columns
below: the E-stop (first, outside any scrolling; also the Esc key), the run's scenario
progress, outcome and verdicts, then the operator controls; the plots; and the panels
(signal table, limit bars, interlock lamps, timing, link lamp, events with a detail
pane).
"""

from __future__ import annotations

import json
import textwrap
import time
from collections import deque
from collections.abc import Callable
from pathlib import Path
from typing import Any

import dearpygui.dearpygui as dpg
import numpy as np

from plantrig import CAUTION
from plantrig.gui._columns import ColumnGroups
from plantrig.gui._eventlog import EventRow
from plantrig.gui._faults import FaultChoice, check_fault_form
from plantrig.gui._model import (
    ALARM,
    ATTENTION,
    ENDED,
    EVENTS_SHOWN,
    REPLAY,
    Snapshot,
    Status,
    fmt,
)
from plantrig.gui._operator import MOMENT_PRESETS, Operator
from plantrig.gui._plots import PlotSpec
from plantrig.gui._theme import ACCENT, INK, INK_SOFT, Themes
from plantrig.gui._theme import ALARM as ALARM_RED
from plantrig.sim import SIGNAL_LABELS, decimate_minmax

T = "plantrig."                   # tag prefix
WIDTH, HEIGHT = 1360, 880
LEFT_W, CENTRE_W = 300, 560
BUCKETS = 400                     # min-max pairs per series: one per ~1.5 pixel columns
TABLE_ORDER = ("x", "u", "cmd", "y", "sent", "ref")
PANEL_PREFIXES = ("trip", "fault", "limit")
RUN_LINES = 40                    # text lines of the scenario / outcome / verdicts panel
ESTOP_KEY = dpg.mvKey_Escape
ESTOP_KEY_NAME = "Esc"


BANNER_CHARS_PER_LINE = 170      # caution text per banner line (15 px condensed font,
BANNER_LINE_PX = 18              # about 7 px a character on the screenshots)
# verdict and outcome lines are wrapped here, at spaces only: the window's own wrap also
# breaks after a full stop, which split "limit 0.4" into "0." and "4"
RUN_LINE_CHARS = (LEFT_W - 30) // 7     # about 6.5 px a character, measured


def banner_height() -> int:
    """About the height the caution banner takes (it sizes itself to show the whole
    text at all times); the plots share what is left."""
    lines = -(-len(CAUTION) // BANNER_CHARS_PER_LINE)
    return 10 + BANNER_LINE_PX * lines


class DashboardView:
    """One dashboard window in this process's dearpygui context."""

    def __init__(self, *, title: str, groups: ColumnGroups, specs: list[PlotSpec],
                 operator: Operator, fault_kinds: tuple[FaultChoice, ...] = (),
                 fault_targets: Callable[[FaultChoice], list[str]] = lambda _: [],
                 replay_range: tuple[float, float] | None = None,
                 span_s: float = 10.0, max_span_s: float = 30.0,
                 frame_cap_hz: float = 30.0) -> None:
        self.estop_latched = False
        self.selected_event: EventRow | None = None
        self.shown_events: list[EventRow] = []
        self.groups = groups
        self.specs = specs
        self.operator = operator
        self.fault_kinds = {f.kind: f for f in fault_kinds}
        self.fault_targets = fault_targets
        self.replay = replay_range is not None
        self.span = min(span_s, max_span_s)
        self.cursor = replay_range[1] if replay_range else 0.0
        self.cursor_moved = True
        self.frame_cap_hz = frame_cap_hz
        self.frame_times: deque[float] = deque(maxlen=30)
        self.t_index = groups.index("t")
        self._labels: dict[int, str] = {}
        self._bound: dict[str, int | str] = {}
        dpg.create_context()
        self.themes = Themes()
        with dpg.window(tag=T + "main", no_scrollbar=True):
            self._banner()
            self._status_line()
            if replay_range is not None:
                self._replay_bar(*replay_range)
            with dpg.group(horizontal=True):
                self._controls()
                self._plots(max_span_s)
                self._panels()
        if not self.replay:
            with dpg.handler_registry(tag=T + "keys"):
                dpg.add_key_press_handler(ESTOP_KEY, callback=self.on_estop_key,
                                          tag=T + "estop_key")
        dpg.create_viewport(title=title, width=WIDTH, height=HEIGHT, vsync=False)
        dpg.setup_dearpygui()
        dpg.show_viewport()
        dpg.set_primary_window(T + "main", True)

    # -- building ----------------------------------------------------------------------
    def _banner(self) -> None:
        with dpg.child_window(tag=T + "banner", auto_resize_y=True, border=False,
                              no_scrollbar=True):
            dpg.add_text(CAUTION, wrap=WIDTH - 40)
        dpg.bind_item_theme(T + "banner", self.themes.banner)

    def _status_line(self) -> None:
        """One lamp across the window: the run's state in words, coloured by it."""
        dpg.add_button(tag=T + "status", label="", width=-1, height=30)
        dpg.bind_item_theme(T + "status", self.themes.quiet)

    def _replay_bar(self, t0: float, t1: float) -> None:
        with dpg.group(horizontal=True):
            dpg.add_text("replay time [s]")
            dpg.add_slider_double(tag=T + "cursor", min_value=t0, max_value=max(t1, t0 + 1e-9),
                                  default_value=t1, width=-1, format="%.3f",
                                  callback=self.on_cursor)

    def _button(self, label: str, callback: Callable[..., Any], tag: str = "",
                width: int = -1, height: int = 0) -> None:
        dpg.add_button(label=label, callback=callback, width=width, height=height,
                       tag=T + (tag or label.lower().replace(" ", "_")))

    def _controls(self) -> None:
        with dpg.group(width=LEFT_W):
            if self.replay:
                dpg.add_text("Replay of a recorded run", color=ACCENT)
                dpg.add_text("Nothing here commands a run: move the time slider to look "
                             "at any moment.", wrap=LEFT_W - 20)
                self._run_panel(-1)
                return
            self._button(f"E-STOP  ({ESTOP_KEY_NAME})", self.on_estop, "estop", height=84)
            dpg.bind_item_theme(T + "estop", self.themes.estop)
            if self.themes.big_font is not None:
                dpg.bind_item_font(T + "estop", self.themes.big_font)
            dpg.add_text(f"software E-stop (button or the {ESTOP_KEY_NAME} key): the loop "
                         "forces every input to its safe value and latches. Not a safety "
                         "function.", wrap=LEFT_W - 10)
            self._run_panel(280)
            with dpg.child_window(width=LEFT_W, height=-1, tag=T + "controls"):
                self._button("Reset interlock / E-stop", self.on_reset, "reset")
                dpg.add_separator()
                dpg.add_text("Mark a moment in the record")
                dpg.add_combo(list(MOMENT_PRESETS), tag=T + "moment_preset",
                              default_value=MOMENT_PRESETS[0], width=-1)
                dpg.add_input_text(tag=T + "moment_text", hint="or type your own label",
                                   width=-1)
                self._button("Mark moment", self.on_mark_moment, "mark_moment")
                dpg.add_separator()
                self._button("Stop run ...", self.on_stop, "stop")
                with dpg.group(tag=T + "stop_confirm_row", show=False):
                    dpg.add_text("Stop the run now? Every tick so far stays recorded.",
                                 wrap=LEFT_W - 20)
                    with dpg.group(horizontal=True):
                        self._button("Yes, stop the run", self.on_stop_confirmed,
                                     "stop_confirm", width=150)
                        self._button("Cancel", self.on_stop_cancelled, "stop_cancel",
                                     width=100)
                dpg.add_separator()
                dpg.add_text("Reference")
                refs = [c.name for c in self.groups.group("ref")]
                dpg.add_combo(refs, tag=T + "ref_name", default_value=refs[0] if refs else "",
                              width=-1)
                dpg.add_input_double(tag=T + "ref_value", label="value", width=150,
                                     format="%.4g")
                self._button("Set reference", self.on_set_reference, "set_reference")
                dpg.add_separator()
                dpg.add_text("Fault")
                kinds = list(self.fault_kinds)
                dpg.add_combo(kinds, tag=T + "fault_kind", label="kind", width=170,
                              default_value=kinds[0] if kinds else "",
                              callback=self.on_fault_kind)
                dpg.add_combo([], tag=T + "fault_target", label="target", width=170)
                dpg.add_input_text(tag=T + "fault_target_text", label="target", width=170,
                                   hint="e.g. A[1,2]", show=False)
                dpg.add_input_text(tag=T + "fault_value", label="value", width=-90)
                dpg.add_text("", tag=T + "fault_help", wrap=LEFT_W - 20, color=INK_SOFT)
                dpg.add_input_double(tag=T + "fault_duration", label="for [s], 0 = until "
                                     "cleared", width=90, format="%.3g")
                with dpg.group(horizontal=True):
                    self._button("Inject fault", self.on_inject_fault, "inject_fault",
                                 width=136)
                    self._button("Clear faults", self.on_clear_fault, "clear_fault",
                                 width=136)
                dpg.add_separator()
                dpg.add_text("", tag=T + "operator_message", wrap=LEFT_W - 20)
                if kinds:
                    self.on_fault_kind(None, kinds[0])

    def _run_panel(self, height: int) -> None:
        """Scenario progress, then the outcome and verdicts (pending until judged)."""
        with dpg.child_window(width=LEFT_W, height=height, tag=T + "run_panel"):
            dpg.add_text("Scenario and verdicts", color=ACCENT)
            for i in range(RUN_LINES):
                dpg.add_text("", tag=f"{T}run.{i}", wrap=LEFT_W - 30, show=False)

    def _legend(self, key: str) -> str:
        """A series' legend: the kind of signal (the plot's title names the signal); a
        reference also gives its own name, which differs from the output's."""
        column = self.groups[key]
        label = SIGNAL_LABELS.get(column.prefix, column.prefix)
        return f"{label} {column.name}" if column.prefix == "ref" else label

    def _plots(self, max_span_s: float) -> None:
        n = max(1, len(self.specs))
        height = int(min(260, max(140, (HEIGHT - 150 - banner_height()) / n)))
        with dpg.child_window(width=CENTRE_W, height=-1, tag=T + "plots"):
            with dpg.group(horizontal=True):
                dpg.add_slider_double(tag=T + "span", label="window [s]", width=160,
                                      min_value=0.5, max_value=max_span_s,
                                      default_value=self.span, format="%.1f",
                                      callback=self.on_span)
                for i, spec in enumerate(self.specs):
                    dpg.add_checkbox(label=self.groups[spec.key].name, default_value=True,
                                     user_data=i,
                                     callback=self.on_toggle_plot, tag=f"{T}show.{i}")
            dpg.add_text("", tag=T + "display", color=INK_SOFT)
            self.series: list[list[tuple[str, int]]] = []
            for i, spec in enumerate(self.specs):
                tag = f"{T}plot.{i}"
                self._labels[i] = spec.title
                with dpg.plot(label=spec.title, height=height, width=-1, tag=tag,
                              no_menus=True, no_mouse_pos=True):
                    dpg.add_plot_legend(horizontal=True, outside=True,
                                        location=dpg.mvPlot_Location_North)
                    dpg.add_plot_axis(dpg.mvXAxis, tag=f"{tag}.x", label="plant time [s]")
                    with dpg.plot_axis(dpg.mvYAxis, tag=f"{tag}.y"):
                        row = []
                        for key in spec.series:
                            prefix = self.groups[key].prefix
                            s = dpg.add_line_series([], [], tag=f"{tag}.{key}",
                                                    label=self._legend(key))
                            dpg.bind_item_theme(s, self.themes.series.get(prefix,
                                                                          self.themes.base))
                            row.append((f"{tag}.{key}", self.groups.index(key)))
                        self.series.append(row)
                        for j, line in enumerate(spec.lines):
                            drawn = dpg.add_inf_line_series([line.value], horizontal=True,
                                                            label=line.label,
                                                            tag=f"{tag}.line.{j}")
                            dpg.bind_item_theme(drawn, self.themes.line[line.level])
                        if spec.shows_range:
                            band = dpg.add_inf_line_series([spec.low, spec.high],
                                                           horizontal=True,
                                                           label="rig range")
                            dpg.bind_item_theme(band, self.themes.limit)
                        marks = dpg.add_inf_line_series([], tag=f"{tag}.trips",
                                                        label="trip / E-stop")
                        dpg.bind_item_theme(marks, self.themes.trip_time)
                        if spec.watched:
                            points = dpg.add_scatter_series([], [],
                                                            tag=f"{tag}.trip_points",
                                                            label="reached trip")
                            dpg.bind_item_theme(points, self.themes.trip_mark)
                    with dpg.plot_axis(dpg.mvYAxis2, tag=f"{tag}.y2", no_tick_labels=True,
                                       no_gridlines=True, no_tick_marks=True, opposite=True):
                        shade = dpg.add_shade_series([0.0], [0.0], y2=[0.0], tag=f"{tag}.fault",
                                                     label="fault active")
                        dpg.bind_item_theme(shade, self.themes.fault)
                    dpg.set_axis_limits(f"{tag}.y2", 0.0, 1.0)

    def _panels(self) -> None:
        g = self.groups
        with dpg.child_window(width=-1, height=-1, tag=T + "panels"):
            dpg.add_text("Signals")
            self.table_cells: list[tuple[str, int]] = []
            prefixes = [p for p in TABLE_ORDER if g.group(p)] + \
                [p for p in g.prefixes() if p not in TABLE_ORDER and p not in PANEL_PREFIXES]
            with dpg.table(header_row=True, row_background=True, borders_innerH=True,
                           policy=dpg.mvTable_SizingStretchProp, tag=T + "table",
                           scrollY=True, height=120):
                for name, weight in (("signal", 0.4), ("value", 0.25), ("unit", 0.12),
                                     ("rig range", 0.23)):
                    dpg.add_table_column(label=name, init_width_or_weight=weight)
                for p in prefixes:
                    with dpg.table_row():           # the kind of signal, then its signals
                        dpg.add_text(SIGNAL_LABELS.get(p, p), color=ACCENT)
                    for c in g.group(p):
                        with dpg.table_row():
                            dpg.add_text(f"  {c.name}")
                            cell = f"{T}value.{c.key}"
                            dpg.add_text("", tag=cell)
                            dpg.add_text(c.unit)
                            dpg.add_text(f"{c.low:g} .. {c.high:g}" if c.has_range else "")
                            self.table_cells.append((cell, c.index))
            dpg.add_separator()
            dpg.add_text("", tag=T + "bars_title", wrap=WIDTH - LEFT_W - CENTRE_W - 60)
            limits = g.group("limit")
            n_bars = len(limits) if limits else sum(
                1 for p in ("y", "u", "x") for c in g.group(p) if c.has_range)
            for i in range(n_bars):
                dpg.add_progress_bar(tag=f"{T}bar.{i}", width=-1)
            dpg.add_separator()
            dpg.add_text("Interlocks")
            trips = g.group("trip")
            if not trips:
                dpg.add_text("no interlock columns in this run (trip:<name>)", color=INK_SOFT)
            for i, _ in enumerate(trips):
                dpg.add_button(tag=f"{T}lamp.{i}", width=-1)
                dpg.bind_item_theme(f"{T}lamp.{i}", self.themes.quiet)
            dpg.add_separator()
            dpg.add_text("Timing")
            for i in range(3):
                dpg.add_text("", tag=f"{T}timing.{i}")
            dpg.add_text("Link")
            dpg.add_button(tag=T + "link_lamp", label="", width=-1)
            dpg.bind_item_theme(T + "link_lamp", self.themes.quiet)
            for i in range(2):
                dpg.add_text("", tag=f"{T}link.{i}")
            dpg.add_separator()
            dpg.add_text("Events (newest first; click one, or hover its detail, for the "
                         "full text)", wrap=WIDTH - LEFT_W - CENTRE_W - 60)
            dpg.add_text("", tag=T + "event_detail", wrap=WIDTH - LEFT_W - CENTRE_W - 60,
                         color=INK_SOFT)
            with dpg.table(header_row=True, row_background=True, scrollY=True, height=-1,
                           policy=dpg.mvTable_SizingStretchProp, tag=T + "events"):
                for name, weight in (("t [s]", 0.18), ("kind", 0.32), ("detail", 0.5)):
                    dpg.add_table_column(label=name, init_width_or_weight=weight)
                for i in range(EVENTS_SHOWN):
                    with dpg.table_row(tag=f"{T}event.{i}", show=False):
                        dpg.add_selectable(label="", tag=f"{T}event.{i}.0", span_columns=True,
                                           callback=self.on_event_pick, user_data=i)
                        dpg.add_text("", tag=f"{T}event.{i}.1")
                        dpg.add_text("", tag=f"{T}event.{i}.2")
                        with dpg.tooltip(f"{T}event.{i}.2"):
                            dpg.add_text("", tag=f"{T}event.{i}.tip", wrap=480)

    # -- callbacks (plain functions; tests call them directly) -------------------------
    def on_estop(self, *_: Any) -> bool:
        return self.operator.estop(already_latched=self.estop_latched)

    def on_estop_key(self, *_: Any) -> bool:
        """The keyboard shortcut: the same E-stop as the button."""
        return self.on_estop()

    def on_event_pick(self, _sender: Any, _value: Any, index: int) -> None:
        """Show the full text of the clicked event in the detail pane (and keep it)."""
        if index < len(self.shown_events):
            self.selected_event = self.shown_events[index]
        for i in range(EVENTS_SHOWN):
            dpg.set_value(f"{T}event.{i}.0", i == index)

    def on_reset(self, *_: Any) -> bool:
        return self.operator.reset()

    def on_stop(self, *_: Any) -> bool:
        """Ask first: nothing is sent until the operator confirms."""
        dpg.configure_item(T + "stop_confirm_row", show=True)
        self.operator.message = "stop: confirm or cancel below"
        return False

    def on_stop_confirmed(self, *_: Any) -> bool:
        dpg.configure_item(T + "stop_confirm_row", show=False)
        return self.operator.stop()

    def on_stop_cancelled(self, *_: Any) -> bool:
        dpg.configure_item(T + "stop_confirm_row", show=False)
        self.operator.message = "stop cancelled; the run goes on"
        return False

    def on_set_reference(self, *_: Any) -> bool:
        return self.operator.set_reference(dpg.get_value(T + "ref_name"),
                                           dpg.get_value(T + "ref_value"))

    def on_mark_moment(self, *_: Any) -> bool:
        """Mark with the typed label if there is one, else with the chosen preset."""
        typed = str(dpg.get_value(T + "moment_text") or "").strip()
        sent = self.operator.mark_moment(typed or dpg.get_value(T + "moment_preset"))
        if sent and typed:
            dpg.set_value(T + "moment_text", "")
        return sent

    def on_fault_kind(self, _sender: Any, kind: str, *_: Any) -> None:
        """Offer the targets this kind can act on, fill its value with the kind's own
        default (never the last kind's value) and say what the value means."""
        choice = self.fault_kinds.get(kind)
        if choice is None:
            return
        targets = self.fault_targets(choice)
        dpg.configure_item(T + "fault_target", items=targets, show=bool(targets))
        dpg.set_value(T + "fault_target", targets[0] if targets else "")
        dpg.configure_item(T + "fault_target_text", show=not targets)
        dpg.configure_item(T + "fault_value", label=choice.parameter or "",
                           hint=choice.value_hint, show=choice.parameter is not None)
        dpg.set_value(T + "fault_value", choice.default_text)
        dpg.set_value(T + "fault_help", choice.description)

    def on_inject_fault(self, *_: Any) -> bool:
        kind = dpg.get_value(T + "fault_kind")
        choice = self.fault_kinds.get(kind)
        if choice is None:
            self.operator.message = "not sent: choose a fault kind"
            return False
        typed = not self.fault_targets(choice)
        target = dpg.get_value(T + ("fault_target_text" if typed else "fault_target"))
        value, duration, problem = check_fault_form(choice, dpg.get_value(T + "fault_value"),
                                                    dpg.get_value(T + "fault_duration"))
        if problem:
            self.operator.message = f"not sent: {problem}"
            return False
        return self.operator.inject_fault(kind, target, value, duration)

    def on_clear_fault(self, *_: Any) -> bool:
        return self.operator.clear_fault()

    def on_span(self, _sender: Any = None, value: float | None = None, *_: Any) -> None:
        if value is not None:
            self.span = float(value)

    def on_cursor(self, _sender: Any = None, value: float | None = None, *_: Any) -> None:
        if value is not None:
            self.cursor = float(value)
            self.cursor_moved = True

    def set_cursor(self, t: float) -> None:
        """Move the replay slider from code, as if it had been dragged there."""
        dpg.set_value(T + "cursor", t)
        self.on_cursor(None, t)

    def on_toggle_plot(self, _sender: Any, value: bool, index: int) -> None:
        dpg.configure_item(f"{T}plot.{index}", show=bool(value))

    # -- updating ----------------------------------------------------------------------
    def show(self, snap: Snapshot, *, extra_status: str = "",
             run_lines: list[tuple[str, bool | None]] | None = None) -> None:
        """Copy one snapshot into the widgets (cheap enough for every frame)."""
        self.estop_latched = snap.estop_latched
        self._lamp(T + "status", snap.status)
        now = time.perf_counter()
        self.frame_times.append(now)
        fps = (len(self.frame_times) - 1) / (now - self.frame_times[0]) \
            if len(self.frame_times) > 1 and now > self.frame_times[0] else 0.0
        dpg.set_value(T + "display", f"display {fps:.0f} fps (cap {self.frame_cap_hz:g})"
                      + (f" | {extra_status}" if extra_status else ""))
        if not self.replay:
            dpg.set_value(T + "operator_message", f"last action: {self.operator.message}")
        self._show_run_lines(run_lines or [])
        self._show_plots(snap)
        values = snap.current
        for cell, index in self.table_cells:
            dpg.set_value(cell, fmt(float(values[index])) if values is not None else "-")
        dpg.set_value(T + "bars_title", snap.bars_title)
        for i, bar in enumerate(snap.bars):
            dpg.configure_item(f"{T}bar.{i}", default_value=bar.fraction, overlay=bar.text)
            self._theme(f"{T}bar.{i}", self.themes.bar[min(bar.level, 2)])
        for i, lamp in enumerate(snap.lamps):
            dpg.configure_item(f"{T}lamp.{i}", label=lamp.text)
            self._theme(f"{T}lamp.{i}", self.themes.alarm if lamp.tripped else self.themes.quiet)
        for i in range(3):
            dpg.set_value(f"{T}timing.{i}", snap.timing[i] if i < len(snap.timing) else "")
            dpg.configure_item(f"{T}timing.{i}", show=i < len(snap.timing))
        self._lamp(T + "link_lamp", snap.link_lamp)
        for i in range(2):
            dpg.set_value(f"{T}link.{i}", snap.link[i] if i < len(snap.link) else "")
        self._show_events(snap)

    def _lamp(self, item: str, status: Status) -> None:
        looks = {ALARM: self.themes.alarm, ATTENTION: self.themes.attention,
                 ENDED: self.themes.ended, REPLAY: self.themes.replay}
        dpg.configure_item(item, label=status.text)
        self._theme(item, looks.get(status.level, self.themes.quiet))

    def _show_run_lines(self, lines: list[tuple[str, bool | None]]) -> None:
        colours = {True: INK, False: ALARM_RED, None: INK_SOFT}
        for i in range(RUN_LINES):
            item = f"{T}run.{i}"
            if i < len(lines):
                text, passed = lines[i]
                dpg.set_value(item, "\n".join(textwrap.wrap(
                    text, RUN_LINE_CHARS, break_long_words=False, break_on_hyphens=False)))
                dpg.configure_item(item, show=True, color=colours[passed])
            else:
                dpg.configure_item(item, show=False)

    def _show_events(self, snap: Snapshot) -> None:
        self.shown_events = snap.events
        for i in range(EVENTS_SHOWN):
            shown = i < len(snap.events)
            dpg.configure_item(f"{T}event.{i}", show=shown)
            if shown:
                event = snap.events[i]
                t, kind, detail = event.time, event.kind, event.detail
                dpg.configure_item(f"{T}event.{i}.0", label=f"{t:.3f}")
                dpg.set_value(f"{T}event.{i}.0", event == self.selected_event)
                dpg.set_value(f"{T}event.{i}.1", kind)
                dpg.set_value(f"{T}event.{i}.2", detail)
                dpg.set_value(f"{T}event.{i}.tip", f"{kind} at t = {t:.3f} s:\n{detail}")
        picked = self.selected_event or (snap.events[0] if snap.events else None)
        if picked is None:
            dpg.set_value(T + "event_detail", "")
            return
        t, kind, detail = picked.time, picked.kind, picked.detail
        which = "selected" if self.selected_event else "newest"
        dpg.set_value(T + "event_detail", f"{which} event, t = {t:.3f} s, {kind}:\n{detail}")

    def _theme(self, item: str, theme: int | str) -> None:
        """Bind a theme only when it changes (a state colour, with its text beside it)."""
        if self._bound.get(item) != theme:
            dpg.bind_item_theme(item, theme)
            self._bound[item] = theme

    def _show_plots(self, snap: Snapshot) -> None:
        rows = snap.rows
        t = rows[:, self.t_index]
        t1 = snap.t
        t0 = t1 - self.span
        x0, x1 = (0.0, self.span) if t0 < 0 else (t0, t1)   # fills from 0, then scrolls
        windows = [(w.name, max(w.start, t0), min(w.end if w.end is not None else t1, t1),
                    w.end is None or w.end >= t1) for w in snap.faults]
        windows = [w for w in windows if w[2] > w[1] or (w[3] and w[1] <= t1)]
        fx: list[float] = []
        fy: list[float] = []
        for _, start, end, _ in windows:
            fx += [start, start, end, end]
            fy += [0.0, 1.0, 1.0, 0.0]
        trip_times = [tt for tt, _ in snap.trips if t0 <= tt <= t1]
        active = sorted({name for name, _, _, now in windows if now})
        in_view = sorted({name for name, _, _, _ in windows} - set(active))
        for i, spec in enumerate(self.specs):
            tag = f"{T}plot.{i}"
            for series, index in self.series[i]:
                x, y = decimate_minmax(t, rows[:, index], BUCKETS)
                dpg.set_value(series, [np.ascontiguousarray(x), np.ascontiguousarray(y)])
            dpg.set_value(f"{tag}.fault", [fx or [t0], fy or [0.0], [0.0] * max(1, len(fy))])
            dpg.set_value(f"{tag}.trips", [trip_times])
            if spec.watched:
                marks = [m for m in snap.trip_marks if m.column == spec.key]
                dpg.set_value(f"{tag}.trip_points", [[m.t for m in marks],
                                                     [m.value for m in marks]])
            self._fit_y(i, spec, rows)
            label = spec.title
            if active:
                label += "  | FAULT ACTIVE: " + ", ".join(active)
            elif in_view:
                label += "  | fault in view: " + ", ".join(in_view)
            if label != self._labels[i]:
                dpg.configure_item(tag, label=label)
                self._labels[i] = label
            dpg.set_axis_limits(f"{tag}.x", x0, x1 if x1 > x0 else x0 + 1e-3)

    def _fit_y(self, i: int, spec: PlotSpec, rows: np.ndarray) -> None:
        """The y range holds the data in view and every limit line of the plot, so the
        distance to the trip point is always on screen."""
        values = [line.value for line in spec.lines]
        if spec.shows_range:
            values += [spec.low, spec.high]
        for _, index in self.series[i]:
            column = rows[:, index]
            column = column[np.isfinite(column)]
            if column.size:
                values += [float(column.min()), float(column.max())]
        if not values:
            return
        lo, hi = min(values), max(values)
        pad = 0.08 * (hi - lo) if hi > lo else max(abs(hi) * 0.1, 1e-3)
        dpg.set_axis_limits(f"{T}plot.{i}.y", lo - pad, hi + pad)

    # -- frames ------------------------------------------------------------------------
    def render(self) -> bool:
        """Draw one frame; False once the window has been closed."""
        if not dpg.is_dearpygui_running():
            return False
        dpg.render_dearpygui_frame()
        return True

    def regions(self) -> dict[str, list[int]]:
        """Screen rectangles [x, y, width, height] of the banner, the E-stop, the plots
        and the widget areas (controls, panels, lamps, slider, check box)."""
        out = {}
        names = ["banner", "status", "controls", "plots", "panels", "span", "show.0",
                 "run_panel", "link_lamp", "event_detail", "events"] + \
            ([] if self.replay else ["estop", "fault_value", "operator_message"]) + \
            [f"plot.{i}" for i in range(len(self.specs))] + \
            [f"lamp.{i}" for i in range(len(self.groups.group("trip")))]
        for name in names:
            if not dpg.does_item_exist(T + name):
                continue
            state = dpg.get_item_state(T + name)
            if "rect_size" not in state:
                continue
            # child windows report only their position in the (full-screen) main window
            x, y = state.get("rect_min", state["pos"])
            w, h = state["rect_size"]
            out[name] = [int(x), int(y), int(w), int(h)]
        return out

    def screenshot(self, path: str | Path) -> dict[str, list[int]]:
        """Save the frame buffer as PNG (written after one more frame) and its regions."""
        path = Path(path)
        dpg.output_frame_buffer(file=str(path))
        dpg.render_dearpygui_frame()
        dpg.render_dearpygui_frame()
        regions = self.regions()
        path.with_suffix(".regions.json").write_text(json.dumps(regions))
        return regions

    def close(self) -> None:
        dpg.destroy_context()
