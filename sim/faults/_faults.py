"""The fault catalogue: sensor, actuator, link and plant faults, and disturbances.

A fault is injected at a tick (by a scenario step or an operator command) and acts from
that tick on, for ``duration`` seconds or until cleared. Where each group acts, in the
tick order of sim/engine/_engine.py:

    link (from_controller)  on the command as received, before the actuator chain
    actuator                on u after the actuator chain, before safety: a trip's safe
                            values still win (the interlock's own cut-off)
    plant                   on the model: an LTI entry of A or B is scaled (or set) and the
                            model re-discretised once (exact ZOH again); an ODE parameter
                            is changed; drift repeats this every ``update`` seconds
    disturbance             an extra additive input d: x_{k+1} += Ed d_k for LTI (Ed the
                            ZOH of the ``[[disturbances]]`` column), p[param] += d for ODE
    sensor                  on the values sent to the controller, after the sensor chain
    link (to_controller)    on what reaches the controller

Link faults act on the vectors exchanged at the link boundary, not on bytes: with a
built-in controller on the values it reads and writes, with a real link on the decoded
command and on the values handed to ``send`` (a dropped frame is not sent at all). So
the same scenario rehearses the same way fast and on the bench. A corrupted frame is
modelled as the receiver sees it: the CRC rejects it, so it is dropped and counted. While
a link fault drops commands, a watchdog here reports ``link_lost`` after the watchdog
timeout (``[safety]`` for built-in runs, ``[link]`` otherwise) and ``link_restored`` at
the next command that gets through, so interlocks on ``link_lost`` trip in fast mode too.

Random faults (noise, dropped and corrupted frames) draw from a numpy Generator seeded by
(rig seed, the fault's ``seed``, the injection tick): a fast run is the same every time.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, NamedTuple

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.config._checker import did_you_mean
from plantrig.sim.engine._contracts import (
    BY_COMMAND,
    REHEARSED,
    WINDOW_DISTURBANCE,
    WINDOW_FAULT,
    EmitEvent,
)
from plantrig.sim.engine._watchdog import silent_ticks_allowed
from plantrig.sim.model._plant import OdePlant

if TYPE_CHECKING:
    from plantrig.sim.config._checker import Checker
    from plantrig.sim.config._rigfile import Rig, Signal
    from plantrig.sim.model._plant import ParameterChange, Stepper

Vector = NDArray[np.float64]
REQUIRED = None
MAX_DELAY_TICKS = 100_000
DIRECTIONS = ("both", "to_controller", "from_controller")


@dataclass(frozen=True)
class FaultKind:
    """One entry of the catalogue: its group, what ``target`` names, its parameters
    (name -> default, None where the parameter is required) and what it does."""

    group: str
    target: str
    params: dict[str, float | None]
    description: str


FAULT_KINDS: dict[str, FaultKind] = {
    "sensor_stuck": FaultKind("sensor", "output", {"value": math.nan},
                              "the reading holds at `value` (NaN: at its value when injected)"),
    "sensor_bias": FaultKind("sensor", "output", {"bias": REQUIRED},
                             "adds `bias` to the reading"),
    "sensor_drift": FaultKind("sensor", "output", {"rate": REQUIRED},
                              "adds an offset growing at `rate` units per second"),
    "sensor_gain": FaultKind("sensor", "output", {"gain": REQUIRED},
                             "multiplies the reading by `gain` (a gain error)"),
    "sensor_noise": FaultKind("sensor", "output", {"std": REQUIRED, "seed": 0.0},
                              "adds Gaussian noise of standard deviation `std` (seeded)"),
    "sensor_dropout": FaultKind("sensor", "output", {"value": 0.0},
                                "the reading is the open-circuit `value`"),
    "sensor_spike": FaultKind("sensor", "output", {"amplitude": REQUIRED},
                              "adds `amplitude` (one tick unless a duration is given)"),
    "actuator_stuck": FaultKind("actuator", "input", {"value": math.nan},
                                "the input holds at `value` (NaN: at its value when injected)"),
    "actuator_effectiveness": FaultKind("actuator", "input", {"factor": REQUIRED},
                                        "the input acts at `factor` of its strength (u*factor)"),
    "actuator_saturation": FaultKind("actuator", "input",
                                     {"low": -math.inf, "high": math.inf},
                                     "the input saturates at new bounds `low`..`high`"),
    "actuator_delay": FaultKind("actuator", "input", {"ticks": REQUIRED},
                                "the input arrives `ticks` ticks late"),
    "link_drop": FaultKind("link", "direction", {"probability": 1.0, "seed": 0.0},
                           "frames are lost with `probability` (1: all)"),
    "link_delay": FaultKind("link", "direction", {"ticks": REQUIRED},
                            "frames arrive `ticks` ticks late"),
    "link_corrupt": FaultKind("link", "direction", {"probability": 1.0, "seed": 0.0},
                              "frames arrive corrupted with `probability`; the CRC rejects "
                              "them"),
    "link_freeze": FaultKind("link", "direction", {},
                             "frames keep coming with the values of the moment it began"),
    "plant_step": FaultKind("plant", "parameter", {"factor": 1.0, "value": math.nan},
                            "a model parameter (A[i,j], B[i,j] or an ODE parameter) is "
                            "multiplied by `factor` (or set to `value`)"),
    "plant_drift": FaultKind("plant", "parameter", {"rate": REQUIRED, "update": 0.1},
                             "a model parameter drifts by `rate` (fraction of itself) per "
                             "second, applied every `update` s"),
    "disturbance": FaultKind("disturbance", "disturbance", {"value": REQUIRED},
                             "the disturbance input takes `value` (a load step)"),
}
COMMON_KEYS = {"kind", "target", "name", "duration"}
INT_PARAMS = {"ticks"}


@dataclass(frozen=True)
class FaultSpec:
    """A checked fault: what, where, how long (None: until cleared) and its parameters."""

    name: str
    kind: str
    target: str
    params: dict[str, float] = field(default_factory=dict)
    duration: float | None = None

    def describe(self) -> str:
        shown = ", ".join(f"{k}={v:g}" for k, v in self.params.items() if not math.isnan(v))
        span = f"for {self.duration:g} s" if self.duration is not None else "until cleared"
        return f"{self.kind} on {self.target}" + (f" ({shown})" if shown else "") + f", {span}"


@dataclass(frozen=True)
class DisturbanceSpec:
    """A ``[[disturbances]]`` entry: an extra additive input, zero unless a fault sets it.

    ``column`` (LTI plants) is how d enters dx/dt (a column beside B; for discrete_lti
    it is used as given, already discrete); ``param`` (ODE plants) names the parameter
    of ``[plant.params]`` that d is added to.
    """

    name: str
    unit: str = ""
    column: tuple[float, ...] = ()
    param: str = ""
    description: str = ""


DISTURBANCE_KEYS = {"name", "unit", "B", "param", "description"}


def parse_disturbances(c: Checker, doc: dict[str, Any], plant: Any,
                       states: list[Signal]) -> list[DisturbanceSpec]:
    """Check ``[[disturbances]]`` against the plant."""
    value = doc.get("disturbances", [])
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        c.add("disturbances", "expected an array of tables ([[disturbances]])")
        return []
    out: list[DisturbanceSpec] = []
    for i, entry in enumerate(value):
        where = f"disturbances[{i}]"
        c.no_unknown(entry, DISTURBANCE_KEYS, where)
        name = c.take(entry, "name", where, "str")
        unit = c.take(entry, "unit", where, "str", default="") or ""
        desc = c.take(entry, "description", where, "str", default="") or ""
        if name is not None and (not name.isidentifier() or any(d.name == name for d in out)):
            c.add(f"{where}.name", f"expected a unique plain identifier, found {name!r}")
        column: tuple[float, ...] = ()
        param = ""
        if isinstance(plant, OdePlant):
            if "B" in entry:
                c.add(f"{where}.B", "an ODE plant takes a disturbance through `param`, "
                                    "not a B column")
            param = c.take(entry, "param", where, "str") or ""
            if param and param not in plant.params:
                known = sorted(plant.params)
                hint = did_you_mean(param, known)
                c.add(f"{where}.param", f"expected a parameter of [plant.params] "
                                        f"({', '.join(known) or 'none'}), found {param!r}{hint}")
            elif param and not _is_number(plant.params[param]):
                c.add(f"{where}.param", f"expected a numeric parameter, found "
                                        f"{plant.params[param]!r}")
        elif plant is not None:
            if "param" in entry:
                c.add(f"{where}.param", "a linear plant takes a disturbance through a `B` "
                                        "column, not a parameter")
            vec = c.take(entry, "B", where, "vector")
            n = plant.shape[0]
            if vec is not None:
                if len(vec) != n:
                    c.add(f"{where}.B", f"expected {n} values (one per state), found {len(vec)}")
                else:
                    column = tuple(float(v) for v in vec)
        if name is not None:
            out.append(DisturbanceSpec(name, unit, column, param, desc))
    return out


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


_MATRIX_TARGET = re.compile(r"^\s*([AB])\s*\[\s*([^,\]]+?)\s*,\s*([^,\]]+?)\s*\]\s*$")


def _matrix_index(token: str, names: list[str], size: int) -> int | None:
    if token.lstrip("-").isdigit():
        i = int(token)
        return i if 0 <= i < size else None
    return names.index(token) if token in names else None


def plant_target(rig: Rig, target: str) -> tuple[tuple[str, int, int] | str | None, str]:
    """('A' or 'B', row, col) for an LTI plant, a parameter name for an ODE, or None, why."""
    plant = rig.plant
    if getattr(plant, "has_dead_time", False):
        return None, "a plant with dead time takes no plant faults (not supported yet)"
    if getattr(plant, "fmu_file", None) is not None:
        return None, "an FMU plant takes no plant faults (its parameters are fixed at start)"
    if isinstance(plant, OdePlant):
        numeric = sorted(k for k, v in plant.params.items() if _is_number(v))
        if target in numeric:
            return target, ""
        hint = did_you_mean(target, numeric)
        return None, f"expected a numeric parameter of [plant.params] " \
                     f"({', '.join(numeric) or 'none'}), found {target!r}{hint}"
    m = _MATRIX_TARGET.match(target)
    n, n_in = plant.shape[0], plant.shape[1]
    states = [s.name for s in rig.states]
    inputs = [s.name for s in rig.inputs]
    if m is None:
        return None, f"expected A[row, col] or B[row, col] (0-based numbers or state/input " \
                     f"names), found {target!r}"
    which, r_tok, c_tok = m.groups()
    row = _matrix_index(r_tok, states, n)
    col = _matrix_index(c_tok, states if which == "A" else inputs, n if which == "A" else n_in)
    if row is None or col is None:
        return None, f"{target!r} is outside {which} (shape {n} x " \
                     f"{n if which == 'A' else n_in})"
    return (which, row, col), ""


def parse_fault(args: Mapping[str, Any], rig: Rig) -> tuple[FaultSpec | None, list[tuple[str,
                                                                                      str]]]:
    """Check a fault given as a table (scenario step) or a command's arguments.

    Returns the spec (None when anything is wrong) and every problem as (key, message).
    ``value`` stands for the kind's first parameter when the kind has no parameter of
    that name and the first is not given by name (so a generic form can send one number).
    """
    problems: list[tuple[str, str]] = []
    kind = args.get("kind")
    if kind not in FAULT_KINDS:
        hint = did_you_mean(str(kind), list(FAULT_KINDS))
        problems.append(("kind", f"expected one of {', '.join(FAULT_KINDS)}, found "
                                 f"{kind!r}{hint}"))
        return None, problems
    info = FAULT_KINDS[kind]
    given = dict(args)
    given.pop("duration_s", None) if "duration" in given else None
    if "duration_s" in given:                         # the dashboard's spelling
        given["duration"] = given.pop("duration_s")
    first = next(iter(info.params), None)
    if "value" in given and "value" not in info.params and first is not None \
            and first not in given:
        given[first] = given.pop("value")
    for key in given:
        if key not in COMMON_KEYS and key not in info.params:
            hint = did_you_mean(key, COMMON_KEYS | set(info.params), known=True)
            problems.append((key, f"unknown key for {kind}{hint}"))
    target = given.get("target", "both" if info.group == "link" else None)
    if not isinstance(target, str) or not target:
        problems.append(("target", f"missing (expected {_target_text(info, rig)})"))
    else:
        why = _check_target(info, target, rig)
        if why:
            problems.append(("target", why))
    params: dict[str, float] = {}
    for key, default in info.params.items():
        value = given.get(key, default)
        if value is REQUIRED:
            problems.append((key, f"missing (expected a number: {info.description})"))
            continue
        if not _is_number(value):
            problems.append((key, f"expected a number, found {value!r}"))
            continue
        value = float(value)
        problem = _check_param(key, value)
        if problem:
            problems.append((key, problem))
        params[key] = value
    if kind in ("sensor_dropout", "disturbance") and not math.isfinite(params.get("value", 0)):
        problems.append(("value", f"expected a finite number, found {params['value']}"))
    if kind == "actuator_saturation" and params.get("low", 0) >= params.get("high", 1):
        problems.append(("high", f"expected more than low ({params.get('low')})"))
    duration = given.get("duration")
    if duration is not None and (not _is_number(duration) or not duration >= 0
                                 or not math.isfinite(duration)):
        problems.append(("duration", f"expected seconds >= 0, found {duration!r}"))
        duration = None
    if duration == 0:
        duration = None                                # 0: until cleared (the dashboard's way)
    if kind == "sensor_spike" and duration is None:
        duration = rig.tick
    name = given.get("name") or f"{kind}:{target}"
    if not isinstance(name, str):
        problems.append(("name", f"expected a string, found {name!r}"))
    if problems:
        return None, problems
    return FaultSpec(str(name), kind, str(target), params,
                     None if duration is None else float(duration)), []


def _target_text(info: FaultKind, rig: Rig) -> str:
    return {"output": "a plant output: " + ", ".join(s.name for s in rig.outputs),
            "input": "a plant input: " + ", ".join(s.name for s in rig.inputs),
            "direction": "one of " + ", ".join(DIRECTIONS),
            "parameter": "A[row, col], B[row, col] or an ODE parameter",
            "disturbance": "a disturbance: " + (", ".join(d.name for d in rig.disturbances)
                                                or "none defined in [[disturbances]]")
            }[info.target]


def _check_target(info: FaultKind, target: str, rig: Rig) -> str:
    if info.target == "parameter":
        return plant_target(rig, target)[1]
    options = {"output": [s.name for s in rig.outputs], "input": [s.name for s in rig.inputs],
               "direction": list(DIRECTIONS),
               "disturbance": [d.name for d in rig.disturbances]}[info.target]
    if target in options:
        return ""
    hint = did_you_mean(target, options)
    return f"expected {_target_text(info, rig)}; found {target!r}{hint}"


def _check_param(key: str, value: float) -> str:
    if key in ("value", "low", "high"):
        return "" if not (key == "value" and math.isinf(value)) else "expected a finite value"
    if not math.isfinite(value):
        return f"expected a finite number, found {value}"
    if key in INT_PARAMS and not (value == int(value) and 1 <= value <= MAX_DELAY_TICKS):
        return f"expected a whole number of ticks 1..{MAX_DELAY_TICKS}, found {value:g}"
    if key == "seed" and not (value == int(value) and 0 <= value < 2**63):
        return f"expected a whole number >= 0, found {value:g}"
    if key == "probability" and not 0 <= value <= 1:
        return f"expected a probability 0..1, found {value:g}"
    if key in ("std", "factor") and value < 0:
        return f"expected >= 0, found {value:g}"
    if key == "update" and value <= 0:
        return f"expected a positive number of seconds, found {value:g}"
    return ""


# A sensor or actuator fault as one arithmetic operation on one value, for the C tick
# (sim/engine/_stretch.c): v = a, v += a, v *= a, v = min(max(v, a), b), v += a * (t - b)
OP_SET, OP_ADD, OP_MUL, OP_CLAMP, OP_DRIFT = range(5)
ON_INPUT, ON_SENT = 0, 1


class FaultOp(NamedTuple):
    place: int      # ON_INPUT (the plant's input) or ON_SENT (the values for the controller)
    kind: int
    at: int         # which value: the input or output index
    a: float
    b: float = 0.0


@dataclass
class _Active:
    spec: FaultSpec
    group: str
    direction: str
    start: int
    end: int | None
    apply: Callable[..., Any] | None = None
    rng: np.random.Generator | None = None
    op: FaultOp | None = None       # ``apply`` as one operation, where it is one


class Faults:
    """The faults active in one run, applied at their places in the tick.

    The engine asks ``on`` (any fault active at all) and the per-place flags before it
    calls anything, so a run without faults pays a handful of attribute reads per tick.
    ``emit(tick, kind, detail, name=..., window=...)`` records an event.
    """

    def __init__(self, rig: Rig, stepper: Stepper, columns: list[str], row: Vector,
                 emit: EmitEvent, has_link: bool) -> None:
        self.rig = rig
        self.tick = rig.tick
        self.stepper = stepper
        self.row = row
        self.emit = emit
        self.outputs = [s.name for s in rig.outputs]
        self.inputs = [s.name for s in rig.inputs]
        self.active: list[_Active] = []
        self.on = False
        self.sensor_on = self.actuator_on = self.link_in_on = self.link_out_on = False
        self.plant_on = False
        self.next_end = math.inf
        self._next_drift = math.inf
        # the per-tick work of the active faults as FaultOps in injection order, or None
        # when some fault needs the Python tick every tick (noise, a delay, a link fault
        # or a lost link, a drifting parameter); disturbances and parameter steps have
        # none, they act where they start and end
        self.ops: list[FaultOp] | None = []
        m, p = len(rig.inputs), len(rig.outputs)
        self._u_col = slice(columns.index(f"u:{rig.inputs[0].name}"),
                            columns.index(f"u:{rig.inputs[0].name}") + m) if m else slice(0, 0)
        self._sent_col = columns.index(f"sent:{rig.outputs[0].name}") if p else 0
        self._cmd_col = columns.index(f"cmd:{rig.inputs[0].name}") if m else 0
        self.delivered = np.zeros(p)           # what a built-in controller reads
        self._last_cmd = np.zeros(m)
        self._out = np.zeros(p)
        self.has_link = has_link
        timeout = rig.safety.watchdog_timeout
        if has_link and rig.link is not None:
            timeout = rig.link.watchdog_timeout
        self.watchdog_ticks = silent_ticks_allowed(timeout, rig.tick)
        self._last_fresh = self._silent_from = 0
        self.lost = False
        self.counts = {"frames_dropped": 0, "frames_corrupted": 0, "rehearsed_losses": 0}
        # disturbances: the stepper adds them to the plant; the record shows their values
        self.dist = list(rig.disturbances)
        self._d_cols = [columns.index(f"d:{d.name}") for d in self.dist]

    # -- injecting and clearing ------------------------------------------------------
    def inject(self, k: int, args: Mapping[str, Any]) -> None:
        """An inject_fault command (or scenario step) at tick ``k``."""
        spec, problems = parse_fault(args, self.rig)
        if spec is None:
            self.emit(k, "command_refused", "inject_fault: " + "; ".join(
                f"{key}: {msg}" for key, msg in problems), name="inject_fault")
            return
        self.start(k, spec)

    def start(self, k: int, spec: FaultSpec) -> None:
        if any(f.spec.name == spec.name for f in self.active):
            self._end(k, spec.name, "replaced by a new fault of the same name")
        info = FAULT_KINDS[spec.kind]
        end = None if spec.duration is None else k + max(1, round(spec.duration / self.tick))
        f = _Active(spec, info.group, spec.target if info.group == "link" else "", k, end)
        if spec.kind in ("sensor_noise", "link_drop", "link_corrupt"):
            f.rng = np.random.default_rng([self.rig.seed, int(spec.params["seed"]), k])
        self.emit(k, "fault_injected", f"{spec.name}: {spec.describe()}", name=spec.name,
                  window=WINDOW_DISTURBANCE if info.group == "disturbance" else WINDOW_FAULT)
        if info.group == "sensor":
            f.apply = self._sensor_fn(f, k)
        elif info.group == "actuator":
            f.apply = self._actuator_fn(f)
        elif info.group == "link":
            f.apply = self._link_fn(f)
        self.active.append(f)
        if info.group == "disturbance":
            j = [d.name for d in self.dist].index(spec.target)
            self._set_disturbance(j, spec.params["value"])
        self._refresh(k)
        if info.group == "plant":
            self._rebuild_plant(k)

    def clear(self, k: int, args: Mapping[str, Any]) -> None:
        """A clear_fault command: by ``name``, by ``kind`` and/or ``target``, or every fault."""
        name, kind, target = args.get("name"), args.get("kind"), args.get("target")
        chosen = [f.spec.name for f in self.active
                  if (not name or f.spec.name == name) and (not kind or f.spec.kind == kind)
                  and (not target or f.spec.target == target)]
        if not chosen:
            what = ", ".join(f"{k_}={v}" for k_, v in (("name", name), ("kind", kind),
                                                       ("target", target)) if v) or "any"
            self.emit(k, "command_refused", f"clear_fault: no active fault matches {what}",
                      name="clear_fault")
            return
        for n in chosen:
            self._end(k, n, "cleared by command", BY_COMMAND)

    def expire(self, k: int) -> None:
        """End every fault whose duration ran out by tick ``k``."""
        for f in [f for f in self.active if f.end is not None and f.end <= k]:
            self._end(k, f.spec.name, "duration ended")

    def _end(self, k: int, name: str, why: str, source: str = "") -> None:
        f = next(f for f in self.active if f.spec.name == name)
        self.active.remove(f)
        self.emit(k, "fault_cleared", f"{name}: {why}", source, name=name)
        if f.group == "disturbance":
            j = [d.name for d in self.dist].index(f.spec.target)
            self._set_disturbance(j, 0.0)
        self._refresh(k)
        if f.group == "plant":
            self._rebuild_plant(k)

    def _refresh(self, k: int) -> None:
        groups = {(f.group, f.direction) for f in self.active}
        self.sensor_on = any(g == "sensor" for g, _ in groups)
        self.actuator_on = any(g == "actuator" for g, _ in groups)
        had_in = self.link_in_on
        self.link_in_on = any(g == "link" and d != "to_controller" for g, d in groups) \
            or self.lost
        if self.link_in_on and not had_in:
            self._last_cmd[:] = self.row[self._cmd_col:self._cmd_col + len(self.inputs)]
            self._last_fresh = k - 1       # the last command before the fault began
        out_before = self.link_out_on
        self.link_out_on = any(g == "link" and d != "from_controller" for g, d in groups)
        if self.link_out_on and not out_before:
            self.delivered[:] = self.row[self._sent_col:self._sent_col + len(self.outputs)]
        self.plant_on = any(g == "plant" for g, _ in groups)
        self.next_end = min((f.end for f in self.active if f.end is not None),
                            default=math.inf)
        self.on = bool(self.active) or self.lost
        self._update_ops()

    def _update_ops(self) -> None:
        """``ops`` for the faults active now (after any start, end or plant rebuild)."""
        per_tick = [f for f in self.active if f.group in ("sensor", "actuator")]
        self.ops = None if (self.link_in_on or self.link_out_on
                            or self._next_drift < math.inf
                            or any(f.op is None for f in per_tick)) \
            else [f.op for f in per_tick if f.op is not None]

    # -- sensor and actuator faults ----------------------------------------------------
    def _sensor_fn(self, f: _Active, k0: int) -> Callable[[int, float, Vector], None]:
        i = self.outputs.index(f.spec.target)
        p, kind = f.spec.params, f.spec.kind
        t0 = k0 * self.tick
        if kind == "sensor_stuck":
            held = p["value"] if not math.isnan(p["value"]) else float(
                self.row[self._sent_col + i])
            f.op = FaultOp(ON_SENT, OP_SET, i, held)

            def fn(k: int, t: float, v: Vector) -> None:
                v[i] = held
        elif kind == "sensor_bias":
            b = p["bias"]
            f.op = FaultOp(ON_SENT, OP_ADD, i, b)

            def fn(k: int, t: float, v: Vector) -> None:
                v[i] += b
        elif kind == "sensor_drift":
            rate = p["rate"]
            f.op = FaultOp(ON_SENT, OP_DRIFT, i, rate, t0)

            def fn(k: int, t: float, v: Vector) -> None:
                v[i] += rate * (t - t0)
        elif kind == "sensor_gain":
            g = p["gain"]
            f.op = FaultOp(ON_SENT, OP_MUL, i, g)

            def fn(k: int, t: float, v: Vector) -> None:
                v[i] *= g
        elif kind == "sensor_noise":
            std, rng = p["std"], f.rng
            assert rng is not None

            def fn(k: int, t: float, v: Vector) -> None:
                v[i] += std * rng.standard_normal()
        elif kind == "sensor_dropout":
            open_value = p["value"]
            f.op = FaultOp(ON_SENT, OP_SET, i, open_value)

            def fn(k: int, t: float, v: Vector) -> None:
                v[i] = open_value
        else:  # sensor_spike
            a = p["amplitude"]
            f.op = FaultOp(ON_SENT, OP_ADD, i, a)

            def fn(k: int, t: float, v: Vector) -> None:
                v[i] += a
        return fn

    def sensor(self, k: int, t: float, sent: Vector) -> None:
        for f in self.active:
            if f.group == "sensor":
                f.apply(k, t, sent)  # type: ignore[misc]

    def _actuator_fn(self, f: _Active) -> Callable[[int, Vector], None]:
        i = self.inputs.index(f.spec.target)
        p, kind = f.spec.params, f.spec.kind
        if kind == "actuator_stuck":
            held = p["value"] if not math.isnan(p["value"]) else float(
                self.row[self._u_col][i])
            f.op = FaultOp(ON_INPUT, OP_SET, i, held)

            def fn(k: int, u: Vector) -> None:
                u[i] = held
        elif kind == "actuator_effectiveness":
            factor = p["factor"]
            f.op = FaultOp(ON_INPUT, OP_MUL, i, factor)

            def fn(k: int, u: Vector) -> None:
                u[i] *= factor
        elif kind == "actuator_saturation":
            lo, hi = p["low"], p["high"]
            f.op = FaultOp(ON_INPUT, OP_CLAMP, i, lo, hi)

            def fn(k: int, u: Vector) -> None:
                u[i] = min(max(u[i], lo), hi)
        else:  # actuator_delay: a ring of the last `ticks` inputs, primed with the present one
            d = int(p["ticks"])
            ring = np.full(d, float(self.row[self._u_col][i]))
            pos = [0]

            def fn(k: int, u: Vector) -> None:
                j = pos[0]
                ring[j], u[i] = u[i], ring[j]
                pos[0] = (j + 1) % d
        return fn

    def actuator(self, k: int, u: Vector) -> None:
        for f in self.active:
            if f.group == "actuator":
                f.apply(k, u)  # type: ignore[misc]

    # -- link faults ---------------------------------------------------------------------
    def _link_fn(self, f: _Active) -> Callable[[str, Vector, bool, int], tuple[bool, int]]:
        """fn(way, values, passes, stamp) -> (passes, stamp); ``way`` is "in" (commands)
        or "out" (values for the controller); passes is False for a lost frame."""
        kind, p, rng = f.spec.kind, f.spec.params, f.rng
        if kind in ("link_drop", "link_corrupt"):
            prob = p["probability"]
            counter = "frames_dropped" if kind == "link_drop" else "frames_corrupted"
            assert rng is not None

            def lose(way: str, v: Vector, ok: bool, stamp: int) -> tuple[bool, int]:
                if ok and (prob >= 1.0 or rng.random() < prob):
                    self.counts[counter] += 1
                    return False, stamp
                return ok, stamp
            return lose
        if kind == "link_freeze":
            frozen: dict[str, Vector] = {}

            def freeze(way: str, v: Vector, ok: bool, stamp: int) -> tuple[bool, int]:
                if ok:
                    v[:] = frozen.setdefault(way, v.copy())
                return ok, stamp
            return freeze
        d = int(p["ticks"])     # link_delay: per way, a ring of the last d (values, ok, stamp)
        rings: dict[str, tuple[Vector, list[bool], list[int], list[int]]] = {}

        def delay(way: str, v: Vector, ok: bool, stamp: int) -> tuple[bool, int]:
            if way not in rings:
                rings[way] = (np.zeros((d, v.size)), [False] * d, [0] * d, [0])
            values, oks, stamps, pos = rings[way]
            j = pos[0]
            old_ok, old_stamp = oks[j], stamps[j]
            held = values[j].copy()
            values[j], oks[j], stamps[j] = v, ok, stamp
            pos[0] = (j + 1) % d
            v[:] = held
            return old_ok, old_stamp
        return delay

    def incoming(self, k: int, t: float, cmd: Vector, fresh: bool) -> bool:
        """Link faults on the command from the controller; returns whether it is fresh."""
        ok = fresh
        for f in self.active:
            if f.group == "link" and f.direction != "to_controller":
                ok, _ = f.apply("in", cmd, ok, k)  # type: ignore[misc]
        if ok:
            self._last_cmd[:] = cmd
            self._last_fresh = k
            if self.lost:
                self.lost = False
                self.emit(k, "link_restored", "rehearsed link fault: a command got through "
                                              f"after {(k - self._silent_from) * self.tick:g} s",
                          REHEARSED)
                self._refresh(k)
        else:
            cmd[:] = self._last_cmd
            if not self.lost and k - self._last_fresh > self.watchdog_ticks:
                self.lost = True
                self._silent_from = self._last_fresh
                self.counts["rehearsed_losses"] += 1
                self.emit(k, "link_lost", f"rehearsed link fault: no command for "
                                          f"{(k - self._last_fresh) * self.tick:g} s "
                                          f"(watchdog timeout {self.watchdog_ticks} ticks)",
                          REHEARSED)
                self._refresh(k)
        return ok

    def outgoing(self, k: int, t: float, sent: Vector, link: Any) -> None:
        """Link faults on the values for the controller; sends them over ``link`` if any."""
        out = self._out
        out[:] = sent
        stamp, ok = k, True
        for f in self.active:
            if f.group == "link" and f.direction != "from_controller":
                ok, stamp = f.apply("out", out, ok, stamp)  # type: ignore[misc]
        if not ok:
            return
        if link is not None:
            link.send(stamp, stamp * self.tick, out)
        else:
            self.delivered[:] = out

    # -- plant faults and disturbances -----------------------------------------------------
    def _set_disturbance(self, j: int, value: float) -> None:
        self.row[self._d_cols[j]] = value
        self.stepper.set_disturbance(j, value)

    def plant(self, k: int) -> None:
        """Before the plant step: apply drifting parameters when their update is due."""
        if k >= self._next_drift:
            self._rebuild_plant(k)

    def _rebuild_plant(self, k: int) -> None:
        """The model as given with every active plant fault applied, in injection order."""
        t = k * self.tick
        faults = [f for f in self.active if f.group == "plant"]
        drifts = [f for f in faults if f.spec.kind == "plant_drift"]
        if drifts:
            every = min(max(1, round(f.spec.params["update"] / self.tick)) for f in drifts)
            self._next_drift = k + every
        else:
            self._next_drift = math.inf
        self._update_ops()
        changes: list[ParameterChange] = []
        for f in faults:
            where, _ = plant_target(self.rig, f.spec.target)
            assert where is not None        # checked when the fault was injected
            changes.append((where, self._change(f, t)))
        self.stepper.change_parameters(changes)

    def _change(self, f: _Active, t: float) -> Callable[[float], float]:
        return lambda base: self._changed(f, base, t)

    def _changed(self, f: _Active, base: float, t: float) -> float:
        p = f.spec.params
        if f.spec.kind == "plant_step":
            return p["value"] if not math.isnan(p["value"]) else base * p["factor"]
        return base * (1.0 + p["rate"] * (t - f.start * self.tick))

    def health(self) -> dict[str, float]:
        return {k: float(v) for k, v in self.counts.items()}
