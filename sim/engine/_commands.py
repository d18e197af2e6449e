"""Operator commands sent to a running loop (from the dashboard or a script).

Commands arrive on a multiprocessing queue; the loop polls it every COMMAND_POLL_S of
plant time (an empty poll costs ~10-20 us on the reference VM, too much for every
tick at 1 kHz; a run with no inbox and no recorder process has nothing to poll).
Each command the loop acts on becomes an event in the run record.
"""

from __future__ import annotations

import queue
from dataclasses import dataclass, field
from typing import Any

COMMAND_POLL_S = 0.005
KINDS = ("stop", "estop", "reset", "set_reference", "mark_phase", "inject_fault",
         "clear_fault")


@dataclass(frozen=True)
class Command:
    """One operator command: ``kind`` from KINDS and its arguments."""

    kind: str
    args: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"unknown command {self.kind!r}; expected one of {', '.join(KINDS)}")


class CommandInbox:
    """Non-blocking reader of a queue of Commands (anything with get_nowait())."""

    def __init__(self, source: Any) -> None:
        self.source = source
        self.rejected = 0

    def take(self, limit: int = 16) -> list[Command]:
        """Up to ``limit`` waiting commands; never blocks; drops anything malformed."""
        out: list[Command] = []
        for _ in range(limit):
            try:
                item = self.source.get_nowait()
            except queue.Empty:
                break
            except (EOFError, OSError):
                break
            if isinstance(item, Command):
                out.append(item)
            else:
                self.rejected += 1
        return out
