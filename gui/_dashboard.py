"""The live dashboard: reads a running tape, draws it, sends operator commands back.

It runs in its own process (see _process.py) and only ever reads the tape, so a slow
or dead dashboard cannot make the loop late. Frames are capped (docs/platform.md: an
uncapped dearpygui window under Mesa used both cores and pushed the loop's p99
lateness to 3 ms) and series are decimated to about one min-max pair per pixel column.
"""

from __future__ import annotations

import math
import os
import time
from pathlib import Path
from typing import Any

from plantrig.gui._columns import ColumnGroups
from plantrig.gui._faults import fault_catalogue, fault_targets
from plantrig.gui._feed import LiveFeed
from plantrig.gui._model import DashboardModel
from plantrig.gui._operator import Operator
from plantrig.gui._plots import plot_specs
from plantrig.gui._runinfo import (
    outcome_lines,
    pending_verdicts,
    progress_lines,
    read_summary,
    scenario_plan,
    watchdog_of,
)
from plantrig.gui._store import LiveStore
from plantrig.gui._view import DashboardView
from plantrig.sim import Rig, RigFileError, load_rig_as_data

MAX_SPAN_S = 30.0
MAX_KEEP_ROWS = 200_000
DEFAULT_SCREENSHOT_FRAME = 60
IDLE_RATIO = 1.0
SUMMARY_EVERY = 10             # frames between looks for summary.json once the run ended


class FramePacer:
    """Sleeps so frames start no more often than ``cap_hz`` and the window stays idle at
    least ``idle_ratio`` times as long as it was busy; never bursts to catch up.

    Under Mesa a full-size frame can take longer than the 33 ms of a 30 Hz cap, so a
    cap alone would still let the dashboard use a whole core; the idle ratio (1: at
    most half a core) bounds it however slow drawing is.
    """

    def __init__(self, cap_hz: float, idle_ratio: float = IDLE_RATIO) -> None:
        if not cap_hz > 0:
            raise ValueError(f"frame_cap_hz must be positive, got {cap_hz}")
        self.period = 1.0 / cap_hz
        self.idle_ratio = idle_ratio
        self.next = self.frame_start = time.perf_counter()

    def wait(self) -> None:
        now = time.perf_counter()
        busy = now - self.frame_start
        self.next = max(self.next + self.period, now + busy * self.idle_ratio)
        if self.next > now:
            time.sleep(self.next - now)
        self.frame_start = time.perf_counter()


def run_rig(rig_path: str | Path, folder: Path | None) -> Rig:
    """The rig as it runs: the run folder's rig.toml (overrides applied) when there is
    one, else the rig file; read as data, never importing a model module."""
    if folder is not None and (folder / "rig.toml").is_file():
        try:
            return load_rig_as_data(folder / "rig.toml")
        except RigFileError:
            pass
    return load_rig_as_data(rig_path)


def prepare_renderer() -> None:
    """Mesa's software renderer starts one thread per core unless told otherwise."""
    os.environ["LP_NUM_THREADS"] = "1"


