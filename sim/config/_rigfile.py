"""Rig files (TOML): read, check every key, and build the models they describe.

All mistakes in a file are collected and reported together (RigFileError); unknown
keys are mistakes too, with a did-you-mean where a known key is close, and a key of an
earlier plantrig version names the key that replaced it. Sections that
belong to other parts (``link``, ``sensors``, ``actuators``) are kept as plain data here
and checked by the part that owns them, through the same issue list.
"""

from __future__ import annotations

import dataclasses
import importlib.util
import math
from dataclasses import dataclass, fields, is_dataclass
from pathlib import Path
from typing import Any

import numpy as np

from plantrig.sim.config._chain_settings import ActuatorChannel, SensorChannel, rig_chain
from plantrig.sim.config._checker import (
    MISSING,
    Checker,
    RigFileError,
    describe_value,
    is_number,
    one_of,
    whole_number,
)
from plantrig.sim.config._controller_settings import ControllerSpec, check_controller
from plantrig.sim.config._dut import DutSpec, parse_dut
from plantrig.sim.config._link_settings import LinkContext, LinkSettings, check_link
from plantrig.sim.config._rig_document import RigDocument, read_rig_document
from plantrig.sim.engine._outcome import AcceptanceRules, parse_acceptance
from plantrig.sim.faults._faults import DisturbanceSpec, parse_disturbances
from plantrig.sim.model._plant import (
    ODE_METHODS,
    DiscretePlant,
    LinearPlant,
    ModelError,
    OdePlant,
    Plant,
    ticks_per_sample,
)
from plantrig.sim.model._references import TABLE_BETWEEN, Ramp, Reference, Sine, Step, Table
from plantrig.sim.safety._interlocks import (
    ESTOP,
    InterlockSpec,
    SafetySettings,
    parse_interlocks,
    parse_safety,
)
from plantrig.sim.safety._limits import LimitSpec, parse_limits

PLANT_KINDS = ("lti", "transfer_function", "discrete_lti", "ode", "fmu")
REFERENCE_KINDS = ("step", "ramp", "sine", "table", "constant")
OVERRUN_POLICIES = ("skip", "catch_up", "stop")
MODES = ("fast", "realtime")


@dataclass(frozen=True)
class Signal:
    """A named signal with its unit and expected range."""

    name: str
    unit: str = ""
    min: float = -math.inf
    max: float = math.inf
    description: str = ""
    safe: float = 0.0


@dataclass(frozen=True)
class NamedReference:
    name: str
    unit: str
    waveform: Reference


PROVENANCE = ("path", "text", "parts", "overrides")   # where a rig came from, not what it is


@dataclass(frozen=True, eq=False)
class Rig:
    """Everything a run needs, checked.

    Two rigs are equal when every setting is (matrices compared by value); where the rig
    came from (PROVENANCE: file, text, parts, ``--set`` assignments) does not count.
    """

    path: Path
    text: str
    name: str
    description: str
    tick: float
    duration: float
    mode: str
    seed: int
    on_overrun: str
    plant: Plant
    x0: np.ndarray
    method: str
    substeps: int
    states: tuple[Signal, ...]
    inputs: tuple[Signal, ...]
    outputs: tuple[Signal, ...]
    references: tuple[NamedReference, ...]
    controller: ControllerSpec
    link: LinkSettings | None = None
    sensors: tuple[SensorChannel, ...] = ()       # in output order; () for no chain
    actuators: tuple[ActuatorChannel, ...] = ()   # in input order; () for no chain
    on_link_silence: str = "hold"
    limits: tuple[LimitSpec, ...] = ()
    interlocks: tuple[InterlockSpec, ...] = ()
    safety: SafetySettings = SafetySettings()
    disturbances: tuple[DisturbanceSpec, ...] = ()
    acceptance: AcceptanceRules = AcceptanceRules()
    dut: DutSpec = DutSpec()           # the device under test, as the rig file names it
    overrides: tuple[str, ...] = ()    # KEY=VALUE assignments applied (sim/config/_overrides.py)
    parts: tuple[Path, ...] = ()       # part files the rig file took sections from

    @property
    def n_ticks(self) -> int:
        return int(round(self.duration / self.tick))

    def loop_pairs(self) -> dict[str, str]:
        """Output name -> the reference its loop follows, for plots: the built-in
        controller's loops, or for a controller on a link the law its rig file gives the
        reference controller ([link.controller])."""
        law = self.link.controller if self.controller.kind == "external" and \
            self.link is not None and self.link.controller is not None else self.controller
        return law.loop_pairs()

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Rig):
            return NotImplemented
        return all(same_value(getattr(self, f.name), getattr(other, f.name))
                   for f in fields(self) if f.name not in PROVENANCE)

    __hash__ = None   # type: ignore[assignment]  # equal by value, and mutable inside


