"""The dashboard in its own supervised process.

docs/platform.md: without a display dearpygui aborts its process (SIGABRT) instead of
raising (seen here too: sometimes it spins on GLFW errors instead), so the child checks
for a display before it loads dearpygui; and an uncapped GUI competes with the loop for
the cores. So the dashboard
is spawned (no state shared by accident), lowered in priority and kept off the core
the real-time loop pins itself to (the highest one, see sim's realtime setup). The
parent only ever waits on the child's sentinel from an idle thread: whatever the
dashboard does, dies of or hangs in, the loop never waits for it.
"""

from __future__ import annotations

import contextlib
import multiprocessing as mp
import multiprocessing.connection
import os
import signal
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

NICE_INCREMENT = 10
EXIT_TAPE_GONE = 3        # the run ended (and removed its tapes) before the window opened
EXIT_NO_DISPLAY = 4       # no display named: dearpygui would abort or spin on GLFW errors


def display_available() -> bool:
    """Whether a display server is named in the environment (dearpygui needs one)."""
    return bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))


def _step_aside() -> None:
    """Lower this process's priority and leave the loop's core to the loop."""
    with contextlib.suppress(OSError):
        os.nice(NICE_INCREMENT)
    if hasattr(os, "sched_getaffinity"):
        cpus = os.sched_getaffinity(0)
        if len(cpus) > 1:
            with contextlib.suppress(OSError):
                os.sched_setaffinity(0, cpus - {max(cpus)})


def _dashboard_child(tape_path: str, event_tape_path: str | None, rig_path: str,
                     command_queue: Any, frame_cap_hz: float, screenshot: str | None,
                     exit_after_frames: int | None, frames: Any,
                     folder: str | None = None) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)   # Ctrl-C is the run's; it closes us
    _step_aside()
    if not display_available():
        sys.exit(EXIT_NO_DISPLAY)
    if not Path(tape_path).exists():
        sys.exit(EXIT_TAPE_GONE)
    from plantrig.gui._dashboard import run_dashboard
    try:
        run_dashboard(tape_path, event_tape_path, rig_path, command_queue,
                      frame_cap_hz=frame_cap_hz, screenshot=screenshot,
                      exit_after_frames=exit_after_frames, frame_counter=frames,
                      folder=folder)
    except FileNotFoundError:
        if not Path(tape_path).exists():   # removed between the check and the open
            sys.exit(EXIT_TAPE_GONE)
        raise


def _replay_child(folder: str, frame_cap_hz: float, screenshot: str | None,
                  exit_after_frames: int | None, frames: Any) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)   # as the live window: the parent decides
    _step_aside()
    if not display_available():
        sys.exit(EXIT_NO_DISPLAY)
    from plantrig.gui._replay import run_replay
    run_replay(folder, frame_cap_hz=frame_cap_hz, screenshot=screenshot,
               exit_after_frames=exit_after_frames, frame_counter=frames)


