"""What a run folder says besides its ticks: which run it is, its scenario's plan, and
(once the run has ended) its outcome and verdicts.

Live and replay read the same files the same way, as data: rig.toml (never importing
a model module), scenario.toml and summary.json. The live dashboard finds its run
folder from the tape it was given: the tape is named after the folder, and the
folder's run_start.json names the tape, which confirms the match.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from plantrig.gui._eventlog import EventLog
from plantrig.sim import Rig, RigFileError, load_scenario

RUN_START = "run_start.json"
SUMMARY = "summary.json"
SCENARIO = "scenario.toml"


def watchdog_of(rig: Rig) -> float:
    """The silence after which the engine calls the link lost: the link's own
    ``watchdog_timeout`` for a real link, ``[safety]``'s otherwise (as sim's faults do)."""
    timeout = float(rig.safety.watchdog_timeout)
    if rig.controller.kind == "external" and rig.link is not None:
        timeout = rig.link.watchdog_timeout
    return timeout


def live_folder(tape_path: str | Path, runs: str | Path | None) -> Path | None:
    """The run folder under ``runs`` that is writing ``tape_path``, or None.

    The engine names its tape ``plantrig-<folder name>-<hex>.tape``; the folder's
    run_start.json names the tape, so a wrong guess is never taken.
    """
    if runs is None:
        return None
    stem = Path(tape_path).stem
    if not stem.startswith("plantrig-") or "-" not in stem[len("plantrig-"):]:
        return None
    candidate = Path(runs) / stem[len("plantrig-"):].rsplit("-", 1)[0]
    start = _json(candidate / RUN_START)
    return candidate if start and start.get("tape") == str(tape_path) else None


def read_summary(folder: Path | None) -> dict[str, Any] | None:
    """summary.json once it is complete (None before: the run is still being recorded)."""
    return _json(folder / SUMMARY) if folder is not None else None


def _json(path: Path) -> dict[str, Any] | None:
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return doc if isinstance(doc, dict) else None


@dataclass(frozen=True)
class ScenarioPlan:
    """A scenario's steps (labels, file order), the phases it marks and its verdicts."""

    name: str
    steps: tuple[str, ...]
    phases: tuple[str, ...]
    verdicts: tuple[str, ...]


def scenario_plan(folder: Path | None, rig: Rig) -> tuple[ScenarioPlan | None, str]:
    """The plan of the folder's scenario.toml (None without one), and a note when it
    cannot be read."""
    if folder is None or not (folder / SCENARIO).is_file():
        return None, ""
    try:
        scenario = load_scenario(folder / SCENARIO, rig)
    except RigFileError as exc:
        return None, f"{SCENARIO}: {exc.issues[0] if exc.issues else exc}"
    phases = tuple(str(c.args.get("name", "")) for step in scenario.steps
                   for c in step.commands if c.kind == "mark_phase")
    return ScenarioPlan(scenario.name, tuple(s.label for s in scenario.steps), phases,
                        tuple(v.name for v in scenario.verdicts)), ""


def progress_lines(plan: ScenarioPlan | None, log: EventLog) -> list[str]:
    """Scenario progress as the events so far tell it: steps fired, phases reached."""
    if plan is None:
        return ["no scenario"] + ([f"phases marked: {_times(log.phases)}"] if log.phases
                                  else [])
    fired = dict((label, t) for t, label in reversed(log.steps))
    lines = [f"scenario {plan.name}: {sum(s in fired for s in plan.steps)} of "
             f"{len(plan.steps)} steps fired"]
    for label in plan.steps:
        lines.append(f"  done  {label} at {fired[label]:.3f} s" if label in fired
                     else f"  --    {label}")
    reached = [name for _, name in log.phases]
    waiting = [p for p in plan.phases if p not in reached]
    lines.append(f"phases reached: {_times(log.phases) or 'none yet'}")
    if waiting:
        lines.append(f"phases to come: {', '.join(waiting)}")
    return lines


def _times(marks: list[tuple[float, str]]) -> str:
    return ", ".join(f"{name} ({t:.3f} s)" for t, name in marks)


def _num(value: Any) -> str:
    return "-" if not isinstance(value, int | float) or not math.isfinite(value) \
        else f"{value:.4g}"


def outcome_lines(summary: dict[str, Any] | None) -> list[tuple[str, bool | None]]:
    """(text, passed) per line: the outcome with its exit code, each acceptance rule
    that failed, then every verdict. None before the summary exists."""
    if not summary:
        return [("outcome: judged when the run ends", None)]
    code = summary.get("exit_code")
    ended = str(summary.get("ended", "unknown"))
    lines: list[tuple[str, bool | None]] = [
        (f"outcome: {ended}, exit code {code}: {summary.get('reason', '')}",
         code == 0 if isinstance(code, int) else None)]
    for rule in summary.get("acceptance") or []:
        if rule.get("passed") is False:
            lines.append((f"rule failed: {rule.get('rule')}: {rule.get('measured')} "
                          f"(needed {rule.get('needed')})", False))
    verdicts = summary.get("verdicts") or []
    if verdicts:
        failed = sum(not v.get("passed") for v in verdicts)
        lines.append((f"verdicts: {len(verdicts) - failed} of {len(verdicts)} passed",
                      failed == 0))
    for v in verdicts:
        unit = f" {v.get('unit')}" if v.get("unit") else ""
        lines.append((f"{'pass' if v.get('passed') else 'FAIL'}  {v.get('name')}: "
                      f"{_num(v.get('measured'))}{unit} (limit {_num(v.get('limit'))}); "
                      f"{v.get('detail', '')}", bool(v.get("passed"))))
    return lines


def pending_verdicts(plan: ScenarioPlan | None) -> list[tuple[str, bool | None]]:
    """Before the run has ended: the verdicts it will be judged by, not yet judged."""
    if plan is None or not plan.verdicts:
        return [("outcome and verdicts: judged when the run ends", None)]
    lines: list[tuple[str, bool | None]] = [
        (f"verdicts ({len(plan.verdicts)}), judged when the run ends:", None)]
    return lines + [(f"  ..  {name}", None) for name in plan.verdicts]
