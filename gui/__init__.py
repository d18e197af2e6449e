"""The live dashboard (dearpygui), run in its own process.

The loop's side needs only ``start_dashboard_process`` (and ``display_available``);
the dashboard reads the tape and sends Commands back through the run's queue. Names
load on first use (PEP 562, plantrig._lazy), so importing this package loads neither
dearpygui nor the simulator.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from plantrig._lazy import lazy_names

# the module (under plantrig.gui) each public name lives in
_HOME: dict[str, str] = {
    **dict.fromkeys(["Dashboard", "run_dashboard"], "_dashboard"),
    **dict.fromkeys(["fault_catalogue"], "_faults"),
    **dict.fromkeys(["NO_DISPLAY", "LiveDashboard", "replay"], "_launch"),
    **dict.fromkeys(["Operator"], "_operator"),
    **dict.fromkeys(
        [
            "DashboardProcess",
            "display_available",
            "start_dashboard_process",
            "start_replay_process",
        ],
        "_process",
    ),
    **dict.fromkeys(
        ["Replay", "RunFolderError", "RunRecord", "load_run", "run_replay"], "_replay"
    ),
}

__all__ = [
    "NO_DISPLAY", "Dashboard", "DashboardProcess", "LiveDashboard", "Operator", "Replay",
    "RunFolderError", "RunRecord", "display_available", "fault_catalogue",
    "load_run", "replay", "run_dashboard", "run_replay", "start_dashboard_process",
    "start_replay_process",
]

__getattr__, __dir__ = lazy_names(__name__, _HOME, __all__)

if TYPE_CHECKING:  # type checkers and editors see every name where it lives
    from plantrig.gui._dashboard import Dashboard, run_dashboard
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
