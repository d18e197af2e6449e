"""A recorded run in the dashboard, with a time slider instead of operator controls.

A run folder is read by plantrig.sim.read_run, the one reader for run folders (run.h5,
or ticks.npy, or the journal of a run not yet recovered), with rig.toml beside it. The
same panels as the live dashboard show the moment under the slider and the window
before it.

A folder may come from someone else, so a replay reads data only: rig.toml is read
without importing its model module, the values are the recorded ones and the model
summary is the one in summary.json.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig.gui._columns import ColumnGroups
from plantrig.gui._dashboard import FramePacer, prepare_renderer
from plantrig.gui._eventlog import EventLog, EventRow
from plantrig.gui._faults import fault_catalogue, fault_targets
from plantrig.gui._model import DashboardModel
from plantrig.gui._operator import Operator
from plantrig.gui._plots import plot_specs
from plantrig.gui._runinfo import outcome_lines, progress_lines, scenario_plan, watchdog_of
from plantrig.gui._store import RecordStore
from plantrig.gui._view import DashboardView
from plantrig.sim import (
    Rig,
    RigFileError,
    column_parts,
    load_rig_as_data,
    read_run,
    rig_from_record,
)

DEFAULT_SCREENSHOT_FRAME = 30


class RunFolderError(ValueError):
    """The folder is not a readable plantrig run folder; carries the folder."""

    def __init__(self, folder: Path, problem: str) -> None:
        super().__init__(f"{folder}: {problem}")
        self.folder = folder


@dataclass
class RunRecord:
    folder: Path
    rig: Rig
    columns: list[str]
    units: list[str]
    n_ticks: int                # tick records in the folder; RecordStore reads them
    events: list[EventRow]
    summary: dict[str, object]
    rig_note: str = ""          # set when rig.toml could not be read and the record's own
                                # description of the rig (run_start.json) stands in


def load_run(folder: str | Path) -> RunRecord:
    """Read a run folder; every problem is a RunFolderError naming the file."""
    folder = Path(folder)
    if not folder.is_dir():
        raise RunFolderError(folder, "no such folder")
    if not (folder / "rig.toml").is_file():
        raise RunFolderError(folder, "no rig.toml: is this a plantrig run folder?")
    try:
        record = read_run(folder, ticks=(0, 0))      # names, units, events: no rows yet
    except (OSError, ValueError, KeyError) as exc:
        raise RunFolderError(folder, f"tick data unreadable: {exc}") from None
    if "t" not in record.columns:
        raise RunFolderError(folder, "the tick data has no 't' column")
    columns, units = record.columns, record.units
    events = [EventRow.of(e) for e in record.events]
    summary_path = folder / "summary.json"
    summary = _json(folder, summary_path) if summary_path.is_file() else {}
    rig, note = _rig(folder)
    return RunRecord(folder, rig, columns, units, record.ticks_total, events, summary, note)


def _overrun_ticks(record: RunRecord) -> NDArray[np.int64]:
    """The ticks that started a whole tick late or more, from the lateness column read a
    part at a time."""
    late, first = [], 0
    for part in column_parts(record.folder, "lateness"):
        late.append(first + np.flatnonzero(part >= record.rig.tick))
        first += len(part)
    return np.concatenate(late) if late else np.empty(0, dtype=np.int64)


def _rig(folder: Path) -> tuple[Rig, str]:
    """rig.toml read as data; if this version cannot read it (another version wrote
    it), the record's own description of the rig, with a note saying so."""
    try:
        return load_rig_as_data(folder / "rig.toml"), ""
    except RigFileError as exc:
        try:
            rig = rig_from_record(folder)
        except RigFileError:
            raise exc from None
        return rig, (f"{exc.issues[0]}; names, units and ranges from run_start.json "
                     "(no loops, limit thresholds or references)")


def _json(folder: Path, path: Path) -> dict[str, Any]:
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise RunFolderError(folder, f"{path.name} unreadable: {exc}") from None
    if not isinstance(doc, dict):
        raise RunFolderError(folder, f"{path.name} is not a JSON object")
    return doc