class Dashboard:
    """One live dashboard window; ``frame()`` reads what is new and draws once.

    ``folder`` is the run folder being written (found by the launcher): it gives the
    rig as it runs, the scenario's plan and, once the run has ended, its outcome and
    verdicts from summary.json. Without it the window still works, with less to say.
    """

    def __init__(self, tape_path: str | Path, event_tape_path: str | Path | None,
                 rig_path: str | Path, command_queue: Any | None, *,
                 frame_cap_hz: float = 30.0, span_s: float = 10.0,
                 folder: str | Path | None = None) -> None:
        prepare_renderer()
        self.folder = Path(folder) if folder is not None else None
        rig = run_rig(rig_path, self.folder)   # names, ranges, limits; the run owns the model
        keep = int(min(MAX_KEEP_ROWS, math.ceil(MAX_SPAN_S / rig.tick) + 16))
        self.feed = LiveFeed(tape_path, event_tape_path, keep)
        groups = ColumnGroups(self.feed.columns, self.feed.units, rig)
        self.store = LiveStore(len(groups.columns), keep, groups.index("t"))
        self.model = DashboardModel(groups, rig.tick, has_link=rig.controller.kind == "external",
                                    limits=getattr(rig, "limits", ()),
                                    watchdog_s=watchdog_of(rig))
        self.operator = Operator(command_queue)
        self.rig = rig
        self.plan, self.plan_note = scenario_plan(self.folder, rig)
        self.summary: dict[str, Any] | None = None
        run_id = self.folder.name if self.folder is not None else rig.name
        self.view = DashboardView(
            title=f"plantrig dashboard: {run_id}", groups=groups,
            specs=plot_specs(groups, rig), operator=self.operator,
            fault_kinds=fault_catalogue(),
            fault_targets=lambda choice: fault_targets(choice, rig), span_s=span_s,
            max_span_s=min(MAX_SPAN_S, keep * rig.tick), frame_cap_hz=frame_cap_hz)
        self.frames = 0

    def ended(self) -> str | None:
        """The run's outcome once it has ended (None while it runs)."""
        s = self.summary
        if s is not None:
            return f"{s.get('ended')}, exit code {s.get('exit_code')}: {s.get('reason', '')}"
        if self.model.log.ended is not None:
            return self.model.log.ended
        return "the tape ended" if self.feed.ended else None

    def run_lines(self) -> list[tuple[str, bool | None]]:
        lines: list[tuple[str, bool | None]] = [
            (text, None) for text in progress_lines(self.plan, self.model.log)]
        if self.plan_note:
            lines.append((self.plan_note, False))
        if self.summary is not None:       # the result first, as in replay
            return outcome_lines(self.summary) + lines
        if self.ended() is not None:
            lines.append(("the run has ended; waiting for its summary", None))
        return lines + pending_verdicts(self.plan)

    def frame(self) -> bool:
        """Read new rows and events, draw one frame; False once the window is closed."""
        rows, events = self.feed.poll()
        self.store.append(rows)
        self.model.count_rows(rows)
        self.model.log.add(events)
        self.operator.hear(events)
        ended = self.ended()
        if ended is not None:
            self.operator.run_ended(ended)
            if self.summary is None and self.frames % SUMMARY_EVERY == 0:
                self.summary = read_summary(self.folder)
                ended = self.ended()
        snap = self.model.snapshot(self.store, self.store.t_last, self.view.span,
                                   ended=ended)
        lost = self.feed.lost
        self.view.show(snap, extra_status=f"rows not displayed {lost}" if lost else "",
                       run_lines=self.run_lines())
        self.frames += 1
        return self.view.render()

    def close(self) -> None:
        self.view.close()
        self.feed.close()


def run_dashboard(tape_path: str | Path, event_tape_path: str | Path | None,
                  rig_path: str | Path, command_queue: Any | None, *,
                  frame_cap_hz: float = 30.0, screenshot: str | Path | None = None,
                  exit_after_frames: int | None = None, frame_counter: Any = None,
                  folder: str | Path | None = None) -> int:
    """Show the dashboard until its window is closed (or ``exit_after_frames``).

    ``screenshot`` saves the frame buffer as PNG at frame ``exit_after_frames`` (or
    frame 60) with a JSON of the regions beside it. ``frame_counter`` (a shared
    integer with ``.value``) lets a supervisor see frames being drawn. Returns the
    number of frames drawn.
    """
    dash = Dashboard(tape_path, event_tape_path, rig_path, command_queue,
                     frame_cap_hz=frame_cap_hz, folder=folder)
    shot_at = exit_after_frames or DEFAULT_SCREENSHOT_FRAME
    pacer = FramePacer(frame_cap_hz)
    try:
        while dash.frame():
            if frame_counter is not None:
                frame_counter.value = dash.frames
            if screenshot is not None and dash.frames == shot_at:
                dash.view.screenshot(screenshot)
            if exit_after_frames is not None and dash.frames >= exit_after_frames:
                break
            pacer.wait()
    finally:
        dash.close()
    return dash.frames
