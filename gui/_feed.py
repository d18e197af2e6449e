"""Reading a running tape for display: read-only, never behind by more than it shows.

The dashboard does not acknowledge rows (only the recorder does), so the loop never
waits for it. In fast mode the tape moves faster than anyone can watch: when the
dashboard is behind by more than its window holds, it skips ahead to the newest rows
and counts the rows it did not display (they are still recorded).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from plantrig.gui._eventlog import EventRow
from plantrig.sim import EventTape, TapeReader

Rows = NDArray[np.float64]


class LiveFeed:
    """New tick rows and events since the last poll."""

    def __init__(self, tape_path: str | Path, event_tape_path: str | Path | None,
                 keep_rows: int) -> None:
        self.reader = TapeReader(Path(tape_path), acknowledge=False)
        self.events = EventTape(Path(event_tape_path), create=False) \
            if event_tape_path is not None else None
        self.keep_rows = int(keep_rows)
        self.skipped = 0

    @property
    def columns(self) -> list[str]:
        return self.reader.columns

    @property
    def units(self) -> list[str]:
        return self.reader.units

    @property
    def ended(self) -> bool:
        return self.reader.ended and self.reader.next_seq >= self.reader.written

    def poll(self) -> tuple[Rows, list[EventRow]]:
        reader = self.reader
        behind = reader.written - reader.next_seq
        if behind > self.keep_rows:
            jump = behind - self.keep_rows
            reader.next_seq += jump
            self.skipped += jump
        rows = reader.read_new(max_rows=self.keep_rows)
        events = [EventRow.of(e)
                  for e in (self.events.read_new() if self.events is not None else [])]
        return rows, events

    @property
    def lost(self) -> int:
        """Rows the display never saw: skipped to keep up, or overwritten in the ring."""
        return self.skipped + self.reader.lost

    def close(self) -> None:
        self.reader.close()
        if self.events is not None:
            self.events.close()
