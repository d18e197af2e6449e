"""Progress of a fast run on stderr, for runs that last more than a moment.

A thread beside the loop reads the tape's row counter twice a second; it never touches
the loop's objects, and only a fast run gets one (in real time the loop must be the
only busy thread of its process, and the wall clock already says how far it is).
"""

from __future__ import annotations

import sys
import threading
from pathlib import Path
from typing import Any

from plantrig.sim import TapeReader

DELAY_S = 2.0          # a run shorter than this prints no progress at all
EVERY_S = 0.5


class RunProgress:
    """``on_tapes_ready`` starts it; ``close`` ends it (idempotent)."""

    def __init__(self, total_ticks: int) -> None:
        self.total = total_ticks
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def on_tapes_ready(self, tape_path: Path, _event_tape_path: Path) -> None:
        self._thread = threading.Thread(target=self._show, args=(Path(tape_path),),
                                        name="plantrig-progress", daemon=True)
        self._thread.start()

    def close(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()

    def _show(self, tape_path: Path) -> None:
        if self._stop.wait(DELAY_S):
            return
        from tqdm import tqdm
        try:
            reader = TapeReader(tape_path)
        except (OSError, ValueError):
            return
        bar: Any = tqdm(total=self.total, unit="tick", unit_scale=True, file=sys.stderr,
                        desc="fast run", leave=False)
        try:
            while not self._stop.wait(EVERY_S):
                bar.update(reader.written - bar.n)
        finally:
            bar.close()
            reader.close()


def both(*callbacks: Any) -> Any:
    """One on_tapes_ready that calls every given one (None entries skipped)."""
    chosen = [c for c in callbacks if c is not None]

    def call(tape_path: Path, event_tape_path: Path) -> None:
        for c in chosen:
            c(tape_path, event_tape_path)
    return call
