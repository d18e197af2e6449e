"""What the command line needs to open the dashboard: for a run, or for a run folder.

Kept apart from the CLI so the CLI stays a thin composition root and loads dearpygui
only when asked (``plantrig run --gui``, ``plantrig replay``).
"""

from __future__ import annotations

import multiprocessing as mp
import sys
from pathlib import Path
from typing import Any

from plantrig.gui._process import (
    EXIT_TAPE_GONE,
    DashboardProcess,
    display_available,
    start_dashboard_process,
    start_replay_process,
)
from plantrig.gui._replay import RunFolderError, load_run
from plantrig.gui._runinfo import live_folder
from plantrig.sim import RigFileError

SCREENSHOT_FRAMES = 8       # frames drawn before a --screenshot is taken
NO_DISPLAY = ("no display: the dashboard needs an X or Wayland display (DISPLAY is not set); "
              "run without --gui, or under Xvfb")


def _say(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


class LiveDashboard:
    """The command queue for a run and the callback that opens the dashboard on it.

    ``runs`` is the folder the run folder is made in (``run --out``): the window finds
    its run folder there, for the scenario's plan and, at the end, the outcome and
    verdicts. Whatever happens to the window, the run's record, printed outcome and
    exit code are the command's; the window only ever shows them.
    """

    def __init__(self, rig_path: str | Path, *, frame_cap_hz: float = 30.0,
                 runs: str | Path | None = None) -> None:
        self.rig_path = Path(rig_path)
        self.frame_cap_hz = frame_cap_hz
        self.runs = Path(runs) if runs is not None else None
        self.commands: Any = mp.get_context("spawn").Queue()
        self.process: DashboardProcess | None = None

    def on_tapes_ready(self, tape_path: Path, event_tape_path: Path) -> None:
        """run_to_folder calls this once the tapes exist; returns at once."""
        self.process = start_dashboard_process(tape_path, event_tape_path, self.rig_path,
                                               self.commands,
                                               frame_cap_hz=self.frame_cap_hz, on_exit=_say,
                                               folder=live_folder(tape_path, self.runs))

    def close(self) -> None:
        """Close the window now (the run was stopped by a signal: nobody waits to look)."""
        if self.process is not None:
            self.process.stop()

    def after_run(self, folder: Path) -> str | None:
        """Keep the window up for a look at the end of the run, until it is closed.

        A fast run can end before the dashboard has opened its tape (a spawned
        interpreter takes a second or more to start); then the run folder is opened in
        replay instead, as it is when the live window died before it drew anything.
        How the window ended is always said before this returns. Returns None when the
        last window was closed (or Ctrl-C), else what went wrong with it, so the command
        can say so after the run's own result.
        """
        process = self.process
        if process is None:
            return None
        _say("the run has ended and is recorded; close the dashboard window (or press "
             "Ctrl-C) to exit")
        try:
            process.wait()
            process.report()
            code = process.process.exitcode
            if code == EXIT_TAPE_GONE or (code != 0 and process.frames == 0):
                _say(f"opening {folder} in replay")
                process = start_replay_process(folder, frame_cap_hz=self.frame_cap_hz,
                                               on_exit=_say)
                process.wait()
                process.report()
        except KeyboardInterrupt:
            process.stop()
            return None
        return None if process.process.exitcode == 0 else process.describe_exit()


def replay(folder: str | Path, *, frame_cap_hz: float = 30.0,
           screenshot: str | Path | None = None) -> int:
    """Open a run folder; 0 when the window is closed, 2 for a bad folder or no display.

    With ``screenshot`` the window draws a few frames, saves itself as that PNG and
    closes; 1 if no picture was saved.
    """
    try:
        record = load_run(folder)
    except RunFolderError as exc:
        _say(f"error: {exc}")
        return 2
    except RigFileError as exc:
        for issue in exc.issues:
            _say(f"error: {issue}")
        return 2
    if record.rig_note:
        _say(f"warning: {record.rig_note}")
    if not display_available():
        _say("error: no display: the replay window needs an X or Wayland display (DISPLAY "
             "is not set); run it under Xvfb, or use plantrig plot or report instead")
        return 2
    process = start_replay_process(folder, frame_cap_hz=frame_cap_hz, screenshot=screenshot,
                                   exit_after_frames=SCREENSHOT_FRAMES if screenshot else None)
    try:
        process.wait()
    except KeyboardInterrupt:
        process.stop()
        return 0
    if process.process.exitcode != 0:
        _say(process.describe_exit(live=False))
        return 1
    if screenshot is not None and not Path(screenshot).is_file():
        _say(f"error: the replay window saved no picture at {screenshot}")
        return 1
    return 0
