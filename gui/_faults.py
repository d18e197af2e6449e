"""The fault catalogue offered in the inject form, what each kind can act on, and the
form's own check before anything is sent.

plantrig.sim is the authority on which faults a run can take: its ``FAULT_KINDS``
(kind -> entry with ``target``, ``params`` (name -> default) and ``description``).
The form offers one number, the kind's first parameter, filled with that parameter's
default whenever the kind is chosen, so a value typed for one kind never carries over
to the next (a stuck sensor left at another kind's 0 would stick the reading at 0).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from plantrig.sim import FAULT_KINDS

LINK_DIRECTIONS = ("both", "to_controller", "from_controller")

NO_CHANGE = {"probability": 0.0, "bias": 0.0, "gain": 1.0, "factor": 1.0, "rate": 0.0,
             "std": 0.0, "amplitude": 0.0}
"""Parameter values with which a fault would change nothing: the form refuses them."""


@dataclass(frozen=True)
class FaultChoice:
    """One entry of the form: the kind, what its target names, its first parameter."""

    kind: str
    target: str               # "output", "input", "direction", "parameter", "disturbance"
    description: str = ""
    parameter: str | None = "value"   # what the form's one number means (None: no number)
    default: float | None = None      # the parameter's default; None: required; NaN: the
                                      # value at the moment of injection

    @property
    def default_text(self) -> str:
        """What the form's value field shows when the kind is chosen."""
        if self.parameter is None or self.default is None or not math.isfinite(self.default):
            return ""
        return f"{self.default:g}"

    @property
    def value_hint(self) -> str:
        """Greyed text in an empty value field: what leaving it empty means."""
        if self.parameter is None:
            return ""
        if self.default is None:
            return f"{self.parameter}: required"
        if math.isnan(self.default):
            return "empty: its value when injected"
        return f"{self.parameter} (default {self.default:g})"


def fault_catalogue() -> tuple[FaultChoice, ...]:
    """Every fault kind sim's catalogue knows, with its first parameter for the form."""
    out = []
    for name, info in FAULT_KINDS.items():
        params = list(info.params.items())
        parameter, default = params[0] if params else (None, None)
        out.append(FaultChoice(name, info.target, info.description, parameter,
                               None if default is None else float(default)))
    return tuple(out)


def fault_targets(choice: FaultChoice, rig: Any) -> list[str]:
    """Names the target of ``choice`` can take in ``rig`` (empty: type it in)."""
    if choice.target == "output":
        return [s.name for s in rig.outputs]
    if choice.target == "input":
        return [s.name for s in rig.inputs]
    if choice.target == "direction":
        return list(LINK_DIRECTIONS)
    if choice.target == "disturbance":
        return [d.name for d in getattr(rig, "disturbances", ())]
    return []


def check_fault_form(choice: FaultChoice, value_text: str,
                     duration: Any) -> tuple[float | None, float, str]:
    """(value to send or None, duration in s, problem) for what the form holds.

    An empty value sends none (the kind's default applies); a required one must be
    given; a value with which the fault changes nothing, or a negative duration, is a
    problem, never quietly changed.
    """
    try:
        seconds = float(duration)
    except (TypeError, ValueError):
        return None, 0.0, f"duration {duration!r} is not a number of seconds"
    if not math.isfinite(seconds) or seconds < 0:
        return None, 0.0, f"duration {seconds:g} s: enter 0 (until cleared) or more"
    text = str(value_text or "").strip()
    if choice.parameter is None or not text:
        if choice.parameter is not None and choice.default is None:
            return None, seconds, f"{choice.kind} needs {choice.parameter}: enter a number"
        return None, seconds, ""
    try:
        value = float(text)
    except ValueError:
        return None, seconds, f"{choice.parameter} {text!r} is not a number"
    if not math.isfinite(value):
        return None, seconds, f"{choice.parameter} must be a finite number"
    if choice.parameter == "probability" and not 0.0 < value <= 1.0:
        return None, seconds, f"probability {value:g}: enter more than 0 and at most 1"
    if NO_CHANGE.get(choice.parameter) == value:
        return None, seconds, f"{choice.parameter} {value:g} changes nothing: not a fault"
    return value, seconds, ""
