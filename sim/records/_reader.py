"""Reading a run folder back: numpy arrays by column name, units, events, summary.

One reader for every state a folder can be in: finished (``run.h5``, or ``ticks.npy``
where h5py is not installed), or crashed and not yet recovered (``ticks.journal`` with
``run_start.json`` or ``columns.json``; a torn last row is dropped). A folder written
before a link health counter was renamed is read under today's names (docs/protocol.md
section 5, "Older run folders"), and its events get the name and window fields today's
records carry (``current_event_fields``), so every reader sees one vocabulary.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.engine._contracts import BY_COMMAND, WINDOW_DISTURBANCE, WINDOW_FAULT
from plantrig.sim.records._records import RUN_START, read_events
from plantrig.sim.safety._interlocks import ESTOP

# MQTT link health as recorded before the counters took their names of docs/protocol.md
# section 5 (2 and 3 December 2026). Such a record is known by watchdog_lost, which the
# MQTT link wrote into every health until then and never since.
OLD_MQTT_MARK = "watchdog_lost"
OLD_MQTT_NAMES: dict[str, str] = {
    "bad_channels": "rejected_count",   # not one value per input
    "rejected_tick": "rejected_echo",   # an echo of a tick never sent
}
OLD_MQTT_DROPPED = ("sends", "receives", "watchdog_lost")   # the link's own, no meaning now


def current_link_names(summary: dict[str, Any]) -> dict[str, Any]:
    """``summary`` with its link health (``summary["link"]``) under today's names.

    An old MQTT record's counters are renamed, its private ones left out, and its
    ``dropped_out`` given today's meaning: it then left out the values dropped while the
    broker was away (``dropped_offline``), which it now includes. Any other record is
    returned as it is.
    """
    health = summary.get("link")
    if not isinstance(health, dict) or OLD_MQTT_MARK not in health:
        return summary
    now: dict[str, Any] = {}
    for key, value in health.items():
        if key not in OLD_MQTT_DROPPED:
            new = OLD_MQTT_NAMES.get(str(key), str(key))
            now[new] = now.get(new, 0.0) + value
    now["dropped_out"] = now.get("dropped_out", 0.0) + now.get("dropped_offline", 0.0)
    return {**summary, "link": now}


# Events recorded before they carried a name and a window (3 December 2026) said the
# name only at the head of their detail, as "<name>: ..." for these kinds.
NAMED_IN_DETAIL = ("fault_injected", "fault_cleared", "trip", "reset", "reset_refused",
                   "limit_warn", "scenario_step", "expect", "rule_failed")


def current_event_fields(event: dict[str, Any]) -> dict[str, Any]:
    """``event`` with the ``name`` and ``window`` fields today's records carry.

    The one place a name or window is taken from an event's text: an event recorded
    before those fields existed gets them from the detail the engine then wrote,
    "<name>: ..." (the name is what comes before the first ": "), a phase's detail
    being its name and the E-stop's name "estop"; a ``fault_injected`` of a disturbance
    said "<name>: disturbance on ...". An event that has a name already, or is of a
    kind that names nothing, is returned as it is.
    """
    kind, detail = event.get("kind"), str(event.get("detail", ""))
    if "name" in event:
        return event
    if kind == "phase":
        name, rest = detail, ""
    elif kind == "estop":
        name, rest = ESTOP, ""
    elif kind in NAMED_IN_DETAIL and ": " in detail:
        name, _, rest = detail.partition(": ")
    else:
        return event
    now = {**event, "name": name} if name else dict(event)
    if kind == "fault_cleared" and rest == "cleared by command" and "source" not in event:
        now["source"] = BY_COMMAND
    if kind == "fault_injected" and "window" not in event:
        now["window"] = WINDOW_DISTURBANCE if rest.startswith(WINDOW_DISTURBANCE + " ") \
            else WINDOW_FAULT
    return now


def read_current_events(path: Path) -> list[dict[str, Any]]:
    """The events of an events.jsonl file, each with today's fields (current_event_fields)."""
    return [current_event_fields(e) for e in read_events(path)]


@dataclass
class RunRecord:
    """One run's record. ``rows`` is ticks x columns float64, in tick-record order."""

    folder: Path
    columns: list[str]
    units: list[str]
    rows: NDArray[np.float64]
    events: list[dict[str, Any]]
    summary: dict[str, Any]
    info: list[dict[str, Any]] = field(default_factory=list)
    source: str = ""
    ticks_total: int = -1     # tick records the folder holds (rows may be a slice of them)

    def __getitem__(self, name: str) -> NDArray[np.float64]:
        try:
            return self.rows[:, self.columns.index(name)]
        except ValueError:
            raise KeyError(f"no column {name!r}; columns: {', '.join(self.columns)}") from None

    def __contains__(self, name: object) -> bool:
        return name in self.columns

    @property
    def t(self) -> NDArray[np.float64]:
        return self["t"]

    def unit(self, name: str) -> str:
        return self.units[self.columns.index(name)]

    def names(self, prefix: str) -> list[str]:
        """Columns with ``prefix`` ("y", "u", "limit", ...), in record order."""
        return [c for c in self.columns if c.startswith(prefix + ":")]

    def as_dict(self) -> dict[str, NDArray[np.float64]]:
        return {name: self.rows[:, i] for i, name in enumerate(self.columns)}