def same_value(a: Any, b: Any) -> bool:
    """Equality by value through dataclasses, containers, numpy arrays and functions (a
    model function is the same when its name and code are)."""
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        return bool(np.shape(a) == np.shape(b) and np.array_equal(a, b))
    if type(a) is not type(b):
        return False
    if is_dataclass(a) and not isinstance(a, type):
        return all(same_value(getattr(a, f.name), getattr(b, f.name)) for f in fields(a))
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(same_value(a[k], b[k]) for k in a)
    if isinstance(a, list | tuple):
        return len(a) == len(b) and all(same_value(x, y) for x, y in zip(a, b, strict=True))
    if callable(a) and hasattr(a, "__code__"):
        return bool(a.__qualname__ == b.__qualname__ and a.__code__.co_code == b.__code__.co_code)
    if hasattr(a, "__dict__") and not callable(a):
        return same_value(vars(a), vars(b))
    return bool(a == b)


def _number_or_numbers(value: Any) -> str | None:
    if is_number(value) or (isinstance(value, list) and all(is_number(v) for v in value)):
        return None
    return f"expected a number or a list of numbers (seconds), found {describe_value(value)}"


def _positive(value: Any) -> str | None:
    return None if value > 0 else f"expected a positive number, found {value!r}"


RIG_KEYS = {"name", "description", "tick", "duration", "mode", "seed", "on_overrun",
            "on_link_silence"}
TOP_KEYS = {"rig", "plant", "controller", "references", "link", "sensors", "actuators",
            "limits", "interlocks", "safety", "disturbances", "acceptance", "dut"}
SIGNAL_KEYS = {"name", "unit", "min", "max", "description", "safe"}


def load_rig(path: str | Path) -> Rig:
    """Read and check a rig file; raise RigFileError listing every mistake."""
    return build_rig_document(read_rig_document(path), Path(path))


def build_rig_document(document: RigDocument, path: Path) -> Rig:
    """build_rig for a document read by read_rig_document: mistakes in what a part gave
    name the part, and the Rig records the parts."""
    try:
        rig = build_rig(document.doc, path, document.text)
    except RigFileError as exc:
        raise RigFileError(document.blame(exc.issues)) from None
    return dataclasses.replace(rig, parts=document.parts) if document.parts else rig


