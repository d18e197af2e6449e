"""The fault catalogue offered in the inject form, and what each kind can act on.

plantrig.sim is the authority on which faults a run can take: its ``FAULT_KINDS``
(kind -> entry with ``target``, ``params`` and ``description``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from plantrig.sim import FAULT_KINDS

LINK_DIRECTIONS = ("both", "to_controller", "from_controller")


@dataclass(frozen=True)
class FaultChoice:
    """One entry of the form: the kind, what its target names, its first parameter."""

    kind: str
    target: str               # "output", "input", "direction", "parameter", "disturbance"
    description: str = ""
    parameter: str | None = "value"   # what the form's one number means (None: no number)


def fault_catalogue() -> tuple[FaultChoice, ...]:
    """Every fault kind sim's catalogue knows, with its first parameter for the form."""
    out = []
    for name, info in FAULT_KINDS.items():
        params = list(info.params)
        out.append(FaultChoice(name, info.target, info.description,
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
