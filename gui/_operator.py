"""Operator actions as plain functions: each puts one Command on the run's queue.

The buttons of the dashboard call these and nothing else, so tests press a button by
calling its function. Nothing here blocks: the queue is written with put_nowait, and a
queue that is gone or full gives a message, never an exception in the GUI loop.
Commands stay small (texts are cut to MAX_TEXT), so each is one pipe write below
PIPE_BUF, which POSIX makes atomic: a dashboard killed mid-send cannot leave half a
command in the queue for the loop to block on.
"""

from __future__ import annotations

import math
import queue
import time
from collections import deque
from typing import Any

from plantrig.sim import Command

MAX_TEXT = 120
MOMENT_PRESETS = ("start of test step", "steady state reached", "load applied",
                  "something looks wrong", "end of test step")
"""Labels offered for "Mark moment"; the operator may type any other."""


class Operator:
    """Sends operator commands to a running loop; ``queue`` None means read-only."""

    def __init__(self, command_queue: Any | None) -> None:
        self.queue = command_queue
        self.sent: deque[tuple[float, Command]] = deque(maxlen=50)
        self.message = "ready" if command_queue is not None else \
            "read-only: no run to command"

    @property
    def enabled(self) -> bool:
        return self.queue is not None

    def send(self, command: Command) -> bool:
        """Put ``command`` on the queue without waiting; say what happened."""
        if self.queue is None:
            self.message = f"not sent ({command.kind}): read-only view"
            return False
        try:
            self.queue.put_nowait(command)
        except (queue.Full, OSError, ValueError, AssertionError) as exc:
            self.message = f"NOT SENT {command.kind}: {exc or type(exc).__name__}"
            return False
        self.sent.append((time.time(), command))
        self.message = f"sent {command.kind} {_short(command.args)}".rstrip()
        return True

    def _refuse(self, why: str) -> bool:
        self.message = f"not sent: {why}"
        return False

    # -- run ---------------------------------------------------------------------------
    def stop(self) -> bool:
        """End the run after the current tick (the view asks for a confirmation first)."""
        return self.send(Command("stop", {"reason": "operator stop from the dashboard"}))

    # -- safety ------------------------------------------------------------------------
    def estop(self) -> bool:
        """Software E-stop: the loop forces every input to its safe value and latches."""
        return self.send(Command("estop", {"source": "dashboard"}))

    def reset(self) -> bool:
        """Release a latched E-stop or interlock (the loop refuses if nothing is latched)."""
        return self.send(Command("reset", {"source": "dashboard"}))

    # -- references, moments -----------------------------------------------------------
    def set_reference(self, name: str, value: Any) -> bool:
        if not name:
            return self._refuse("choose a reference first")
        try:
            number = float(value)
        except (TypeError, ValueError):
            return self._refuse(f"reference value {value!r} is not a number")
        if not math.isfinite(number):
            return self._refuse(f"reference value {number} is not finite")
        return self.send(Command("set_reference", {"name": str(name)[:MAX_TEXT],
                                                   "value": number}))

    def mark_moment(self, label: str) -> bool:
        """Put a labelled marker in the record at this tick (a "phase" event)."""
        text = " ".join(str(label).split())[:MAX_TEXT]
        if not text:
            return self._refuse("choose or type a label for the moment first")
        return self.send(Command("mark_phase", {"name": text}))

    # -- faults ------------------------------------------------------------------------
    def inject_fault(self, kind: str, target: str, value: Any = None,
                     duration_s: Any = 0.0) -> bool:
        """Ask the loop to apply fault ``kind`` to ``target`` (0 s: until cleared).

        ``value`` is the kind's one number (its first parameter); None sends none.
        """
        if not kind or not target:
            return self._refuse("choose a fault kind and a target")
        try:
            duration = float(duration_s)
            number = None if value is None else float(value)
        except (TypeError, ValueError):
            return self._refuse(f"fault value {value!r} / duration {duration_s!r} must be "
                                "numbers")
        if not math.isfinite(duration) or duration < 0 or \
                (number is not None and not math.isfinite(number)):
            return self._refuse("fault value must be finite and duration >= 0")
        args: dict[str, Any] = {"kind": str(kind)[:MAX_TEXT], "target": str(target)[:MAX_TEXT]}
        if number is not None:
            args["value"] = number
        args["duration_s"] = duration
        return self.send(Command("inject_fault", args))

    def clear_fault(self, kind: str = "", target: str = "") -> bool:
        """Clear one fault (kind and target) or, with neither given, every active fault."""
        args = {k: str(v)[:MAX_TEXT] for k, v in (("kind", kind), ("target", target)) if v}
        return self.send(Command("clear_fault", args))


def _short(args: dict[str, Any]) -> str:
    return " ".join(f"{k}={v}" for k, v in args.items())[:80]