def read_run(folder: str | Path, columns: list[str] | None = None,
             ticks: tuple[int, int] | None = None, *, ticks_only: bool = False) -> RunRecord:
    """Read a run folder, from the most complete copy of its tick data it holds.

    ``columns`` reads only those columns and ``ticks`` = (first, stop) only those tick
    records: a weekend-long run is opened a part at a time, never whole unless asked.
    ``ticks_only`` skips the events and the summary (reading a part again and again).
    """
    folder = Path(folder)
    summary = current_link_names(_json(folder / "summary.json") or {})
    start = _json(folder / RUN_START) or {}
    h5 = folder / "run.h5"
    if h5.exists() and _have_h5py():
        from plantrig.sim.records._hdf5 import read_run_h5

        d = read_run_h5(h5, columns, ticks, ticks_only=ticks_only)
        return RunRecord(folder, d["columns"], d["units"], d["rows"],
                         [current_event_fields(e) for e in d["events"]],
                         summary or current_link_names(d["attrs"].get("summary", {})),
                         d["info"], "run.h5", d["length"])
    info = start.get("columns") or []
    if info:
        every, units = [c["name"] for c in info], [c["unit"] for c in info]
    elif (folder / "columns.json").exists():
        meta = json.loads((folder / "columns.json").read_text())
        every, units = meta["columns"], meta["units"]
        info = [{"name": c, "unit": u} for c, u in zip(every, units, strict=True)]
    else:
        raise FileNotFoundError(f"{folder}: not a plantrig run folder (no run.h5, "
                                f"{RUN_START} or columns.json)")
    events = [] if ticks_only else read_current_events(folder / "events.jsonl")
    n = len(every)
    if (folder / "ticks.npy").exists():
        table = np.load(folder / "ticks.npy", mmap_mode="r").view(np.float64).reshape(-1, n)
        source = "ticks.npy"
    elif (folder / "ticks.journal").exists():
        whole = (folder / "ticks.journal").stat().st_size // (n * 8)   # a torn row dropped
        table = np.memmap(folder / "ticks.journal", dtype=np.float64, mode="r",
                          shape=(whole, n)) if whole else np.zeros((0, n))
        source = "ticks.journal"
    else:
        raise FileNotFoundError(f"{folder}: no tick data (run.h5, ticks.npy or ticks.journal)")
    first, stop = ticks if ticks is not None else (0, table.shape[0])
    names = every if columns is None else list(columns)
    unknown = [c for c in names if c not in every]
    if unknown:
        raise KeyError(f"no column {unknown[0]!r}; columns: {', '.join(every)}")
    picks = [every.index(c) for c in names]
    rows = np.array(table[max(0, first):max(first, stop)][:, picks], dtype=np.float64)
    total = table.shape[0]
    del table
    return RunRecord(folder, names, [units[i] for i in picks], rows, events, summary,
                     [info[i] for i in picks], source, total)


def _json(path: Path) -> Any:
    return json.loads(path.read_text()) if path.exists() else None


def _have_h5py() -> bool:
    try:
        import h5py  # noqa: F401
    except ImportError:
        return False
    return True


DISPLAY_ROWS = 20_000     # a record longer than this is thinned for plots and pages


def read_for_display(folder: str | Path, max_rows: int | None = None) -> RunRecord:
    """The run as plots and report pages need it, in memory that does not grow with the
    run: a record of up to ``max_rows`` (DISPLAY_ROWS) ticks as recorded; a longer one
    read a part at a time and thinned to each bucket's per-column min and max
    (sim/records/_envelope.py: every spike, limit code and trip stays). ``ticks_total``
    keeps the true count; per-tick statistics come from column_parts, never from a
    thinned record."""
    from plantrig.sim.records._envelope import thin_rows

    max_rows = DISPLAY_ROWS if max_rows is None else max_rows
    head = read_run(folder, ticks=(0, 0))
    if head.ticks_total <= max_rows:
        return read_run(folder)
    rows = thin_rows(lambda a, b: read_run(folder, ticks=(a, b), ticks_only=True).rows,
                     0, head.ticks_total,
                     max_rows, head.columns.index("t"))
    return RunRecord(head.folder, head.columns, head.units, rows, head.events, head.summary,
                     head.info, f"{head.source}, thinned to {len(rows)} rows for display",
                     head.ticks_total)


def column_parts(folder: str | Path, column: str,
                 part_rows: int = 1 << 18) -> Iterator[NDArray[np.float64]]:
    """One column of a run folder, every tick, a part at a time."""
    total = read_run(folder, ticks=(0, 0), ticks_only=True).ticks_total
    for first in range(0, total, part_rows):
        yield read_run(folder, columns=[column], ticks=(first, first + part_rows),
                       ticks_only=True).rows[:, 0]
