"""Export a run record for other tools: CSV and MATLAB .mat.

CSV: one file of tick records (a row of column names, a row of units, then one row per
tick, every value written with 17 significant digits so it reads back bit for bit) and
one file of events. MATLAB (format 5): one column vector per tick
column under a valid MATLAB name, plus cell arrays ``columns`` (the original names),
``names`` (the MATLAB names, same order) and ``units``, a struct ``events`` and a string
``status`` (whether the record was verified). A draft (a folder not fit for sign-off)
carries the draft mark in its file names and in ``status``.

Both read the record a part at a time, so a weekend-long run exports in the memory of
a short one.
"""

from __future__ import annotations

import csv
import itertools
import keyword
import re
import struct
import zlib
from collections.abc import Iterable
from pathlib import Path
from typing import BinaryIO

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.engine._contracts import OPTIONAL_EVENT_FIELDS
from plantrig.sim.records._reader import column_parts, read_run
from plantrig.sim.records._signoff import DRAFT_PREFIX

MATLAB_NAME_MAX = 63   # namelengthmax in MATLAB (from memory of its documentation)
MATLAB_KEYWORDS = {
    "break", "case", "catch", "classdef", "continue", "else", "elseif", "end", "for",
    "function", "global", "if", "otherwise", "parfor", "persistent", "return", "spmd",
    "switch", "try", "while",
}
RESERVED = {"columns", "names", "units", "events", "status"}
PART_ROWS = 1 << 16    # tick records read and written at a time: memory bounded by this


def matlab_names(columns: list[str]) -> list[str]:
    """Valid, distinct MATLAB variable names: a letter first, then letters, digits and
    underscores, at most 63 characters, no keyword ("y:belt speed" -> "y_belt_speed")."""
    out: list[str] = []
    taken: set[str] = set(RESERVED)
    for column in columns:
        name = re.sub(r"[^A-Za-z0-9_]", "_", column)
        if not name or not name[0].isalpha():
            name = "v_" + name
        if name in MATLAB_KEYWORDS or keyword.iskeyword(name):
            name += "_"
        name = name[:MATLAB_NAME_MAX]
        base, n = name, 1
        while name in taken:
            n += 1
            suffix = f"_{n}"
            name = base[:MATLAB_NAME_MAX - len(suffix)] + suffix
        taken.add(name)
        out.append(name)
    return out


