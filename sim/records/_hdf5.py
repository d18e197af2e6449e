"""The run record as one self-describing HDF5 file, ``run.h5``.

Written once, at the end of a run or on recovery, never during it (docs/platform.md: an
HDF5 file being written when the process dies may be unreadable; the journal is what
survives a crash). The HDF5 1.10 file format (LIBVER below), readable by any HDF5 or
h5py from 2016 on.

Layout::

    /                    attrs: format, format_version, software_version, rig, started_utc,
                                ended, reason, tick_s, columns (JSON list, tick record
                                order), summary (JSON), model (JSON)
    /ticks/<group>/<name>  one float64 dataset per tick column, chunked (CHUNK_ROWS) and
                           compressed (shuffle + gzip, filters every HDF5 build has);
                           attrs column, index, unit, description, min, max (NaN where
                           the rig gives no bound)
    /events              compound (tick int64, time float64, kind str, detail str,
                         source str: "rehearsed" for a fault's doing, else ""; name str:
                         what the event is about; window str: "fault" or "disturbance"
                         on fault_injected; an empty string where a field is not set)
    /sources/<file>      text of the rig file, model module, scenario file

Groups by column prefix: see GROUPS. h5py is an optional dependency, imported here only.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.engine._contracts import OPTIONAL_EVENT_FIELDS

FORMAT = "plantrig run record"
FORMAT_VERSION = 1
CHUNK_ROWS = 16384               # 128 KiB of float64 per chunk
GZIP_LEVEL = 4                   # most of level 9's ratio at a fraction of its time
# CHUNK_CACHE: files are opened with HDF5's chunk cache off (rdcc_nbytes=0). Blocks are
# written and read a whole chunk at a time, so the cache saves nothing; with it on,
# HDF5 2.0 (h5py 3.16) kept every written chunk: resident memory grew by the data size
# (200 MB for 1M rows of 25 columns, measured), not bounded as its 1 MiB default says.
# LIBVER: the file format of HDF5 1.10 (2016) and later. Its chunk index for a growing
# dataset (an extensible array) keeps the writer's memory flat; with the 1.8 format's
# B-tree the writer grew by about 0.35 byte a tick and column (16 columns: +2.7 MB at
# 8M ticks, +0.4 MB with this format; measured). HDF5 1.8 cannot read such a file.
LIBVER = ("v110", "latest")
GROUPS = {
    "seq": "time", "t": "time",
    "lateness": "timing", "exec_time": "timing",
    "fresh": "link",
    "ref": "references", "u": "inputs", "y": "outputs", "x": "states",
    "cmd": "link/cmd", "sent": "link/sent",
    "fault": "faults", "limit": "limits", "trip": "interlocks",
}


def column_place(column: str) -> tuple[str, str]:
    """(group path, dataset name) of a tick column in /ticks."""
    prefix, sep, name = column.partition(":")
    if not sep:
        return GROUPS.get(column, "other"), column
    group = GROUPS.get(prefix, f"other/{prefix}")
    return group, name.replace("/", "|") or "_"


def write_run_h5(path: Path, blocks: Iterable[NDArray[np.float64]],
                 info: list[dict[str, Any]], events: list[dict[str, Any]],
                 sources: dict[str, str], attrs: dict[str, Any]) -> None:
    """Write ``run.h5`` atomically (a temporary file, then os.replace).

    ``blocks`` yields the tick records as (rows x columns) arrays, oldest first; they
    are appended block by block, so memory does not grow with the run. ``info`` has
    one dict per column (name, unit, description, min, max); ``attrs`` values that are
    not plain strings or numbers are stored as JSON text.
    """
    import h5py

    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    try:
        with h5py.File(tmp, "w", rdcc_nbytes=0, libver=LIBVER) as f:   # see CHUNK_CACHE
            f.attrs["format"] = FORMAT
            f.attrs["format_version"] = FORMAT_VERSION
            f.attrs["columns"] = json.dumps([c["name"] for c in info])
            for key, value in attrs.items():
                f.attrs[key] = value if isinstance(value, str | int | float) else json.dumps(
                    value)
            ticks = f.create_group("ticks")
            datasets = []
            for index, c in enumerate(info):
                group, name = column_place(c["name"])
                ds = ticks.require_group(group).create_dataset(
                    name, shape=(0,), maxshape=(None,), dtype=np.float64,
                    chunks=(CHUNK_ROWS,), shuffle=True, compression="gzip",
                    compression_opts=GZIP_LEVEL)
                datasets.append(ds)
                ds.attrs["column"] = c["name"]
                ds.attrs["index"] = index
                ds.attrs["unit"] = c.get("unit", "")
                ds.attrs["description"] = c.get("description", "")
                for bound in ("min", "max"):
                    value = c.get(bound)
                    ds.attrs[bound] = math.nan if value is None else float(value)
            done = 0
            for block in blocks:
                end = done + block.shape[0]
                for index, ds in enumerate(datasets):
                    ds.resize((end,))
                    ds[done:end] = block[:, index]
                done = end
            text = h5py.string_dtype()
            dtype = np.dtype([("tick", np.int64), ("time", np.float64), ("kind", text),
                              ("detail", text), *((key, text) for key in OPTIONAL_EVENT_FIELDS)])
            table = np.empty(len(events), dtype=dtype)
            for i, ev in enumerate(events):
                table[i] = (int(ev["tick"]), float(ev["time"]), str(ev["kind"]),
                            str(ev.get("detail", "")),
                            *(str(ev.get(key, "")) for key in OPTIONAL_EVENT_FIELDS))
            f.create_dataset("events", data=table)
            src = f.create_group("sources")
            for name, body in sources.items():
                src.create_dataset(name, data=body, dtype=text)
            f.flush()
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def read_run_h5(path: Path, columns: list[str] | None = None,
                ticks: tuple[int, int] | None = None, *,
                ticks_only: bool = False) -> dict[str, Any]:
    """``run.h5``: columns, units, info, rows (ticks x columns), events, sources and attrs
    (JSON attrs decoded).

    ``columns`` reads only those columns (in that order) and ``ticks`` = (first, stop)
    only those tick records, so a long run can be opened a part at a time: only what is
    asked for is read from disk.
    """
    import h5py

    with h5py.File(path, "r", rdcc_nbytes=0) as f:
        if f.attrs.get("format") != FORMAT:
            raise ValueError(f"{path}: not a plantrig run record")
        every: list[str] = json.loads(f.attrs["columns"])
        wanted = every if columns is None else list(columns)
        unknown = [c for c in wanted if c not in every]
        if unknown:
            raise KeyError(f"no column {unknown[0]!r} in {path}; columns: {', '.join(every)}")
        datasets: dict[str, Any] = {}

        def visit(_name: str, obj: Any) -> None:
            if isinstance(obj, h5py.Dataset) and "column" in obj.attrs:
                datasets[str(obj.attrs["column"])] = obj

        f["ticks"].visititems(visit)
        length = len(datasets[every[0]]) if every else 0
        first, stop = (0, length) if ticks is None else (max(0, ticks[0]),
                                                          min(length, ticks[1]))
        stop = max(first, stop)
        rows = np.empty((stop - first, len(wanted)))
        info: list[dict[str, Any]] = []
        for i, name in enumerate(wanted):
            ds = datasets[name]
            rows[:, i] = ds[first:stop]
            info.append({"name": name, "unit": str(ds.attrs["unit"]),
                         "description": str(ds.attrs["description"]),
                         "min": _bound(ds.attrs["min"]), "max": _bound(ds.attrs["max"])})
        if ticks_only:           # a part of a long run: no events, sources or attrs again
            return {"columns": wanted, "units": [c["unit"] for c in info], "info": info,
                    "rows": rows, "events": [], "sources": {}, "attrs": {},
                    "length": length}
        table = f["events"][()]
        events = [{"tick": int(e["tick"]), "time": float(e["time"]),
                   "kind": _text(e["kind"]), "detail": _text(e["detail"])} for e in table]
        # as events.jsonl holds them: each optional field only where set (older records
        # lack some of the fields altogether)
        for key in OPTIONAL_EVENT_FIELDS:
            if table.dtype.names and key in table.dtype.names:
                for event, row in zip(events, table, strict=True):
                    if _text(row[key]):
                        event[key] = _text(row[key])
        sources = {name: _text(ds[()]) for name, ds in f["sources"].items()}
        attrs: dict[str, Any] = {}
        for key, value in f.attrs.items():
            value = _text(value) if isinstance(value, bytes | str) else value
            if key in ("summary", "model", "columns", "recovery") and isinstance(value, str):
                value = json.loads(value)
            attrs[key] = value.item() if isinstance(value, np.generic) else value
    return {"columns": wanted, "units": [c["unit"] for c in info], "info": info,
            "rows": rows, "events": events, "sources": sources, "attrs": attrs,
            "length": length}


def _bound(value: Any) -> float | None:
    value = float(value)
    return None if math.isnan(value) else value


def _text(value: Any) -> str:
    return value.decode("utf-8") if isinstance(value, bytes) else str(value)
