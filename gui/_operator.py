"""Operator actions as plain functions: each puts one Command on the run's queue.

The buttons of the dashboard call these and nothing else, so tests press a button by
calling its function. Nothing here blocks: the queue is written with put_nowait, and a
queue that is gone or full gives a message, never an exception in the GUI loop.

Sending is not doing: the run acts on a command (or refuses it) and says so in its
event tape. ``hear`` reads those events and turns the message into the run's answer
("ACCEPTED ..." or "REFUSED by the run: <reason>"); after the run has ended nothing is
sent, and a command still waiting then says that it got no answer.
Commands stay small (texts are cut to MAX_TEXT), so each is one pipe write below
PIPE_BUF, which POSIX makes atomic: a dashboard killed mid-send cannot leave half a
command in the queue for the loop to block on.
"""

from __future__ import annotations

import math
import queue
import time
from collections import deque
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from plantrig.gui._eventlog import EventRow
from plantrig.sim import BY_COMMAND, Command

MAX_TEXT = 120
MOMENT_PRESETS = ("start of test step", "steady state reached", "load applied",
                  "something looks wrong", "end of test step")
"""Labels offered for "Mark moment"; the operator may type any other."""


def answer_to(command: Command, event: EventRow) -> bool | None:
    """True if ``event`` says the run did ``command``, False if it says the run refused
    it, None if the event is about something else. Matched on the event's kind and name
    (a refusal names the command refused; a fault the dashboard injects is named
    "<kind>:<target>", the engine's name for a fault given none)."""
    a, c, kind, name = command.args, command.kind, event.kind, event.name
    if kind == "command_refused" and name == c:
        return False
    if c == "inject_fault":
        return True if kind == "fault_injected" and \
            name == (a.get("name") or f"{a.get('kind')}:{a.get('target')}") else None
    if c == "clear_fault":
        return True if kind == "fault_cleared" and event.source == BY_COMMAND else None
    if c == "reset":
        return {"reset": True, "reset_refused": False}.get(kind)
    if c == "set_reference":
        return True if kind == "reference_set" and name == a.get("name") else None
    if c == "mark_phase":
        return True if kind == "phase" and name == a.get("name") else None
    if c == "stop":
        return True if kind == "operator_stop" else None
    if c == "estop":
        return True if kind == "estop" else None
    return None


@dataclass
class Answer:
    """The run's answer to one command sent from here."""

    command: Command
    accepted: bool | None        # None: the run ended without acting on it
    t: float | None = None       # plant time of the answer
    detail: str = ""


class Operator:
    """Sends operator commands to a running loop; ``queue`` None means read-only."""

    def __init__(self, command_queue: Any | None) -> None:
        self.queue = command_queue
        self.sent: deque[tuple[float, Command]] = deque(maxlen=50)
        self.waiting: list[Command] = []          # sent, no answer yet (oldest first)
        self.answers: deque[Answer] = deque(maxlen=50)
        self.ended = ""                           # why no more commands can be sent
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
        if self.ended:
            self.message = f"NOT SENT {command.kind}: the run has ended ({self.ended})"
            return False
        try:
            self.queue.put_nowait(command)
        except (queue.Full, OSError, ValueError, AssertionError) as exc:
            self.message = f"NOT SENT {command.kind}: {exc or type(exc).__name__}"
            return False
        self.sent.append((time.time(), command))
        self.waiting.append(command)
        self.message = f"sent {command.kind} {_short(command.args)}".rstrip() + \
            "; waiting for the run's answer"
        return True

    def hear(self, events: Iterable[EventRow]) -> None:
        """Match the run's events to the commands waiting for an answer (oldest first)."""
        for event in events:
            t, kind, detail = event.time, event.kind, event.detail
            for command in self.waiting:
                verdict = answer_to(command, event)
                if verdict is None:
                    continue
                self.waiting.remove(command)
                self.answers.append(Answer(command, verdict, t, detail))
                what = f"{command.kind} {_short(command.args)}".rstrip()
                self.message = (f"ACCEPTED at t = {t:.3f} s: {what} ({kind}: {detail})"
                                if verdict else
                                f"REFUSED by the run at t = {t:.3f} s: {what}: {detail}")
                break

    def run_ended(self, why: str) -> None:
        """No more commands: say so, and close the commands that got no answer."""
        if self.ended or self.queue is None:
            return
        self.ended = why or "ended"
        for command in self.waiting:
            self.answers.append(Answer(command, None))
        if self.waiting:
            names = ", ".join(c.kind for c in self.waiting)
            self.message = f"NO ANSWER to {names}: the run ended ({self.ended}) first"
        self.waiting.clear()

    def _refuse(self, why: str) -> bool:
        self.message = f"not sent: {why}"
        return False

    # -- run ---------------------------------------------------------------------------
    def stop(self) -> bool:
        """End the run after the current tick (the view asks for a confirmation first)."""
        return self.send(Command("stop", {"reason": "operator stop from the dashboard"}))

    # -- safety ------------------------------------------------------------------------
    def estop(self, already_latched: bool = False) -> bool:
        """Software E-stop: the loop forces every input to its safe value and latches.

        Sent even when the latch is already on (it is the safe side); the run then has
        nothing new to answer, so nothing waits for it.
        """
        sent = self.send(Command("estop", {"source": "dashboard"}))
        if sent and already_latched:
            self.waiting.pop()
            self.message = "E-STOP sent again: the latch was already on"
        return sent

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

        ``value`` is the kind's one number (its first parameter); None sends none, so
        the kind's default applies (the form checks it first: check_fault_form).
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