def export_csv(folder: Path, out_dir: Path, draft: bool = False,
               part_rows: int = PART_ROWS) -> list[Path]:
    """Write ``ticks.csv`` and ``events.csv`` (``DRAFT-...`` for a draft) of the run in
    ``folder`` into ``out_dir``, ``part_rows`` tick records at a time; return their paths."""
    head = read_run(folder, ticks=(0, 0))
    out_dir.mkdir(parents=True, exist_ok=True)
    prefix = DRAFT_PREFIX if draft else ""
    ticks, events = out_dir / f"{prefix}ticks.csv", out_dir / f"{prefix}events.csv"
    line = ",".join(["%.17g"] * len(head.columns)) + "\r\n"   # csv's own line end
    with open(ticks, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(head.columns)
        w.writerow(head.units)
        for first in range(0, head.ticks_total, part_rows):
            rows = read_run(folder, ticks=(first, first + part_rows), ticks_only=True).rows
            f.write("".join(line % tuple(row) for row in rows.tolist()))
    with open(events, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(["tick", "time", "kind", "detail", *OPTIONAL_EVENT_FIELDS])
        w.writerow(["", "s", "", ""] + [""] * len(OPTIONAL_EVENT_FIELDS))
        for ev in head.events:
            w.writerow([ev["tick"], f"{float(ev['time']):.17g}", ev["kind"],
                        ev.get("detail", ""), *(ev.get(k, "") for k in OPTIONAL_EVENT_FIELDS)])
    return [ticks, events]


def export_mat(folder: Path, out_dir: Path, status: str, draft: bool = False,
               part_rows: int = PART_ROWS) -> list[Path]:
    """Write ``run.mat`` (``DRAFT-run.mat`` for a draft) of the run in ``folder`` into
    ``out_dir``, with ``status`` saying what was checked; return its path in a list.

    scipy.io.savemat writes the small variables; each tick column is then appended as
    one compressed variable, streamed a part at a time (savemat needs whole arrays)."""
    import scipy.io

    head = read_run(folder, ticks=(0, 0))
    out_dir.mkdir(parents=True, exist_ok=True)
    path = out_dir / f"{DRAFT_PREFIX if draft else ''}run.mat"
    names = matlab_names(head.columns)
    events = head.events
    data: dict[str, object] = {
        "columns": np.array(head.columns, dtype=object),
        "names": np.array(names, dtype=object),
        "units": np.array(head.units, dtype=object),
        "status": status,
        "events": {
            "tick": np.array([ev["tick"] for ev in events], dtype=np.float64),
            "time": np.array([ev["time"] for ev in events], dtype=np.float64),
            "kind": np.array([ev["kind"] for ev in events], dtype=object),
            "detail": np.array([ev.get("detail", "") for ev in events], dtype=object),
            **{k: np.array([ev.get(k, "") for ev in events], dtype=object)
               for k in OPTIONAL_EVENT_FIELDS},
        },
    }
    scipy.io.savemat(path, data, oned_as="column", do_compression=True)
    with open(path, "r+b") as f:
        f.seek(0, 2)
        for column, name in zip(head.columns, names, strict=True):
            _append_column(f, name, head.ticks_total,
                           column_parts(folder, column, part_rows))
    return [path]


# MAT-file format level 5 (MathWorks, "MAT-File Format", data element types and array
# flags; values from memory of that document, checked by reading back with scipy.io)
MI_INT8, MI_INT32, MI_UINT32, MI_DOUBLE, MI_MATRIX, MI_COMPRESSED = 1, 5, 6, 9, 14, 15
MX_DOUBLE_CLASS = 6
MAT_ELEMENT_MAX = 2**32 - 1     # a data element's byte count is a uint32


def _append_column(f: BinaryIO, name: str, n: int, parts: Iterable[NDArray[np.float64]]
                   ) -> None:
    """Append one n x 1 double variable as a compressed data element; its compressed
    size is written into the element's tag once known. Byte order is the machine's, as
    savemat wrote the file header."""
    raw = name.encode("ascii")
    name_field = raw + b"\0" * (-len(raw) % 8)
    matrix_bytes = 16 + 16 + 8 + len(name_field) + 8 + 8 * n
    if matrix_bytes + 8 > MAT_ELEMENT_MAX:
        raise ValueError(f"column {name!r} of {n} ticks is larger than a MAT-file (format 5) "
                         "variable can hold (4 GiB); export --csv, or read run.h5 (HDF5)")
    matrix_head = struct.pack("=II" "IIII" "IIii" "II", MI_MATRIX, matrix_bytes,
                              MI_UINT32, 8, MX_DOUBLE_CLASS, 0,
                              MI_INT32, 8, n, 1,
                              MI_INT8, len(raw)) + name_field + struct.pack(
                                  "=II", MI_DOUBLE, 8 * n)
    tag_at = f.tell()
    f.write(struct.pack("=II", MI_COMPRESSED, 0))
    packer = zlib.compressobj()
    size = 0
    for chunk in itertools.chain([matrix_head],
                                 (np.ascontiguousarray(p, dtype="=f8").tobytes()
                                  for p in parts)):
        size += f.write(packer.compress(chunk))
    size += f.write(packer.flush())
    if size > MAT_ELEMENT_MAX:
        raise ValueError(f"column {name!r} compresses to more than a MAT-file (format 5) "
                         "variable can hold (4 GiB); export --csv, or read run.h5 (HDF5)")
    end = f.tell()
    f.seek(tag_at + 4)
    f.write(struct.pack("=I", size))
    f.seek(end)
