"""The rig file's [controller] table (and the reference controller's [link.controller])
as typed settings: which built-in law, and its gains, loops and signal names.

Checked with the rig file's Checker in the same pass as the rest of the rig, every
mistake at once; sim/model/_controllers.py holds the laws these settings build.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.config._checker import MISSING, Checker, describe_value, one_of
from plantrig.sim.model._controllers import WINDUP

if TYPE_CHECKING:
    from plantrig.sim.config._rigfile import NamedReference, Signal

CONTROLLER_KINDS = ("pid", "state_feedback", "open_loop", "external")
PID_KEYS = {"measure", "drive", "reference", "kp", "ki", "kd", "derivative_lag", "windup",
            "unwind_time", "drive_low", "drive_high"}
RENAMED_WINDUP = {"back_calculation": "unwind", "clamp": "freeze", "none": "off"}
RENAMED_PID_KEYS = {           # keys of earlier versions -> the key to write now
    "derivative_filter": "'derivative_lag'", "tracking_time": "'unwind_time'",
    "u_min": "'drive_low'", "u_max": "'drive_high'",
    "anti_windup": "'windup' (back_calculation -> unwind, clamp -> freeze, none -> off)",
}
CONTROLLER_KEYS = {
    "pid": {"loops"},
    "state_feedback": {"K", "N", "references"},
    "open_loop": {"drive"},
    "external": set(),
}


@dataclass(frozen=True)
class PidLoopSpec:
    """One PID loop: the output it measures, the input it drives, the reference it
    follows, and its gains (None bounds: the input's rig range)."""

    measure: str
    drive: str
    reference: str
    kp: float
    ki: float = 0.0
    kd: float = 0.0
    derivative_lag: float = 0.0
    unwind_time: float | None = None
    drive_low: float | None = None
    drive_high: float | None = None
    windup: str = "unwind"


@dataclass(frozen=True)
class ControllerSpec:
    """A controller: its kind and that kind's settings (the other kinds' stay empty).

    pid: ``loops``; state_feedback: u = -K y + N r over ``references``; open_loop:
    ``drive`` maps an input to the reference it follows; external: a link's device.
    """

    kind: str
    loops: tuple[PidLoopSpec, ...] = ()
    K: NDArray[np.float64] | None = None
    N: NDArray[np.float64] | None = None
    references: tuple[str, ...] = ()
    drive: Mapping[str, str] = field(default_factory=dict)

    def loop_pairs(self) -> dict[str, str]:
        """Output name -> the reference its PID loop follows (for plots)."""
        return {loop.measure: loop.reference for loop in self.loops}


class _Names:
    """The rig's signal names a controller table may refer to."""

    def __init__(self, inputs: list[Signal], outputs: list[Signal],
                 references: list[NamedReference]) -> None:
        self.inputs = [s.name for s in inputs]
        self.outputs = [s.name for s in outputs]
        self.references = [r.name for r in references]

    @staticmethod
    def check(options: list[str], what: str) -> Callable[[Any], str | None]:
        return one_of(tuple(options), what)


def check_controller(c: Checker, table: dict[str, Any], path: str, inputs: list[Signal],
                     outputs: list[Signal], references: list[NamedReference]) -> ControllerSpec:
    """The controller table at ``path`` (its mistakes recorded on ``c``)."""
    kind = c.take(table, "kind", path, "str", check=one_of(CONTROLLER_KINDS))
    if kind is None:
        return ControllerSpec("external")
    c.no_unknown(table, {"kind"} | CONTROLLER_KEYS[kind], path)
    names = _Names(inputs, outputs, references)
    if kind == "pid":
        return ControllerSpec(kind, loops=_pid_loops(c, table, path, names))
    if kind == "state_feedback":
        return _state_feedback(c, table, path, names)
    if kind == "open_loop":
        return ControllerSpec(kind, drive=_open_loop(c, table, path, names))
    return ControllerSpec(kind)


def _pid_loops(c: Checker, table: dict[str, Any], path: str,
               names: _Names) -> tuple[PidLoopSpec, ...]:
    loops = []
    for i, loop in enumerate(c.take(table, "loops", path, "list") or []):
        where = f"{path}.loops[{i}]"
        if not isinstance(loop, dict):
            c.add(where, f"expected a table ([[controller.loops]]), found {describe_value(loop)}")
            continue
        c.no_unknown(loop, PID_KEYS, where, renamed=RENAMED_PID_KEYS)
        loops.append(PidLoopSpec(
            measure=c.take(loop, "measure", where, "str",
                           check=names.check(names.outputs, "plant outputs")),
            drive=c.take(loop, "drive", where, "str",
                         check=names.check(names.inputs, "plant inputs")),
            reference=c.take(loop, "reference", where, "str",
                             check=names.check(names.references, "references")),
            kp=c.take(loop, "kp", where, "number", default=MISSING),
            **{key: c.take(loop, key, where, "number", default=default)
               for key, default in (("ki", 0.0), ("kd", 0.0), ("derivative_lag", 0.0),
                                    ("unwind_time", None), ("drive_low", None),
                                    ("drive_high", None))},
            windup=c.take(loop, "windup", where, "str", default="unwind", check=_windup)))
    drives = [loop.drive for loop in loops if loop.drive]
    for d in sorted({d for d in drives if drives.count(d) > 1}):
        c.add(f"{path}.loops", f"input {d!r} is driven by more than one loop")
    return tuple(loops)


def _windup(value: str) -> str | None:
    """One of WINDUP; a value of an earlier version names its replacement."""
    if value in RENAMED_WINDUP:
        return (f"expected one of {', '.join(WINDUP)}, found {value!r} (an old value); "
                f"did you mean '{RENAMED_WINDUP[value]}'?")
    return one_of(WINDUP)(value)


def _state_feedback(c: Checker, table: dict[str, Any], path: str,
                    names: _Names) -> ControllerSpec:
    K = c.take(table, "K", path, "matrix")
    N = c.take(table, "N", path, "matrix")
    refs = c.take(table, "references", path, "list")
    for j, r in enumerate(refs or []):
        problem = names.check(names.references, "references")(r) if isinstance(r, str) \
            else f"expected a reference name, found {describe_value(r)}"
        if problem:
            c.add(f"{path}.references[{j}]", problem)
    m, p = len(names.inputs), len(names.outputs)
    k_matrix = n_matrix = None
    if K is not None:
        k_matrix = np.atleast_2d(np.array(K, dtype=np.float64))
        if k_matrix.shape != (m, p):
            c.add(f"{path}.K", f"has shape {k_matrix.shape}, expected ({m}, {p}) "
                               "(inputs x outputs)")
    if N is not None and refs is not None:
        n_matrix = np.array(N, dtype=np.float64).reshape(m, -1) \
            if np.size(N) == m * len(refs) else np.atleast_2d(np.array(N, dtype=np.float64))
        if n_matrix.shape != (m, len(refs)):
            c.add(f"{path}.N", f"has shape {n_matrix.shape}, expected ({m}, {len(refs)}) "
                               "(inputs x references)")
    return ControllerSpec("state_feedback", K=k_matrix, N=n_matrix,
                          references=tuple(refs) if refs is not None else ())


def _open_loop(c: Checker, table: dict[str, Any], path: str, names: _Names) -> dict[str, str]:
    drive = c.take(table, "drive", path, "table")
    for inp, ref in (drive or {}).items():
        if inp not in names.inputs:
            c.add(f"{path}.drive.{inp}",
                  names.check(names.inputs, "plant inputs")(inp) or "unknown input")
        elif not isinstance(ref, str) or ref not in names.references:
            c.add(f"{path}.drive.{inp}",
                  (names.check(names.references, "references")(ref) or "unknown reference")
                  if isinstance(ref, str) else
                  f"expected a reference name, found {describe_value(ref)}")
    return dict(drive or {})


def controller_table(spec: ControllerSpec) -> dict[str, Any]:
    """The spec as the TOML table a rig file holds (what check_controller reads back)."""
    out: dict[str, Any] = {"kind": spec.kind}
    if spec.kind == "pid":
        out["loops"] = [{k: v for k, v in vars(loop).items() if v is not None}
                        for loop in spec.loops]
    elif spec.kind == "state_feedback":
        out.update(K=None if spec.K is None else spec.K.tolist(),
                   N=None if spec.N is None else spec.N.tolist(),
                   references=list(spec.references))
    elif spec.kind == "open_loop":
        out["drive"] = dict(spec.drive)
    return {k: v for k, v in out.items() if v is not None}