def build_rig(doc: dict[str, Any], path: Path, text: str = "") -> Rig:
    """Check a parsed rig document and build the Rig (used by load_rig and by tests)."""
    c = Checker(str(path))
    c.no_unknown(doc, TOP_KEYS, "")

    rig_t = c.table(doc, "rig", "", required=True)
    c.no_unknown(rig_t, RIG_KEYS, "rig")
    name = c.take(rig_t, "name", "rig", "str", default=path.stem) or path.stem
    description = c.take(rig_t, "description", "rig", "str", default="") or ""
    tick = c.take(rig_t, "tick", "rig", "number", check=_positive)
    duration = c.take(rig_t, "duration", "rig", "number", check=_positive)
    mode = c.take(rig_t, "mode", "rig", "str", default="fast", check=one_of(MODES)) or "fast"
    seed = c.take(rig_t, "seed", "rig", "int", default=0,   # numpy takes no negative
                  check=whole_number(0, 2**63 - 1, "a seed"))
    on_overrun = c.take(rig_t, "on_overrun", "rig", "str", default="skip",
                        check=one_of(OVERRUN_POLICIES)) or "skip"
    on_silence = c.take(rig_t, "on_link_silence", "rig", "str", default="hold",
                        check=one_of(("hold", "safe_value"))) or "hold"
    if tick and duration and duration < tick:
        c.add("rig.duration", f"expected at least one tick ({tick} s), found {duration}")

    plant_t = c.table(doc, "plant", "", required=True)
    # a transfer function's states have no physical meaning: they may go unnamed
    unnamed = plant_t.get("kind") == "transfer_function" and "states" not in plant_t
    states = [] if unnamed else _signals(c, plant_t, "states")
    inputs = _signals(c, plant_t, "inputs")
    outputs = _signals(c, plant_t, "outputs")
    plant, method, substeps = _plant(c, plant_t, path, tick, len(states), len(inputs),
                                     len(outputs))
    if unnamed and plant is not None:
        states = [Signal(f"internal_{i + 1}", description="state of the transfer function's "
                         "minimal realisation") for i in range(plant.shape[0])]
    x0 = _initial_state(c, plant_t, plant)

    references = _references(c, doc)
    controller = check_controller(c, c.table(doc, "controller", "", required=True),
                                  "controller", inputs, outputs, references)

    link = _link(c, doc, path, name, mode, tick, controller, inputs, outputs, references,
                 plant)
    sensors = rig_chain(c, "sensors", c.tables(doc, "sensors"), outputs)
    limits = parse_limits(c, doc, states, inputs, outputs)
    interlocks = parse_interlocks(c, doc, limits, inputs)
    safety = parse_safety(c, doc)
    acceptance = parse_acceptance(c, doc, [ESTOP, *(i.name for i in interlocks)])
    disturbances = parse_disturbances(c, doc, plant, states)
    actuators = rig_chain(c, "actuators", c.tables(doc, "actuators"), inputs)
    dut = parse_dut(c, doc)
    if controller.kind == "external" and "link" not in doc:
        c.add("controller.kind", "'external' needs a [link] table to reach the controller")

    c.raise_if_any()
    assert plant is not None and tick is not None and duration is not None
    return Rig(path=path, text=text, name=name, description=description, tick=float(tick),
               duration=float(duration), mode=mode, seed=int(seed or 0), on_overrun=on_overrun,
               plant=plant, x0=x0, method=method, substeps=substeps, states=tuple(states),
               inputs=tuple(inputs), outputs=tuple(outputs), references=tuple(references),
               controller=controller, link=link, sensors=tuple(sensors),
               actuators=tuple(actuators), on_link_silence=on_silence, limits=tuple(limits),
               interlocks=tuple(interlocks), safety=safety, disturbances=tuple(disturbances),
               acceptance=acceptance, dut=dut)


def _link(c: Checker, doc: dict[str, Any], path: Path, name: str, mode: str,
          tick: float | None, controller: ControllerSpec, inputs: list[Signal],
          outputs: list[Signal], references: list[NamedReference],
          plant: Plant | None) -> LinkSettings | None:
    """The checked [link] settings (None when the rig has none, or after mistakes)."""
    if "link" not in doc:
        return None
    table = c.table(doc, "link", "")
    if not table:
        return None

    def check_law(law: Any, where: str) -> ControllerSpec | None:
        return _law(c, law, where, inputs, outputs, references, plant)

    context = LinkContext(path, name, mode, tick or 0.0, controller.kind, tuple(inputs),
                          tuple(outputs), check_law)
    return check_link(c, table, context)


