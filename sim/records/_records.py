"""The life of a run record: the start sidecar, the finish, and recovery after a crash.

During a run the folder holds ``run_start.json`` (written atomically before the first
tick: who, what, where the tapes are), ``ticks.journal`` (raw float64 rows appended by
the recorder) and ``events.jsonl``. At the end, or on ``plantrig recover`` after a crash,
the journal becomes ``ticks.npy`` and ``run.h5``, ``summary.json`` is written, and
``manifest.json`` is written last. A killed rig leaves its tapes in /dev/shm; recovery
takes from them the rows the journal lacks, measures what was lost, and removes them.
"""

from __future__ import annotations

import datetime as _dt
import errno
import hashlib
import json
import math
import os
import shutil
import time
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig import __version__
from plantrig.sim.config._rigfile import Rig
from plantrig.sim.engine._outcome import INTERRUPTED
from plantrig.sim.engine._timing import FINE_NS, DurationHistogram
from plantrig.sim.model._summary import summarize
from plantrig.sim.records._hdf5 import write_run_h5
from plantrig.sim.records._manifest import write_atomic, write_manifest
from plantrig.sim.records._preflight import RecordError
from plantrig.sim.records._recorder import RESERVE_NAME
from plantrig.sim.records._tape import EventTape, TapeReader

RUN_START = "run_start.json"
RESERVE_BYTES = 256 * 1024
RECORDER_EXIT_WAIT_S = 10.0
H5_SLACK = 1 << 20                 # HDF5 metadata and the event table, generously
BLOCK_ROWS = 32768                 # rows per block when streaming the ticks
META_DESCRIPTIONS = {
    "seq": "tick number",
    "t": "plant time at the start of the tick",
    "lateness": "how late the tick started against its deadline (real time only)",
    "exec_time": "work time of the tick (real time only)",
    "fresh": "1 when a fresh command arrived in this tick",
}
PREFIX_DESCRIPTIONS = {
    # the signal labels of plantrig.sim.SIGNAL_LABELS (tests/test_signal_labels.py)
    "ref": "reference", "cmd": "controller command", "u": "plant input (applied)",
    "y": "plant output (true)", "sent": "controller reads", "x": "plant state (true)",
    "d": "disturbance", "limit": "limit", "trip": "interlock trip",
    "fault": "injected fault",
}


def column_info(rig: Rig, columns: list[str], units: list[str]) -> list[dict[str, Any]]:
    """Name, unit, description and range of every tick column (None: no bound)."""
    signals: dict[str, Any] = {}
    for prefix, group in (("cmd", rig.inputs), ("u", rig.inputs), ("y", rig.outputs),
                          ("sent", rig.outputs), ("x", rig.states)):
        for signal in group:
            signals[f"{prefix}:{signal.name}"] = signal
    out = []
    for name, unit in zip(columns, units, strict=True):
        prefix, _, short = name.partition(":")
        s = signals.get(name)
        described = META_DESCRIPTIONS.get(name) or f"{PREFIX_DESCRIPTIONS.get(prefix, prefix)} " \
                                                    f"{short}".strip()
        if s is not None and s.description:
            described += f": {s.description}"
        out.append({"name": name, "unit": unit, "description": described,
                    "min": _finite(s.min) if s else None, "max": _finite(s.max) if s else None})
    return out


def start_record(folder: Path, rig: Rig, columns: list[str], units: list[str],
                 tape_path: Path, event_tape_path: Path, recorder_pid: int | None,
                 realtime: bool) -> None:
    """Write ``run_start.json`` (atomically) and the disk reserve before the first tick.

    The reserve is a small preallocated file the recorder deletes when the disk fills,
    so the last events, the summary and the manifest still fit.
    """
    model = summarize(rig.plant, rig.tick, rig.x0, rig.method, rig.substeps)
    start = {
        "software": {"name": "plantrig", "version": __version__},
        "rig": {"name": rig.name, "file": str(rig.path), "tick_s": rig.tick,
                "duration_s": rig.duration},
        "started_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="milliseconds"),
        "started_unix_s": time.time(),
        "mode": "realtime" if realtime else "fast",
        "ticks_planned": rig.n_ticks,
        "columns": column_info(rig, columns, units),
        "model": model.as_dict(),
        "rig_process": _identity(os.getpid()),
        "recorder_process": _identity(recorder_pid) if recorder_pid else None,
        "tape": str(tape_path), "event_tape": str(event_tape_path),
    }
    write_atomic(folder / RUN_START, (json.dumps(start, indent=2) + "\n").encode())
    try:
        fd = os.open(folder / RESERVE_NAME, os.O_WRONLY | os.O_CREAT, 0o600)
        try:
            os.posix_fallocate(fd, 0, RESERVE_BYTES)
        finally:
            os.close(fd)
    except OSError:
        (folder / RESERVE_NAME).unlink(missing_ok=True)