class Replay:
    """The dashboard over a recorded run; ``frame()`` draws the slider's moment.

    It looks unlike a live run on purpose: the status line says "REPLAY of <run id>"
    in the accent colour (never the live quiet or E-stop look), there is no E-stop or
    any other control, and the left column shows the recorded outcome and verdicts
    with the scenario's progress up to the slider's moment.
    """

    def __init__(self, folder: str | Path, *, frame_cap_hz: float = 30.0,
                 span_s: float = 10.0) -> None:
        prepare_renderer()
        self.record = rec = load_run(folder)
        groups = ColumnGroups(rec.columns, rec.units, rec.rig)
        self.store = RecordStore(rec.folder, rec.n_ticks, rec.rig.tick, groups.index("t"))
        rig = rec.rig
        self.model = DashboardModel(groups, rig.tick, has_link=rig.controller.kind == "external",
                                    limits=getattr(rig, "limits", ()),
                                    watchdog_s=watchdog_of(rig))
        self.overrun_ticks = _overrun_ticks(rec) if "lateness" in groups else np.empty(0)
        span_total = max(self.store.t_last - self.store.t_first, rec.rig.tick)
        self.run_id = rec.folder.name
        self.view = DashboardView(
            title=f"plantrig REPLAY of {self.run_id}", groups=groups,
            specs=plot_specs(groups, rec.rig), operator=Operator(None),
            fault_kinds=fault_catalogue(),
            fault_targets=lambda choice: fault_targets(choice, rig),
            replay_range=(self.store.t_first, self.store.t_last),
            span_s=min(span_s, span_total), max_span_s=max(span_total, 0.5),
            frame_cap_hz=frame_cap_hz)
        self.plan, self.plan_note = scenario_plan(rec.folder, rig)
        self.log = EventLog()
        self.frames = 0

    def seek(self, t: float) -> None:
        """Move the slider (what dragging it does)."""
        self.view.set_cursor(t)

    def run_lines(self) -> list[tuple[str, bool | None]]:
        """Recorded outcome and verdicts first (they do not move with the slider), then
        the scenario's progress up to the slider's moment."""
        lines = outcome_lines(self.record.summary or None)
        lines += [(text, None) for text in progress_lines(self.plan, self.log)]
        if self.plan_note:
            lines.append((self.plan_note, False))
        return lines

    def frame(self) -> bool:
        view = self.view
        if view.cursor_moved:
            self.log = EventLog.upto(self.record.events, view.cursor)
            i = self.store.position(view.cursor)     # the late ticks before the cursor
            self.model.overruns = int(np.searchsorted(self.overrun_ticks, i))
            view.cursor_moved = False
        snap = self.model.snapshot(self.store, view.cursor, view.span, log=self.log,
                                   replay_of=self.run_id)
        view.show(snap, run_lines=self.run_lines())
        self.frames += 1
        return view.render()

    def close(self) -> None:
        self.view.close()


def run_replay(folder: str | Path, *, frame_cap_hz: float = 30.0,
               screenshot: str | Path | None = None, exit_after_frames: int | None = None,
               at: float | None = None, frame_counter: Any = None) -> int:
    """Show a recorded run until the window is closed (or ``exit_after_frames``).

    ``at`` puts the slider at that plant time first; ``screenshot`` saves a PNG at
    frame ``exit_after_frames`` (or 30). Returns the number of frames drawn.
    """
    replay = Replay(folder, frame_cap_hz=frame_cap_hz)
    if at is not None and math.isfinite(at):
        replay.seek(at)
    shot_at = exit_after_frames or DEFAULT_SCREENSHOT_FRAME
    pacer = FramePacer(frame_cap_hz)
    try:
        while replay.frame():
            if frame_counter is not None:
                frame_counter.value = replay.frames
            if screenshot is not None and replay.frames == shot_at:
                replay.view.screenshot(screenshot)
            if exit_after_frames is not None and replay.frames >= exit_after_frames:
                break
            pacer.wait()
    finally:
        replay.close()
    return replay.frames
