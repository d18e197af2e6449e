"""The fault catalogue offered in the inject form, and what each kind can act on.

plantrig.sim is the authority on which faults a run can take: its ``FAULT_KINDS``
(kind -> entry with ``target``, ``params`` and ``description``), where it has one.
Without it the form offers plain sensor faults, which an engine that cannot apply
them answers with a "command_refused" event.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import plantrig.sim

LINK_DIRECTIONS = ("both", "to_controller", "from_controller")


@dataclass(frozen=True)
class FaultChoice:
    """One entry of the form: the kind, what its target names, its first parameter."""

    kind: str
    target: str               # "output", "input", "direction", "parameter", "disturbance"
    description: str = ""
    parameter: str | None = "value"   # what the form's one number means (None: no number)


PLAIN_SENSOR_FAULTS = (
    FaultChoice("sensor_stuck", "output", "the reading holds at a value"),
    FaultChoice("sensor_bias", "output", "a constant added to the reading", "bias"),
    FaultChoice("sensor_drift", "output", "an offset growing at a rate per second", "rate"),
    FaultChoice("sensor_noise", "output", "extra noise of a standard deviation", "std"),
    FaultChoice("sensor_dropout", "output", "the reading reads as open circuit"),
)


def fault_catalogue() -> tuple[FaultChoice, ...]:
    """Fault kinds to list: sim's own catalogue if it has one, else plain sensor faults."""
    kinds: Any = getattr(plantrig.sim, "FAULT_KINDS", None)
    if kinds is None:
        try:  # public once sim/__init__ exports it
            from plantrig.sim import _faults
            kinds = getattr(_faults, "FAULT_KINDS", None)
        except ImportError:
            kinds = None
    if callable(kinds):
        kinds = kinds()
    if not kinds:
        return PLAIN_SENSOR_FAULTS
    if not isinstance(kinds, dict):
        return tuple(FaultChoice(str(k), "output") for k in kinds)
    out = []
    for name, info in kinds.items():
        params = list(getattr(info, "params", {}) or {})
        out.append(FaultChoice(str(name), str(getattr(info, "target", "output")),
                               str(getattr(info, "description", "")),
                               params[0] if params else None))
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