def _signals(c: Checker, plant_t: dict[str, Any], group: str) -> list[Signal]:
    path = f"plant.{group}"
    entries = c.take(plant_t, group, "plant", "list")
    if entries is None:
        return []
    out: list[Signal] = []
    seen: set[str] = set()
    for i, entry in enumerate(entries):
        where = f"{path}[{i}]"
        if not isinstance(entry, dict):
            c.add(where, f"expected a table like {{ name = \"...\", unit = \"...\" }}, "
                         f"found {describe_value(entry)}")
            continue
        c.no_unknown(entry, SIGNAL_KEYS, where)
        name = c.take(entry, "name", where, "str")
        unit = c.take(entry, "unit", where, "str", default="") or ""
        lo = c.take(entry, "min", where, "number", default=-math.inf)
        hi = c.take(entry, "max", where, "number", default=math.inf)
        desc = c.take(entry, "description", where, "str", default="") or ""
        safe = c.take(entry, "safe", where, "number", default=0.0)
        if lo is not None and hi is not None and lo >= hi:
            c.add(f"{where}.max", f"expected max > min ({lo}), found {hi}")
        if name is None:
            continue
        if not name.isidentifier():
            c.add(f"{where}.name", f"expected a plain identifier (letters, digits, _), "
                                   f"found {name!r}")
        if name in seen:
            c.add(f"{where}.name", f"duplicate signal name {name!r} in {path}")
        seen.add(name)
        out.append(Signal(name, unit, lo if lo is not None else -math.inf,
                          hi if hi is not None else math.inf, desc,
                          safe if safe is not None else 0.0))
    return out


PLANT_KEYS = {
    "lti": {"A", "B", "C", "D", "input_delay", "output_delay"},
    "transfer_function": {"num", "den", "zeros", "poles", "gain", "input_delay",
                          "output_delay"},
    "discrete_lti": {"A", "B", "C", "D", "dt"},
    "ode": {"module", "dynamics", "output", "jacobian", "params", "method", "substeps"},
    "fmu": {"file", "interface", "variables", "params", "method", "substeps"},
}
PLANT_COMMON = {"kind", "states", "inputs", "outputs", "x0"}


def _plant(c: Checker, t: dict[str, Any], path: Path, tick: float | None, n: int, m: int,
           p: int) -> tuple[Plant | None, str, int]:
    kind = c.take(t, "kind", "plant", "str", check=one_of(PLANT_KINDS))
    if kind is None:
        return None, "rk4", 1
    c.no_unknown(t, PLANT_COMMON | PLANT_KEYS[kind], "plant")
    plant: Plant | None = None
    method, substeps = "rk4", 1
    try:
        if kind == "lti":
            mats = [c.take(t, k, "plant", "matrix", default=None if k == "D" else MISSING)
                    for k in ("A", "B", "C", "D")]
            if all(v is not None for v in mats[:3]):
                plant = LinearPlant.from_matrices(*mats)
        elif kind == "discrete_lti":
            mats = [c.take(t, k, "plant", "matrix", default=None if k == "D" else MISSING)
                    for k in ("A", "B", "C", "D")]
            dt = c.take(t, "dt", "plant", "number", check=_positive)
            if all(v is not None for v in mats[:3]) and dt is not None:
                plant = DiscretePlant.from_matrices(mats[0], mats[1], mats[2], mats[3], dt)
                if tick is not None and ticks_per_sample(dt, tick) is None:
                    c.add("plant.dt", f"expected the rig tick ({tick} s) or a whole multiple "
                                      f"of it, found {dt} s ({dt / tick:.4g} ticks); resample "
                                      "the model or change rig.tick")
        elif kind == "transfer_function":
            plant = _transfer_function(c, t)
        elif kind == "fmu":
            plant, method, substeps = _fmu_plant(c, t, path)
        else:
            plant, method, substeps = _ode_plant(c, t, path, n, m, p)
        if isinstance(plant, LinearPlant) and ("input_delay" in t or "output_delay" in t):
            delays = [c.take(t, key, "plant", "any", default=0.0,
                             check=_number_or_numbers) for key in ("input_delay",
                                                                   "output_delay")]
            if delays[0] is not None and delays[1] is not None:
                plant = plant.with_dead_time(*delays)
    except ModelError as exc:
        c.add(f"plant.{exc.key}", exc.reason)
        return None, method, substeps
    if plant is not None and not isinstance(plant, OdePlant):
        shape = plant.shape
        for group, count, actual in (("states", n, shape[0]), ("inputs", m, shape[1]),
                                     ("outputs", p, shape[2])):
            if count != actual and "states" in t:
                c.add(f"plant.{group}", f"expected {actual} entries to match the model, "
                                        f"found {count}")
    return plant, method, substeps