def finish_record(folder: Path, summary: dict[str, Any], *, npy: bool = False) -> None:
    """Turn the journal into ``run.h5`` (``ticks.npy`` instead where h5py is missing, or
    as well with ``npy``); write the summary and the manifest.

    The ticks are streamed from the journal (or from the ``ticks.npy`` of an earlier
    finish) block by block, so memory does not grow with the run. The journal is removed
    only once the tick file is safely on disk; when the disk is full it stays
    (``plantrig recover`` finishes later) and the summary says so. ``summary`` gets a
    "record" entry naming what was written, what is still missing and what was lost.
    """
    folder = Path(folder)
    start = json.loads((folder / RUN_START).read_text()) if (folder / RUN_START).exists() else {}
    columns: list[str] = summary["columns"]
    info = start.get("columns") or [{"name": c, "unit": u} for c, u in
                                    zip(columns, summary["units"], strict=True)]
    (folder / RESERVE_NAME).unlink(missing_ok=True)
    # "problems": what is still missing (recover finishes it once there is room);
    # "lost": what can never be recovered, kept in every later finish
    record: dict[str, Any] = {"files": [], "problems": [], "lost": []}
    summary["record"] = record
    recorder = summary.get("recorder") or {}
    if recorder.get("disk_error"):   # a fast run can end before the loop hears of it
        not_written = recorder.get("rows_not_written") or 0
        record["lost"].append(f"the recorder stopped writing ({recorder['disk_error']}): "
                              + (f"{not_written} ticks ran but are not in the record"
                                 if not_written else "every tick that ran is in the record"))
    journal = folder / "ticks.journal"
    # the summary first: it is small (the freed reserve holds it) and keeps the outcome
    # for `plantrig recover` if anything after it fails
    try:
        write_atomic(folder / "summary.json", (json.dumps(summary, indent=2) + "\n").encode())
    except OSError as exc:
        raise RecordError(folder, f"summary not written ({exc.strerror}); ticks.journal kept: "
                                  "free space, then run plantrig recover") from None
    n = len(columns)
    count = count_ticks(folder, n)
    kept = False
    if _have_h5py():
        try:
            events = read_events(folder / "events.jsonl")
            sources = {p.name: p.read_text(encoding="utf-8", errors="replace")
                       for p in sorted(folder.iterdir())
                       if p.suffix in (".toml", ".py") and p.is_file()}
            _check_room(folder, count * n * 8 + sum(len(v) for v in sources.values())
                        + H5_SLACK)
            write_run_h5(folder / "run.h5", tick_blocks(folder, n), info, events, sources, {
                "software_version": __version__, "rig": summary["rig"]["name"],
                "started_utc": summary["started_utc"], "ended": summary["ended"],
                "reason": summary["reason"], "tick_s": summary["rig"]["tick_s"],
                "summary": summary, "model": summary["model"]})
            record["files"].append("run.h5")
            kept = True
        except Exception as exc:  # h5py raises several kinds on a failing disk; none escapes
            text = getattr(exc, "strerror", None) or str(exc)
            record["problems"].append(f"run.h5 not written ({text}); free space, then run "
                                      "plantrig recover")
    if (npy or not _have_h5py()) and not (folder / "ticks.npy").exists():
        try:
            _check_room(folder, count * n * 8 + H5_SLACK)
            _save_npy(folder / "ticks.npy", tick_blocks(folder, n), columns, count)
            record["files"].append("ticks.npy")
            kept = kept or not _have_h5py()
        except OSError as exc:
            (folder / ".ticks.npy.tmp").unlink(missing_ok=True)
            record["problems"].append(f"ticks.npy not written ({exc.strerror or exc}); "
                                      "free space, then run plantrig recover")
    elif (folder / "ticks.npy").exists():
        record["files"].append("ticks.npy")
    if kept:
        journal.unlink(missing_ok=True)
    try:
        write_atomic(folder / "summary.json", (json.dumps(summary, indent=2) + "\n").encode())
        write_manifest(folder)
    except OSError as exc:
        raise RecordError(folder, f"summary or manifest not written ({exc.strerror}); "
                                  "free space, then run plantrig recover") from None


