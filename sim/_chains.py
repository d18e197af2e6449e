"""The rig file's signal conditioning as the engine's signal chains.

The engine takes its signal chains as objects; this module turns the rig file's
``[[sensors]]`` and ``[[actuators]]`` tables (one per signal, matched by ``name`` to a
plant output or input) into those objects, reporting mistakes in the rig-file style.
Every way of running a rig (the Python API, `plantrig run`, campaigns, rerun) builds
its chains here, so they all condition the signals the same way.
"""

from __future__ import annotations

import difflib
from typing import Any

from plantrig.sim._conditioning import (
    ChainSpecError,
    build_actuator_chain,
    build_sensor_chain,
)
from plantrig.sim._contracts import SignalChain
from plantrig.sim._errors import RigFileError, RigIssue
from plantrig.sim._rigfile import Rig


def _ordered(rig: Rig, group: str, tables: tuple[dict[str, Any], ...],
             names: list[str], issues: list[RigIssue]) -> tuple[list[dict[str, Any]],
                                                                 list[int | None]]:
    """One channel dict per signal in plant order (signals without a table pass
    through), and for each the index of its table in the rig file."""
    by_name: dict[str, dict[str, Any]] = {}
    where: dict[str, int] = {}
    for i, table in enumerate(tables):
        name = table.get("name")
        if name not in names:
            close = difflib.get_close_matches(str(name), names, n=1)
            hint = f"; did you mean '{close[0]}'?" if close else ""
            issues.append(RigIssue(str(rig.path), f"{group}[{i}].name",
                                   f"expected one of {', '.join(names)}, found {name!r}{hint}"))
        elif name in by_name:
            issues.append(RigIssue(str(rig.path), f"{group}[{i}].name",
                                   f"{name!r} already has a [[{group}]] table"))
        else:
            by_name[name] = table
            where[name] = i
    return ([by_name.get(name, {"name": name}) for name in names],
            [where.get(name) for name in names])


def _issue(rig: Rig, exc: Any, origin: list[int | None]) -> RigIssue:
    index = origin[exc.index] if exc.index < len(origin) else exc.index
    return RigIssue(str(rig.path), f"{exc.chain}[{index}].{exc.key}",
                    str(exc).split(": ", 1)[-1])


def build_chains(rig: Rig) -> tuple[SignalChain | None, SignalChain | None]:
    """(actuator chain, sensor chain) for ``rig``; None where the file asks for none."""
    issues: list[RigIssue] = []
    chains: list[SignalChain | None] = []
    for group, tables, signals, build in (
            ("actuators", rig.actuators, rig.inputs,
             lambda spec: build_actuator_chain(spec, rig.tick)),
            ("sensors", rig.sensors, rig.outputs,
             lambda spec: build_sensor_chain(spec, rig.seed))):
        chain = None
        if tables:
            spec, origin = _ordered(rig, group, tables, [s.name for s in signals], issues)
            try:
                chain = build(spec)
            except ChainSpecError as exc:
                issues.append(_issue(rig, exc, origin))
        chains.append(chain)
    if issues:
        raise RigFileError(issues)
    return chains[0], chains[1]
