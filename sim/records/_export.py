"""Export a run record for other tools: CSV and MATLAB .mat.

CSV: one file of tick records (a row of column names, a row of units, then one row per
tick, every value written with 17 significant digits so it reads back bit for bit) and
one file of events. MATLAB: scipy.io.savemat (format 5), one column vector per tick
column under a valid MATLAB name, plus cell arrays ``columns`` (the original names),
``names`` (the MATLAB names, same order) and ``units``, a struct ``events`` and a string
``status`` (whether the record was verified). A draft (a folder not fit for sign-off)
carries the draft mark in its file names and in ``status``.
"""

from __future__ import annotations

import csv
import keyword
import re
from pathlib import Path

import numpy as np

from plantrig.sim.records._reader import RunRecord
from plantrig.sim.records._signoff import DRAFT_PREFIX

MATLAB_NAME_MAX = 63   # namelengthmax in MATLAB (from memory of its documentation)
MATLAB_KEYWORDS = {
    "break", "case", "catch", "classdef", "continue", "else", "elseif", "end", "for",
    "function", "global", "if", "otherwise", "parfor", "persistent", "return", "spmd",
    "switch", "try", "while",
}
RESERVED = {"columns", "names", "units", "events", "status"}


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


def export_csv(record: RunRecord, out_dir: Path, draft: bool = False) -> list[Path]:
    """Write ``ticks.csv`` and ``events.csv`` (``DRAFT-...`` for a draft) into ``out_dir``;
    return their paths."""
    out_dir.mkdir(parents=True, exist_ok=True)
    prefix = DRAFT_PREFIX if draft else ""
    ticks, events = out_dir / f"{prefix}ticks.csv", out_dir / f"{prefix}events.csv"
    with open(ticks, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(record.columns)
        w.writerow(record.units)
        for row in record.rows:
            w.writerow([f"{v:.17g}" for v in row])
    with open(events, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(["tick", "time", "kind", "detail"])
        w.writerow(["", "s", "", ""])
        for ev in record.events:
            w.writerow([ev["tick"], f"{float(ev['time']):.17g}", ev["kind"],
                        ev.get("detail", "")])
    return [ticks, events]


def export_mat(record: RunRecord, out_dir: Path, status: str, draft: bool = False
               ) -> list[Path]:
    """Write ``run.mat`` (``DRAFT-run.mat`` for a draft) into ``out_dir``, with ``status``
    saying what was checked; return its path in a list."""
    import scipy.io

    out_dir.mkdir(parents=True, exist_ok=True)
    path = out_dir / f"{DRAFT_PREFIX if draft else ''}run.mat"
    names = matlab_names(record.columns)
    data: dict[str, object] = {n: np.ascontiguousarray(record.rows[:, i])
                               for i, n in enumerate(names)}
    data["columns"] = np.array(record.columns, dtype=object)
    data["names"] = np.array(names, dtype=object)
    data["units"] = np.array(record.units, dtype=object)
    data["status"] = status
    data["events"] = {
        "tick": np.array([ev["tick"] for ev in record.events], dtype=np.float64),
        "time": np.array([ev["time"] for ev in record.events], dtype=np.float64),
        "kind": np.array([ev["kind"] for ev in record.events], dtype=object),
        "detail": np.array([ev.get("detail", "") for ev in record.events], dtype=object),
    }
    scipy.io.savemat(path, data, oned_as="column", do_compression=True)
    return [path]