def count_ticks(folder: Path, n_columns: int) -> int:
    """Whole tick records in the folder's journal (or its ticks.npy when the journal is
    gone)."""
    journal = Path(folder) / "ticks.journal"
    if journal.exists():
        return journal.stat().st_size // (n_columns * 8)
    npy = Path(folder) / "ticks.npy"
    if npy.exists():
        return int(np.load(npy, mmap_mode="r").shape[0])
    return 0


def tick_blocks(folder: Path, n_columns: int,
                block_rows: int = BLOCK_ROWS) -> Iterator[NDArray[np.float64]]:
    """The folder's tick records, oldest first, ``block_rows`` at a time (a torn last
    journal row is left out)."""
    count = count_ticks(folder, n_columns)
    journal = Path(folder) / "ticks.journal"
    if journal.exists():
        with open(journal, "rb") as f:
            done = 0
            while done < count:
                take = min(block_rows, count - done)
                yield np.fromfile(f, dtype=np.float64, count=take * n_columns).reshape(
                    take, n_columns)
                done += take
        return
    if count:
        table = np.load(Path(folder) / "ticks.npy", mmap_mode="r")
        for first in range(0, count, block_rows):
            part = np.asarray(table[first:first + block_rows])
            yield part.view(np.float64).reshape(-1, n_columns)


def _have_h5py() -> bool:
    try:
        import h5py  # noqa: F401
    except ImportError:
        return False
    return True


def _check_room(folder: Path, needed: int) -> None:
    """Refuse to start a large write the disk cannot hold (HDF5 fails badly when the
    disk fills under it)."""
    free = shutil.disk_usage(folder).free
    if free < needed:
        raise OSError(errno.ENOSPC, f"disk full: {needed / 1e6:.1f} MB needed, "
                                    f"{free / 1e6:.1f} MB free")


def salvage_rows(journal: Path, tape_path: Path, n_columns: int) -> dict[str, Any]:
    """Append to ``journal`` the rows the tape still holds beyond it.

    A torn last journal row is cut first. Nothing is taken when the ring has lapped the
    journal (that would leave a gap). Returns what the tape said: rows produced by the
    rig, rows taken, and whether the tape was there at all.
    """
    row_bytes = n_columns * 8
    size = journal.stat().st_size if journal.exists() else 0
    whole = size - size % row_bytes
    if whole != size:
        os.truncate(journal, whole)
    have = whole // row_bytes
    if not tape_path.exists():
        return {"tape_found": False, "produced_rows": None, "tape_rows": 0,
                "torn_bytes_dropped": size - whole}
    reader = TapeReader(tape_path)
    taken = 0
    try:
        if reader.n_columns != n_columns:
            return {"tape_found": False, "produced_rows": None, "tape_rows": 0,
                    "torn_bytes_dropped": size - whole}
        produced = reader.written
        reader.next_seq = have
        blocks = []
        while reader.next_seq < produced:
            block = reader.read_new()
            if not block.size:
                break
            blocks.append(block)
        if blocks and not reader.lost:
            with open(journal, "ab") as f:
                for block in blocks:
                    f.write(block.tobytes())
                    taken += block.shape[0]
                f.flush()
                os.fsync(f.fileno())
    finally:
        reader.close()
    return {"tape_found": True, "produced_rows": produced, "tape_rows": taken,
            "torn_bytes_dropped": size - whole}


def read_events(path: Path) -> list[dict[str, Any]]:
    """Events of events.jsonl; a torn last line (the writer died mid-line) is dropped."""
    if not Path(path).exists():
        return []
    out = []
    for line in Path(path).read_text(encoding="utf-8", errors="replace").splitlines():
        try:
            ev = json.loads(line)
        except ValueError:
            continue
        if isinstance(ev, dict) and {"tick", "time", "kind"} <= ev.keys():
            out.append(ev)
    return out