def _transfer_function(c: Checker, t: dict[str, Any]) -> LinearPlant | None:
    """num/den (lists, or p x m matrices of lists for MIMO), or zeros/poles/gain (SISO)."""
    if not any(k in t for k in ("zeros", "poles", "gain")):
        num = c.take(t, "num", "plant", "list")
        den = c.take(t, "den", "plant", "list")
        return None if num is None or den is None else \
            LinearPlant.from_transfer_function(num, den)
    for key in ("num", "den"):
        if key in t:
            c.add(f"plant.{key}", "expected either num and den or zeros, poles and gain, "
                                  "found both forms")
    zeros = c.take(t, "zeros", "plant", "list", default=[])
    poles = c.take(t, "poles", "plant", "list")
    gain = c.take(t, "gain", "plant", "number")
    roots = [_roots(c, "zeros", zeros), _roots(c, "poles", poles)]
    if roots[0] is None or roots[1] is None or gain is None or \
            any(k in t for k in ("num", "den")):
        return None
    return LinearPlant.from_zpk(roots[0], roots[1], gain)


def _roots(c: Checker, key: str, values: list[Any] | None) -> list[complex] | None:
    """Real roots as numbers, complex ones as [re, im] pairs (TOML has no complex type)."""
    if values is None:
        return None
    out: list[complex] = []
    for i, v in enumerate(values):
        if is_number(v):
            out.append(complex(v))
        elif isinstance(v, list) and len(v) == 2 and all(is_number(x) for x in v):
            out.append(complex(v[0], v[1]))
        else:
            c.add(f"plant.{key}[{i}]", f"expected a number or a [re, im] pair, found "
                                       f"{describe_value(v)}")
            return None
    return out


def _fmu_plant(c: Checker, t: dict[str, Any], path: Path) -> tuple[Any, str, int]:
    """kind = "fmu": an FMI 2.0 FMU through fmpy (sim/model/_fmu.py), its mistakes as rig issues."""
    from plantrig.sim.model._fmu import INTERFACES, FmuIssue, load_fmu
    file = c.take(t, "file", "plant", "str")
    interface = c.take(t, "interface", "plant", "str", default="model_exchange",
                       check=one_of(INTERFACES))
    variables = c.take(t, "variables", "plant", "table", default={})
    params = c.take(t, "params", "plant", "table", default={})
    method = c.take(t, "method", "plant", "str", default="rk4",
                    check=one_of(ODE_METHODS)) or "rk4"
    substeps = c.take(t, "substeps", "plant", "int", default=1,
                      check=lambda v: None if v >= 1 else f"expected >= 1, found {v}") or 1
    for key, value in (variables or {}).items():
        if not isinstance(value, str):
            c.add(f"plant.variables.{key}", f"expected an FMU variable name, found "
                                            f"{describe_value(value)}")
    for key, value in (params or {}).items():
        if not is_number(value):
            c.add(f"plant.params.{key}", f"expected a number, found {describe_value(value)}")
    if file is None or interface is None or variables is None or params is None or c.issues:
        return None, method, substeps
    names = {g: [e.get("name") for e in t.get(g, []) if isinstance(e, dict)]
             for g in ("states", "inputs", "outputs")}
    x0 = t.get("x0", [])
    try:
        plant = load_fmu((path.parent / file).resolve(), interface,
                         [str(n) for n in names["states"]], [str(n) for n in names["inputs"]],
                         [str(n) for n in names["outputs"]], variables, params,
                         np.array(x0 if isinstance(x0, list) else [], dtype=np.float64))
    except FmuIssue as exc:
        c.add(f"plant.{exc.key}", exc.reason)
        return None, method, substeps
    return plant, method, substeps


