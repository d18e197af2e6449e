"""The rows the dashboard can show: a sliding window of a live run, or a recorded run.

Every store answers the same two questions, by plant time (column "t"): the rows of a
time window, and the row at an instant. The live store keeps its rows contiguous
(a buffer twice the capacity, shifted down when full) so a window is a view, not a copy.
The record store reads a recorded run a window at a time from its folder, so replaying
a weekend-long run holds one window in memory, never the run.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from plantrig.sim import read_run, thin_rows

Rows = NDArray[np.float64]


class RowStore:
    """A time-ordered block of tick rows; ``t_index`` is the column of plant time."""

    def __init__(self, rows: Rows, t_index: int) -> None:
        self._rows = rows
        self.t_index = t_index

    @property
    def rows(self) -> Rows:
        return self._rows

    def __len__(self) -> int:
        return len(self.rows)

    @property
    def t_first(self) -> float:
        return float(self.rows[0, self.t_index]) if len(self) else 0.0

    @property
    def t_last(self) -> float:
        return float(self.rows[-1, self.t_index]) if len(self) else 0.0

    def position(self, t: float) -> int:
        """Number of rows with plant time <= t."""
        return int(np.searchsorted(self.rows[:, self.t_index], t, side="right"))

    def window(self, t_end: float, span: float) -> Rows:
        """Rows with t_end - span < t <= t_end."""
        times = self.rows[:, self.t_index]
        lo = int(np.searchsorted(times, t_end - span, side="right"))
        return self.rows[lo:self.position(t_end)]

    def at(self, t: float) -> Rows | None:
        """The last row at or before ``t`` (None before the first row)."""
        i = self.position(t)
        return self.rows[i - 1] if i > 0 else None


class LiveStore(RowStore):
    """The newest ``capacity`` rows of a running tape."""

    def __init__(self, n_columns: int, capacity: int, t_index: int) -> None:
        self.capacity = int(capacity)
        self._buffer = np.zeros((2 * self.capacity, n_columns))
        self._count = 0
        self.appended = 0
        super().__init__(self._buffer[:0], t_index)

    @property
    def rows(self) -> Rows:
        return self._buffer[self._count - min(self._count, self.capacity):self._count]

    def append(self, block: Rows) -> None:
        """Add rows (oldest first); older rows beyond the capacity fall out."""
        n = len(block)
        if n == 0:
            return
        self.appended += n
        if n >= self.capacity:
            self._buffer[:self.capacity] = block[-self.capacity:]
            self._count = self.capacity
            return
        if self._count + n > len(self._buffer):
            keep = self.capacity - n
            self._buffer[:keep] = self._buffer[self._count - keep:self._count]
            self._count = keep
        self._buffer[self._count:self._count + n] = block
        self._count += n


class RecordStore(RowStore):
    """A recorded run of ``n_ticks`` rows at ``tick`` s, read from ``folder`` a window at
    a time (row k is tick k, t = k * tick). A window longer than ``max_rows`` is read in
    parts and thinned to each bucket's per-column minimum and maximum (two rows a
    bucket), so a spike or a trip code still shows in a zoomed-out view."""

    PART_ROWS = 1 << 17

    def __init__(self, folder: Path, n_ticks: int, tick: float, t_index: int,
                 max_rows: int = 20_000) -> None:
        super().__init__(np.empty((0, 0)), t_index)
        self.folder, self.n, self.tick, self.max_rows = folder, n_ticks, tick, max_rows
        self._cached: tuple[tuple[int, int], Rows] | None = None
        self._row: tuple[int, Rows] | None = None

    def __len__(self) -> int:
        return self.n

    @property
    def t_first(self) -> float:
        return 0.0

    @property
    def t_last(self) -> float:
        return (self.n - 1) * self.tick if self.n else 0.0

    def position(self, t: float) -> int:
        return min(self.n, max(0, math.floor(t / self.tick + 1e-9) + 1))

    def read(self, first: int, stop: int) -> Rows:
        """Rows ``first`` to ``stop`` as recorded."""
        return read_run(self.folder, ticks=(first, stop), ticks_only=True).rows

    def window(self, t_end: float, span: float) -> Rows:
        lo, hi = self.position(t_end - span), self.position(t_end)
        if self._cached is None or self._cached[0] != (lo, hi):
            rows = thin_rows(self.read, lo, hi, self.max_rows, self.t_index, self.PART_ROWS)
            self._cached = ((lo, hi), rows)
        return self._cached[1]

    def at(self, t: float) -> Rows | None:
        i = self.position(t)
        if i == 0:
            return None
        if self._row is None or self._row[0] != i:
            self._row = (i, self.read(i - 1, i)[0])
        return self._row[1]