def timing_from_blocks(blocks: Iterable[NDArray[np.float64]],
                       columns: list[str]) -> dict[str, Any]:
    """Lateness and work-time statistics read back from the tick records, streamed into
    the loop's own fixed-bin histograms (sim/engine/_timing.py); also the last tick number."""
    late, work = DurationHistogram(), DurationHistogram()
    i_late, i_work = columns.index("lateness"), columns.index("exec_time")
    ticks, last = 0, 0
    for block in blocks:
        late.add_many(np.round(block[:, i_late] * 1e9).astype(np.int64))
        work.add_many(np.round(block[:, i_work] * 1e9).astype(np.int64))
        ticks += block.shape[0]
        last = int(block[-1, 0]) if block.shape[0] else last
    return {"ticks": ticks, "last_seq": last,
            "lateness_p50_s": late.quantile_s(50), "lateness_p99_s": late.quantile_s(99),
            "lateness_max_s": late.max_s,
            "exec_p50_s": work.quantile_s(50), "exec_p99_s": work.quantile_s(99),
            "exec_max_s": work.max_s, "timing_resolution_s": FINE_NS / 1e9}


def recover_run(folder: Path) -> dict[str, Any]:
    """Rebuild run.h5, ticks.npy, summary.json and the manifest of a run that died.

    Rows come from the journal (a torn last row dropped), then from the tape if it is
    still in /dev/shm; the tape's written counter says how many rows the rig produced,
    so the loss is measured, not guessed. Returns the recovery report (also in the
    summary under "recovery").
    """
    folder = Path(folder)
    start_path = folder / RUN_START
    if not start_path.exists():
        raise RecordError(folder, f"no {RUN_START}: not a plantrig run folder")
    journal = folder / "ticks.journal"
    summary_path = folder / "summary.json"
    if summary_path.exists() and not journal.exists() and _finished(folder):
        raise RecordError(folder, "the run ended cleanly; nothing to recover")
    start = json.loads(start_path.read_text())
    _wait_for_exit(folder, start)
    info = start["columns"]
    columns = [c["name"] for c in info]
    n = len(columns)
    tick = float(start["rig"]["tick_s"])
    if summary_path.exists():
        # the run ended but its finish did not (disk full): finish it now, as it ended,
        # keeping its outcome and what went wrong the first time
        summary: dict[str, Any] = json.loads(summary_path.read_text())
        count = count_ticks(folder, n)
        earlier = (summary.get("record") or {}).get("problems") or []
        summary["finished_again_by"] = {
            "name": "plantrig", "version": __version__,
            "utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
            "earlier_problems": earlier}
        finish_record(folder, summary)
        return {"finished_again": True, "recovered_rows": count,
                "lost_rows": summary["ticks_recorded"] - count,
                "ended": summary["ended"], "reason": summary["reason"],
                "problems": summary["record"]["problems"]}
    tape_path, event_path = Path(start["tape"]), Path(start["event_tape"])
    if journal.exists() or not (folder / "ticks.npy").exists():
        from_journal = journal.stat().st_size // (n * 8) if journal.exists() else 0
        taken = salvage_rows(journal, tape_path, n)
        produced, torn_bytes = taken["produced_rows"], taken["torn_bytes_dropped"]
        from_tape = taken["tape_rows"]
    else:  # an older finish removed the journal after ticks.npy: start from that
        from_journal, produced, torn_bytes, from_tape = count_ticks(folder, n), None, 0, 0
    events = read_events(folder / "events.jsonl")
    events_salvaged: list[dict[str, Any]] = []
    try:
        etape = EventTape(event_path, create=False) if event_path.exists() else None
    except ValueError:   # an event tape of another plantrig version: leave its events
        etape = None
    if etape is not None:
        etape.next_seq = len(events)
        events_salvaged = etape.read_new()
        etape.close()
    recovered = count_ticks(folder, n)
    timing = timing_from_blocks(tick_blocks(folder, n), columns)
    lost = None if produced is None else produced - recovered
    report = {
        "produced_rows": produced, "journal_rows": from_journal,
        "tape_rows": from_tape, "recovered_rows": recovered,
        "lost_rows": lost, "lost_ms": None if lost is None else lost * tick * 1e3,
        "journal_only_lost_rows": None if produced is None else produced - from_journal,
        "journal_only_lost_ms": None if produced is None else (produced - from_journal)
        * tick * 1e3,
        "torn_bytes_dropped": int(torn_bytes), "tape_found": produced is not None,
        "events_from_tape": len(events_salvaged),
    }
    last_tick = int(timing.pop("last_seq"))
    note = {"tick": last_tick, "time": last_tick * tick, "kind": "recovered",
            "detail": "run did not end cleanly; rebuilt by plantrig recover; "
                      + (f"{lost} ticks lost" if lost is not None else
                         "tape gone, loss unknown")}
    with open(folder / "events.jsonl", "a+", encoding="utf-8") as f:
        f.seek(0, os.SEEK_END)
        if f.tell() and not _ends_with_newline(folder / "events.jsonl"):
            f.write("\n")
        for ev in [*events_salvaged, note]:
            f.write(json.dumps(ev) + "\n")
    all_events = read_events(folder / "events.jsonl")
    recorder_status = folder / "recorder.json"
    counts: dict[str, int] = {}
    for ev in all_events:
        kind = str(ev["kind"])
        counts[kind] = counts.get(kind, 0) + 1
    rig_file = folder / "rig.toml"
    summary = {
        "software": start["software"],
        "recovered_by": {"name": "plantrig", "version": __version__},
        "rig": {**start["rig"], "sha256": hashlib.sha256(rig_file.read_bytes()).hexdigest()
                if rig_file.exists() else None},
        "started_utc": start["started_utc"], "tick0_utc": start.get("tick0_utc"),
        "mode": start["mode"], "ended": INTERRUPTED,
        "reason": "the rig process died before the run ended (rebuilt by plantrig recover)",
        "ticks_planned": start["ticks_planned"], "ticks_recorded": recovered,
        "timing": timing,
        "recorder": json.loads(recorder_status.read_text()) if recorder_status.exists() else {},
        "link": {}, "events": counts, "model": start["model"],
        "columns": columns, "units": [c["unit"] for c in info],
        "recovery": report,
    }
    recorder_status.unlink(missing_ok=True)
    finish_record(folder, summary)
    report.update(ended=summary["ended"], reason=summary["reason"],
                  problems=summary["record"]["problems"])
    for path in (tape_path, tape_path.with_suffix(".json"), event_path):
        path.unlink(missing_ok=True)
    return report


