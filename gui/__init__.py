"""The live dashboard (dearpygui), run in its own process.

The loop's side needs only ``start_dashboard_process`` (and ``display_available``);
the dashboard reads the tape and sends Commands back through the run's queue.
"""

from plantrig.gui._dashboard import Dashboard, run_dashboard
from plantrig.gui._decimate import decimate_minmax
from plantrig.gui._faults import fault_catalogue
from plantrig.gui._launch import NO_DISPLAY, LiveDashboard, replay
from plantrig.gui._operator import Operator
from plantrig.gui._process import (
    DashboardProcess,
    display_available,
    start_dashboard_process,
    start_replay_process,
)
from plantrig.gui._replay import Replay, RunFolderError, RunRecord, load_run, run_replay

__all__ = [
    "NO_DISPLAY", "Dashboard", "DashboardProcess", "LiveDashboard", "Operator", "Replay",
    "RunFolderError", "RunRecord", "decimate_minmax", "display_available", "fault_catalogue",
    "load_run", "replay", "run_dashboard", "run_replay", "start_dashboard_process",
    "start_replay_process",
]