def _ode_plant(c: Checker, t: dict[str, Any], path: Path, n: int, m: int,
               p: int) -> tuple[OdePlant | None, str, int]:
    module_name = c.take(t, "module", "plant", "str")
    f_name = c.take(t, "dynamics", "plant", "str")
    h_name = c.take(t, "output", "plant", "str")
    params = c.take(t, "params", "plant", "table", default={})
    method = c.take(t, "method", "plant", "str", default="rk4",
                    check=one_of(ODE_METHODS)) or "rk4"
    substeps = c.take(t, "substeps", "plant", "int", default=1,
                      check=lambda v: None if v >= 1 else f"expected >= 1, found {v}") or 1
    if module_name is None or f_name is None or h_name is None:
        return None, method, substeps
    module_path = (path.parent / module_name).resolve()
    if not module_path.is_file():
        c.add("plant.module", f"expected a Python file relative to the rig file, "
                              f"found no file at {module_path}")
        return None, method, substeps
    try:
        spec = importlib.util.spec_from_file_location(f"plantrig_model_{module_path.stem}",
                                                      module_path)
        assert spec is not None and spec.loader is not None
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
    except (Exception, SystemExit) as exc:  # the user's module may even call exit()
        c.add("plant.module", f"importing {module_path.name} failed: "
                              f"{type(exc).__name__}: {exc}")
        return None, method, substeps
    functions = []
    jac_name = c.take(t, "jacobian", "plant", "str", default=None)
    named = [("dynamics", f_name), ("output", h_name)] + \
        ([("jacobian", jac_name)] if jac_name else [])
    for key, fname in named:
        fn = getattr(module, fname, None)
        if not callable(fn):
            c.add(f"plant.{key}", f"expected a function named {fname!r} in "
                                  f"{module_path.name}, found none")
        functions.append(fn)
    if not all(callable(fn) for fn in functions):
        return None, method, substeps
    f, h = functions[0], functions[1]
    assert f is not None and h is not None   # callable, checked above
    plant = OdePlant(f, h, n, m, p, dict(params or {}),
                     functions[2] if jac_name else None)
    x_probe, u_probe = np.zeros(n), np.zeros(m)
    x0 = t.get("x0")
    if isinstance(x0, list) and len(x0) == n and all(is_number(v) for v in x0):
        x_probe = np.array(x0, dtype=np.float64)
    for key, fn, size in (("dynamics", plant.dynamics, n), ("output", plant.output, p)):
        try:
            value = fn(0.0, x_probe, u_probe, plant.params)
        except (Exception, SystemExit) as exc:  # the user's function is untrusted
            c.add(f"plant.{key}", f"calling it at x0 raised {type(exc).__name__}: {exc}")
            return None, method, substeps
        if value.shape != (size,):
            c.add(f"plant.{key}", f"expected a vector of {size} values, found shape "
                                  f"{value.shape}")
        elif not np.all(np.isfinite(value)):
            c.add(f"plant.{key}", f"returned {value.tolist()} at x0 = {x_probe.tolist()}, "
                                  "u = 0: expected finite numbers, found NaN or infinite")
    return plant, method, substeps


def _initial_state(c: Checker, t: dict[str, Any], plant: Plant | None) -> np.ndarray:
    n = plant.shape[0] if plant is not None else 0
    x0 = c.take(t, "x0", "plant", "vector", default=None)
    if x0 is None:
        return np.zeros(n)
    if plant is not None and len(x0) != n:
        c.add("plant.x0", f"expected {n} values (one per state), found {len(x0)}")
        return np.zeros(n)
    return np.array(x0, dtype=np.float64)


REFERENCE_KEYS = {
    "step": {"at", "from", "to"},
    "ramp": {"at", "from", "rate", "to"},
    "sine": {"low", "high", "hz", "phase_deg"},
    "table": {"points", "between"},
    "constant": {"value"},
}
_SINE_BOUNDS = "'low' and 'high' (low = offset - amplitude, high = offset + amplitude)"
RENAMED_REFERENCE_KEYS = {     # keys of earlier versions -> the key(s) to write now
    "step": {"time": "'at'", "initial": "'from'", "final": "'to'"},
    "ramp": {"start": "'at'", "initial": "'from'", "slope": "'rate'", "limit": "'to'"},
    "sine": {"amplitude": _SINE_BOUNDS, "offset": _SINE_BOUNDS, "frequency": "'hz'",
             "phase": "'phase_deg'"},
    "table": {"interpolation": "'between'"},
    "constant": {},
}
_FIELDS = {"from": "from_"}    # rig-file key -> waveform field ('from' is a Python keyword)


