"""The rows the dashboard can show: a sliding window of a live run, or a whole record.

Both stores answer the same two questions, by plant time (column "t"): the rows of a
time window, and the row at an instant. The live store keeps its rows contiguous
(a buffer twice the capacity, shifted down when full) so a window is a view, not a copy.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

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