def _finished(folder: Path) -> bool:
    """True when the finish wrote everything it meant to (the manifest is last)."""
    if not (folder / "manifest.json").exists():
        return False
    try:
        summary = json.loads((folder / "summary.json").read_text())
    except (OSError, ValueError):
        return False
    return not (summary.get("record") or {}).get("problems")


def _save_npy(path: Path, blocks: Iterable[NDArray[np.float64]], columns: list[str],
              count: int) -> None:
    """Write ``ticks.npy`` (one named float64 field per column) by streaming: a tick
    record's bytes are exactly one element of that structured array."""
    dtype = np.dtype([(name, np.float64) for name in columns])
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "wb") as f:
        np.lib.format.write_array_header_2_0(f, {
            "descr": np.lib.format.dtype_to_descr(dtype), "fortran_order": False,
            "shape": (count,)})
        for block in blocks:
            f.write(np.ascontiguousarray(block).tobytes())
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def _ends_with_newline(path: Path) -> bool:
    with open(path, "rb") as f:
        f.seek(-1, os.SEEK_END)
        return f.read(1) == b"\n"


def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def _identity(pid: int) -> dict[str, Any]:
    """A pid with its start time since boot, so a reused pid is not mistaken for ours."""
    return {"pid": pid, "start_ticks": _start_ticks(pid)}


def _proc_stat(pid: int) -> list[str] | None:
    """Fields of /proc/<pid>/stat after the command name (state first), or None."""
    try:
        return Path(f"/proc/{pid}/stat").read_text().rpartition(")")[2].split()
    except OSError:
        return None


def _start_ticks(pid: int) -> int | None:
    fields = _proc_stat(pid)
    return int(fields[19]) if fields else None


def _alive(identity: dict[str, Any] | None) -> bool:
    """True while that very process runs (not a zombie, not a reused pid)."""
    if not identity:
        return False
    try:
        os.kill(identity["pid"], 0)
    except OSError as exc:
        return exc.errno == errno.EPERM
    fields = _proc_stat(identity["pid"])
    if fields is None:
        return True
    known = identity.get("start_ticks")
    return fields[0] not in ("Z", "X") and (known is None or int(fields[19]) == known)


def _wait_for_exit(folder: Path, start: dict[str, Any]) -> None:
    """Refuse while the rig runs; give an orphaned recorder time to drain the tape."""
    if _alive(start.get("rig_process")):
        raise RecordError(folder, f"the run is still going (pid "
                                  f"{start['rig_process']['pid']}); nothing to recover")
    deadline = time.monotonic() + RECORDER_EXIT_WAIT_S
    while _alive(start.get("recorder_process")):
        if time.monotonic() > deadline:
            raise RecordError(folder, f"the recorder (pid {start['recorder_process']['pid']}) "
                                      "is still writing; try again")
        time.sleep(0.05)