class DashboardProcess:
    """A handle on a dashboard process: is it drawing, how did it end, stop it."""

    def __init__(self, process: mp.process.BaseProcess, frames: Any,
                 on_exit: Callable[[str], None] | None) -> None:
        self.process = process
        self._frames = frames
        self._told = threading.Lock()
        self._reported = False
        self._on_exit = on_exit
        if on_exit is not None:
            threading.Thread(target=self._watch, daemon=True,
                             name="plantrig-dashboard-watch").start()

    def _watch(self) -> None:
        multiprocessing.connection.wait([self.process.sentinel])
        self._exit_code_once_ended()
        self.report()

    def _exit_code_once_ended(self) -> None:
        """The process has ended (its sentinel is ready): wait for its exit code.

        This watcher and wait() both reap the child. Whichever waitpid loses gets ECHILD
        and sees no exit code until the winner has stored it, a moment later."""
        while self.process.exitcode is None:
            time.sleep(0.01)

    def report(self) -> None:
        """Say once how the window ended (to ``on_exit``), whichever thread sees it first.

        The watcher thread is a daemon: a command that returns right after wait() would
        end the interpreter before it speaks, so the waiter calls this too (a window
        that died unseen must never end the command silently).
        """
        if self._on_exit is None or self.process.exitcode is None:
            return
        with self._told:
            if self._reported:
                return
            self._reported = True
        self._on_exit(self.describe_exit())

    @property
    def pid(self) -> int | None:
        return self.process.pid

    @property
    def frames(self) -> int:
        """Frames the dashboard has drawn so far (0 until its window is up)."""
        return int(self._frames.value)

    @property
    def alive(self) -> bool:
        return self.process.is_alive()

    def describe_exit(self, live: bool = True) -> str:
        """How the window's process ended, in words; ``live``: it watched a run (which
        its end never affects), not a replay."""
        code = self.process.exitcode
        after = "; the run is not affected" if live else ""
        if code is None:
            return "dashboard running"
        if code == 0:
            return "dashboard closed"
        never = " before it drew a frame" if self.frames == 0 else ""
        if code == EXIT_TAPE_GONE:
            return "the run ended before the dashboard could open its tape"
        if code == EXIT_NO_DISPLAY:
            return f"dashboard not started: no display (DISPLAY is not set){after}"
        if code < 0:
            name = signal.Signals(-code).name
            hint = " (no display? dearpygui aborts without one)" \
                if -code == signal.SIGABRT else ""
            return f"dashboard ended by {name}{never}{hint}{after}"
        return f"dashboard failed with exit code {code}{never}{after}"

    def wait(self, timeout: float | None = None) -> bool:
        """Wait for the window to be closed; True if the process has ended."""
        self.process.join(timeout)
        if multiprocessing.connection.wait([self.process.sentinel], 0):
            self._exit_code_once_ended()
        return self.process.exitcode is not None

    def stop(self, timeout: float = 2.0) -> None:
        """Ask the dashboard to end, then make sure it has."""
        if self.process.is_alive():
            self.process.terminate()
            self.process.join(timeout)
        if self.process.is_alive():
            self.process.kill()
            self.process.join(timeout)


def start_dashboard_process(tape_path: str | Path, event_tape_path: str | Path | None,
                            rig_path: str | Path, command_queue: Any | None = None, *,
                            frame_cap_hz: float = 30.0, screenshot: str | Path | None = None,
                            exit_after_frames: int | None = None,
                            on_exit: Callable[[str], None] | None = None,
                            folder: str | Path | None = None) -> DashboardProcess:
    """Start the live dashboard on a running tape; returns at once.

    ``command_queue`` is the queue passed to run_to_folder (a spawn-context
    multiprocessing queue); ``on_exit(text)`` is called from an idle watcher thread
    when the dashboard ends, with how it ended; ``folder`` is the run folder being
    written (scenario plan, then outcome and verdicts), if known.
    """
    ctx = mp.get_context("spawn")
    frames = ctx.RawValue("q", 0)     # no lock: a killed child cannot leave it held
    proc = ctx.Process(
        target=_dashboard_child, name="plantrig-dashboard", daemon=True,
        args=(str(tape_path), str(event_tape_path) if event_tape_path else None,
              str(rig_path), command_queue, float(frame_cap_hz),
              str(screenshot) if screenshot else None, exit_after_frames, frames,
              str(folder) if folder is not None else None))
    proc.start()
    return DashboardProcess(proc, frames, on_exit)


def start_replay_process(folder: str | Path, *, frame_cap_hz: float = 30.0,
                         screenshot: str | Path | None = None,
                         exit_after_frames: int | None = None,
                         on_exit: Callable[[str], None] | None = None) -> DashboardProcess:
    """Open a recorded run folder in the dashboard, in its own process."""
    ctx = mp.get_context("spawn")
    frames = ctx.RawValue("q", 0)
    proc = ctx.Process(target=_replay_child, name="plantrig-replay", daemon=True,
                       args=(str(folder), float(frame_cap_hz),
                             str(screenshot) if screenshot else None, exit_after_frames,
                             frames))
    proc.start()
    return DashboardProcess(proc, frames, on_exit)