def _references(c: Checker, doc: dict[str, Any]) -> list[NamedReference]:
    out: list[NamedReference] = []
    for i, entry in enumerate(c.tables(doc, "references")):
        where = f"references[{i}]"
        name = c.take(entry, "name", where, "str")
        unit = c.take(entry, "unit", where, "str", default="") or ""
        kind = c.take(entry, "kind", where, "str", check=one_of(REFERENCE_KINDS))
        if kind is None:
            _keep_name(c, where, name, unit, out)
            continue
        c.no_unknown(entry, {"name", "unit", "kind"} | REFERENCE_KEYS[kind], where,
                     renamed=RENAMED_REFERENCE_KEYS[kind])
        values: dict[str, float] = {}
        for key in sorted(REFERENCE_KEYS[kind] - {"points", "between"}):
            v = c.take(entry, key, where, "number", default=None)
            if v is not None:
                values[_FIELDS.get(key, key)] = float(v)
        waveform: Reference | None
        if kind == "step":
            waveform = Step(**values)
        elif kind == "ramp":
            waveform = _ramp(c, where, Ramp(**values))
        elif kind == "sine":
            waveform = _sine(c, where, Sine(**values))
        elif kind == "constant":
            value = values.get("value", 0.0)
            waveform = Step(at=0.0, from_=value, to=value)
        else:
            points = c.take(entry, "points", where, "matrix")
            between = c.take(entry, "between", where, "str", default="linear",
                             check=one_of(TABLE_BETWEEN))
            waveform = None
            if points is not None and between is not None:
                if not all(isinstance(p, list) and len(p) == 2 for p in points):
                    c.add(f"{where}.points", "expected [[time, value], ...] pairs")
                else:
                    try:
                        waveform = Table([(p[0], p[1]) for p in points], between)
                    except ValueError as exc:
                        c.add(f"{where}.points", str(exc).split(": ", 1)[-1])
        _keep_name(c, where, name, unit, out, waveform)
    return out


def _keep_name(c: Checker, where: str, name: str | None, unit: str,
               out: list[NamedReference], waveform: Reference | None = None) -> None:
    """Add the reference to ``out``. One whose waveform is wrong (a mistake already
    recorded: nothing will run) keeps its name with a stand-in waveform, so that a loop
    using it is not reported as a second mistake."""
    if name is None:
        return
    if any(r.name == name for r in out):
        c.add(f"{where}.name", f"duplicate reference name {name!r}")
    out.append(NamedReference(name, unit, waveform if waveform is not None else Step()))


def _ramp(c: Checker, where: str, ramp: Ramp) -> Ramp | None:
    """A ramp must move towards its ``to`` (a rate of the wrong sign never gets there)."""
    if math.isinf(ramp.to) or ramp.to == ramp.from_ or (ramp.to - ramp.from_) * ramp.rate > 0:
        return ramp
    c.add(f"{where}.rate", f"a rate of {ramp.rate:g} per s never takes the ramp from "
                           f"{ramp.from_:g} to {ramp.to:g}; give the rate the other sign, "
                           "or leave 'to' out")
    return None


def _sine(c: Checker, where: str, sine: Sine) -> Sine | None:
    ok = True
    if sine.high < sine.low:
        c.add(f"{where}.high", f"expected high >= low ({sine.low:g}), found {sine.high:g}")
        ok = False
    if sine.hz < 0:
        c.add(f"{where}.hz", f"expected a frequency >= 0 Hz, found {sine.hz:g}")
        ok = False
    return sine if ok else None


def _law(c: Checker, table: Any, path: str, inputs: list[Signal], outputs: list[Signal],
         references: list[NamedReference], plant: Plant | None) -> ControllerSpec | None:
    """A built-in law given outside [controller] (the reference controller's law in
    ``[link.controller]``), checked against the rig's signals with key paths under
    ``path``; None after recording its mistakes."""
    if not isinstance(table, dict):
        c.add(path, f"expected a table, found {describe_value(table)}")
        return None
    before = len(c.issues)
    spec = check_controller(c, table, path, inputs, outputs, references)
    if spec.kind == "external" and len(c.issues) == before:
        c.add(f"{path}.kind", "expected a built-in law (pid, state_feedback, open_loop), "
                              "found 'external'")
    return spec if len(c.issues) == before else None
