"""Preflight: refuse a run whose record cannot be written, before the first tick.

The disk holds, at the worst moment of a run's life, two copies of its tick data: the
journal and ``run.h5`` while the journal is converted (``run.h5`` is compressed, but
data that looks random does not shrink), then only ``run.h5`` (see docs/records.md).
So a run needs about ``ticks x columns x 8 x 2.2`` bytes (two copies plus 10 % for HDF5
overhead and the events), and a fixed margin for the rig copy, summary, manifest and
report. The tape
needs its ring in /dev/shm.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

COPIES = 2.2
MARGIN_BYTES = 4 * 1024 * 1024


class RecordError(OSError):
    """The run record cannot be written (folder unwritable, disk too small or full)."""

    def __init__(self, path: Path, message: str) -> None:
        self.path = Path(path)
        super().__init__(f"{self.path}: {message}")


def planned_bytes(n_ticks: int, n_columns: int) -> int:
    """Disk space a run of ``n_ticks`` records of ``n_columns`` float64 needs."""
    return int(n_ticks * n_columns * 8 * COPIES) + MARGIN_BYTES


def free_bytes(path: Path) -> int:
    st = os.statvfs(path)
    return st.f_bavail * st.f_frsize


def check_writable(folder: Path) -> None:
    """Create and remove a file in ``folder`` (os.access says yes to root on a read-only
    file system, so only a real write tells)."""
    try:
        with tempfile.NamedTemporaryFile(dir=folder, prefix=".plantrig-preflight-"):
            pass
    except OSError as exc:
        raise RecordError(folder, f"cannot write run records here ({exc.strerror})") from None


def preflight(out_dir: Path, n_ticks: int, n_columns: int, ring_bytes: int,
              ring_dir: Path) -> None:
    """Raise RecordError when ``out_dir`` is unwritable or too small for the planned run."""
    out_dir = Path(out_dir)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise RecordError(out_dir, f"cannot create the run folder's parent "
                                   f"({exc.strerror})") from None
    check_writable(out_dir)
    need, have = planned_bytes(n_ticks, n_columns), free_bytes(out_dir)
    if need > have:
        raise RecordError(out_dir, f"not enough free space for this run's record: needs about "
                                   f"{_mib(need)} ({n_ticks} ticks x {n_columns} columns), "
                                   f"{_mib(have)} free")
    if ring_bytes > free_bytes(ring_dir):
        raise RecordError(ring_dir, f"not enough shared memory for the tape: needs "
                                    f"{_mib(ring_bytes)}, {_mib(free_bytes(ring_dir))} free")


def _mib(n: int) -> str:
    return f"{n / 2**20:.1f} MiB"
