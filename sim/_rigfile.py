"""Rig files (TOML): read, check every key, and build the models they describe.

All mistakes in a file are collected and reported together (RigFileError); unknown
keys are mistakes too, with a did-you-mean where a known key is close, and a key of an
earlier plantrig version names the key that replaced it. Sections that
belong to other parts (``link``, ``sensors``, ``actuators``) are kept as plain data here
and checked by the part that owns them, through the same issue list.
"""

from __future__ import annotations

import difflib
import importlib.util
import math
import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from plantrig.sim._controllers import WINDUP
from plantrig.sim._dut import DutSpec, parse_dut
from plantrig.sim._errors import RigFileError, RigIssue, describe_value, one_of
from plantrig.sim._faults import DisturbanceSpec, parse_disturbances
from plantrig.sim._interlocks import (
    ESTOP,
    InterlockSpec,
    SafetySettings,
    parse_interlocks,
    parse_safety,
)
from plantrig.sim._limits import LimitSpec, parse_limits
from plantrig.sim._outcome import AcceptanceRules, parse_acceptance
from plantrig.sim._plant import (
    ODE_METHODS,
    DiscretePlant,
    LinearPlant,
    ModelError,
    OdePlant,
    Plant,
    ticks_per_sample,
)
from plantrig.sim._references import TABLE_BETWEEN, Ramp, Reference, Sine, Step, Table

PLANT_KINDS = ("lti", "transfer_function", "discrete_lti", "ode", "fmu")
CONTROLLER_KINDS = ("pid", "state_feedback", "open_loop", "external")
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


@dataclass(frozen=True)
class ControllerSpec:
    kind: str
    settings: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Rig:
    """Everything a run needs, checked."""

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
    link: dict[str, Any] | None = None
    sensors: tuple[dict[str, Any], ...] = ()
    actuators: tuple[dict[str, Any], ...] = ()
    on_link_silence: str = "hold"
    limits: tuple[LimitSpec, ...] = ()
    interlocks: tuple[InterlockSpec, ...] = ()
    safety: SafetySettings = SafetySettings()
    disturbances: tuple[DisturbanceSpec, ...] = ()
    acceptance: AcceptanceRules = AcceptanceRules()
    dut: DutSpec = DutSpec()           # the device under test, as the rig file names it
    overrides: tuple[str, ...] = ()    # KEY=VALUE assignments applied (sim/_overrides.py)

    @property
    def n_ticks(self) -> int:
        return int(round(self.duration / self.tick))


_MISSING = object()


class _Checker:
    """Walks a parsed TOML document, recording every issue with its key path."""

    def __init__(self, file: str) -> None:
        self.file = file
        self.issues: list[RigIssue] = []

    def add(self, key: str, message: str) -> None:
        self.issues.append(RigIssue(self.file, key, message))

    def table(self, doc: dict[str, Any], key: str, path: str, required: bool) -> dict[str, Any]:
        value = doc.get(key, _MISSING)
        if value is _MISSING:
            if required:
                self.add(_join(path, key), "missing table")
            return {}
        if not isinstance(value, dict):
            self.add(_join(path, key), f"expected a table, found {describe_value(value)}")
            return {}
        return value

    def take(self, table: dict[str, Any], key: str, path: str, kind: str,
             default: Any = _MISSING, check: Callable[[Any], str | None] | None = None) -> Any:
        """Read ``table[key]`` as ``kind`` ('number', 'int', 'str', 'bool', 'matrix',
        'vector', 'list', 'table', 'any'); record an issue and return None when wrong."""
        full = _join(path, key)
        if key not in table:
            if default is _MISSING:
                self.add(full, f"missing (expected {_KIND_TEXT[kind]})")
                return None
            return default
        value = table[key]
        problem = _check_kind(kind, value)
        if problem is None and check is not None:
            problem = check(value)
        if problem:
            self.add(full, problem)
            return None
        return value

    def no_unknown(self, table: dict[str, Any], known: set[str], path: str,
                   renamed: dict[str, str] | None = None) -> None:
        """Every key not in ``known`` is a mistake; ``renamed`` maps keys of earlier
        versions to the text naming what replaced them."""
        for key in table:
            if key in known:
                continue
            if renamed and key in renamed:
                self.add(_join(path, key), f"old key name, no longer read; did you mean "
                                           f"{renamed[key]}?")
            else:
                close = difflib.get_close_matches(key, sorted(known), n=1, cutoff=0.6)
                hint = f"; did you mean '{close[0]}'?" if close else (
                    f"; known keys: {', '.join(sorted(known))}")
                self.add(_join(path, key), f"unknown key{hint}")


_KIND_TEXT = {
    "number": "a number", "int": "a whole number", "str": "a string", "bool": "true or false",
    "matrix": "a matrix (list of rows of numbers)", "vector": "a list of numbers",
    "list": "a list", "table": "a table", "any": "a value",
}


def _join(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _check_kind(kind: str, value: Any) -> str | None:
    expected = f"expected {_KIND_TEXT[kind]}, found {describe_value(value)}"
    if kind == "number":
        if not _is_number(value):
            return expected
        if not math.isfinite(value):
            return f"expected a finite number, found {value!r}"
    elif kind == "int":
        if not isinstance(value, int) or isinstance(value, bool):
            return expected
    elif kind == "str":
        if not isinstance(value, str):
            return expected
    elif kind == "bool":
        if not isinstance(value, bool):
            return expected
    elif kind == "vector":
        if not isinstance(value, list) or not all(_is_number(v) for v in value):
            return expected
    elif kind == "matrix":
        if isinstance(value, list) and all(_is_number(v) for v in value) and value:
            return None  # a single row is accepted as a 1-row (or 1-column) matrix
        if not isinstance(value, list) or not all(
                isinstance(r, list) and all(_is_number(v) for v in r) for r in value):
            return expected
        if len({len(r) for r in value}) > 1:
            return f"rows have different lengths {[len(r) for r in value]}"
    elif kind == "list":
        if not isinstance(value, list):
            return expected
    elif kind == "table":
        if not isinstance(value, dict):
            return expected
    return None


def _number_or_numbers(value: Any) -> str | None:
    if _is_number(value) or (isinstance(value, list) and all(_is_number(v) for v in value)):
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
    path = Path(path)
    file = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise RigFileError([RigIssue(file, "", f"cannot read: {exc.strerror or exc}")]) from None
    except UnicodeDecodeError as exc:
        raise RigFileError([RigIssue(file, "", f"not UTF-8 text: {exc.reason}")]) from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RigFileError([RigIssue(file, "", f"not valid TOML: {exc}")]) from None
    return build_rig(doc, path, text)


def build_rig(doc: dict[str, Any], path: Path, text: str = "") -> Rig:
    """Check a parsed rig document and build the Rig (used by load_rig and by tests)."""
    c = _Checker(str(path))
    c.no_unknown(doc, TOP_KEYS, "")

    rig_t = c.table(doc, "rig", "", required=True)
    c.no_unknown(rig_t, RIG_KEYS, "rig")
    name = c.take(rig_t, "name", "rig", "str", default=path.stem) or path.stem
    description = c.take(rig_t, "description", "rig", "str", default="") or ""
    tick = c.take(rig_t, "tick", "rig", "number", check=_positive)
    duration = c.take(rig_t, "duration", "rig", "number", check=_positive)
    mode = c.take(rig_t, "mode", "rig", "str", default="fast", check=one_of(MODES)) or "fast"
    seed = c.take(rig_t, "seed", "rig", "int", default=0)
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
    controller = _controller(c, doc, inputs, outputs, references, plant)

    link = None
    if "link" in doc:
        link = c.table(doc, "link", "", required=False) or None
    sensors = _list_of_tables(c, doc, "sensors")
    limits = parse_limits(c, doc, states, inputs, outputs)
    interlocks = parse_interlocks(c, doc, limits, inputs)
    safety = parse_safety(c, doc)
    acceptance = parse_acceptance(c, doc, [ESTOP, *(i.name for i in interlocks)])
    disturbances = parse_disturbances(c, doc, plant, states)
    actuators = _list_of_tables(c, doc, "actuators")
    dut = parse_dut(c, doc)
    if controller.kind == "external" and link is None:
        c.add("controller.kind", "'external' needs a [link] table to reach the controller")

    if c.issues:
        raise RigFileError(c.issues)
    assert plant is not None and tick is not None and duration is not None
    return Rig(path=path, text=text, name=name, description=description, tick=float(tick),
               duration=float(duration), mode=mode, seed=int(seed or 0), on_overrun=on_overrun,
               plant=plant, x0=x0, method=method, substeps=substeps, states=tuple(states),
               inputs=tuple(inputs), outputs=tuple(outputs), references=tuple(references),
               controller=controller, link=link, sensors=tuple(sensors),
               actuators=tuple(actuators), on_link_silence=on_silence, limits=tuple(limits),
               interlocks=tuple(interlocks), safety=safety, disturbances=tuple(disturbances),
               acceptance=acceptance, dut=dut)


def _list_of_tables(c: _Checker, doc: dict[str, Any], key: str) -> list[dict[str, Any]]:
    value = doc.get(key, [])
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        c.add(key, f"expected an array of tables ([[{key}]]), found {describe_value(value)}")
        return []
    return value


def _signals(c: _Checker, plant_t: dict[str, Any], group: str) -> list[Signal]:
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


def _plant(c: _Checker, t: dict[str, Any], path: Path, tick: float | None, n: int, m: int,
           p: int) -> tuple[Plant | None, str, int]:
    kind = c.take(t, "kind", "plant", "str", check=one_of(PLANT_KINDS))
    if kind is None:
        return None, "rk4", 1
    c.no_unknown(t, PLANT_COMMON | PLANT_KEYS[kind], "plant")
    plant: Plant | None = None
    method, substeps = "rk4", 1
    try:
        if kind == "lti":
            mats = [c.take(t, k, "plant", "matrix", default=None if k == "D" else _MISSING)
                    for k in ("A", "B", "C", "D")]
            if all(v is not None for v in mats[:3]):
                plant = LinearPlant.from_matrices(*mats)
        elif kind == "discrete_lti":
            mats = [c.take(t, k, "plant", "matrix", default=None if k == "D" else _MISSING)
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


def _transfer_function(c: _Checker, t: dict[str, Any]) -> LinearPlant | None:
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


def _roots(c: _Checker, key: str, values: list[Any] | None) -> list[complex] | None:
    """Real roots as numbers, complex ones as [re, im] pairs (TOML has no complex type)."""
    if values is None:
        return None
    out: list[complex] = []
    for i, v in enumerate(values):
        if _is_number(v):
            out.append(complex(v))
        elif isinstance(v, list) and len(v) == 2 and all(_is_number(x) for x in v):
            out.append(complex(v[0], v[1]))
        else:
            c.add(f"plant.{key}[{i}]", f"expected a number or a [re, im] pair, found "
                                       f"{describe_value(v)}")
            return None
    return out


def _fmu_plant(c: _Checker, t: dict[str, Any], path: Path) -> tuple[Any, str, int]:
    """kind = "fmu": an FMI 2.0 FMU through fmpy (sim/_fmu.py), its mistakes as rig issues."""
    from plantrig.sim._fmu import INTERFACES, FmuIssue, load_fmu
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
        if not _is_number(value):
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


def _ode_plant(c: _Checker, t: dict[str, Any], path: Path, n: int, m: int,
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
    except Exception as exc:  # the user's module may raise anything while importing
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
    if isinstance(x0, list) and len(x0) == n and all(_is_number(v) for v in x0):
        x_probe = np.array(x0, dtype=np.float64)
    for key, fn, size in (("dynamics", plant.dynamics, n), ("output", plant.output, p)):
        try:
            value = fn(0.0, x_probe, u_probe, plant.params)
        except Exception as exc:  # the user's function is untrusted here
            c.add(f"plant.{key}", f"calling it at x0 raised {type(exc).__name__}: {exc}")
            return None, method, substeps
        if value.shape != (size,):
            c.add(f"plant.{key}", f"expected a vector of {size} values, found shape "
                                  f"{value.shape}")
        elif not np.all(np.isfinite(value)):
            c.add(f"plant.{key}", f"returned {value.tolist()} at x0 = {x_probe.tolist()}, "
                                  "u = 0: expected finite numbers, found NaN or infinite")
    return plant, method, substeps


def _initial_state(c: _Checker, t: dict[str, Any], plant: Plant | None) -> np.ndarray:
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


def _references(c: _Checker, doc: dict[str, Any]) -> list[NamedReference]:
    out: list[NamedReference] = []
    for i, entry in enumerate(_list_of_tables(c, doc, "references")):
        where = f"references[{i}]"
        name = c.take(entry, "name", where, "str")
        unit = c.take(entry, "unit", where, "str", default="") or ""
        kind = c.take(entry, "kind", where, "str", check=one_of(REFERENCE_KINDS))
        if kind is None:
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
        if name is not None and waveform is not None:
            if any(r.name == name for r in out):
                c.add(f"{where}.name", f"duplicate reference name {name!r}")
            out.append(NamedReference(name, unit, waveform))
    return out


def _ramp(c: _Checker, where: str, ramp: Ramp) -> Ramp | None:
    """A ramp must move towards its ``to`` (a rate of the wrong sign never gets there)."""
    if math.isinf(ramp.to) or ramp.to == ramp.from_ or (ramp.to - ramp.from_) * ramp.rate > 0:
        return ramp
    c.add(f"{where}.rate", f"a rate of {ramp.rate:g} per s never takes the ramp from "
                           f"{ramp.from_:g} to {ramp.to:g}; give the rate the other sign, "
                           "or leave 'to' out")
    return None


def _sine(c: _Checker, where: str, sine: Sine) -> Sine | None:
    ok = True
    if sine.high < sine.low:
        c.add(f"{where}.high", f"expected high >= low ({sine.low:g}), found {sine.high:g}")
        ok = False
    if sine.hz < 0:
        c.add(f"{where}.hz", f"expected a frequency >= 0 Hz, found {sine.hz:g}")
        ok = False
    return sine if ok else None


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


def _controller(c: _Checker, doc: dict[str, Any], inputs: list[Signal], outputs: list[Signal],
                references: list[NamedReference], plant: Plant | None) -> ControllerSpec:
    t = c.table(doc, "controller", "", required=True)
    kind = c.take(t, "kind", "controller", "str", check=one_of(CONTROLLER_KINDS))
    if kind is None:
        return ControllerSpec("external")
    c.no_unknown(t, {"kind"} | CONTROLLER_KEYS[kind], "controller")
    in_names = [s.name for s in inputs]
    out_names = [s.name for s in outputs]
    ref_names = [r.name for r in references]

    def name_in(options: list[str], what: str) -> Callable[[Any], str | None]:
        def check(v: Any) -> str | None:
            if v in options:
                return None
            close = difflib.get_close_matches(v, options, n=1)
            hint = f"; did you mean '{close[0]}'?" if close else ""
            return f"expected one of the {what} ({', '.join(options) or 'none defined'}), " \
                   f"found {v!r}{hint}"
        return check

    settings: dict[str, Any] = {}
    if kind == "pid":
        loops = c.take(t, "loops", "controller", "list")
        settings["loops"] = []
        for i, loop in enumerate(loops or []):
            where = f"controller.loops[{i}]"
            if not isinstance(loop, dict):
                c.add(where, "expected a table ([[controller.loops]]), found "
                             f"{describe_value(loop)}")
                continue
            c.no_unknown(loop, PID_KEYS, where, renamed=RENAMED_PID_KEYS)
            ls: dict[str, Any] = {
                "measure": c.take(loop, "measure", where, "str",
                                  check=name_in(out_names, "plant outputs")),
                "drive": c.take(loop, "drive", where, "str",
                                check=name_in(in_names, "plant inputs")),
                "reference": c.take(loop, "reference", where, "str",
                                    check=name_in(ref_names, "references")),
            }
            for key, default in (("kp", _MISSING), ("ki", 0.0), ("kd", 0.0),
                                 ("derivative_lag", 0.0), ("unwind_time", None),
                                 ("drive_low", None), ("drive_high", None)):
                ls[key] = c.take(loop, key, where, "number", default=default)
            ls["windup"] = c.take(loop, "windup", where, "str", default="unwind",
                                  check=_windup)
            settings["loops"].append(ls)
        drives = [ls["drive"] for ls in settings["loops"] if ls["drive"]]
        for d in {d for d in drives if drives.count(d) > 1}:
            c.add("controller.loops", f"input {d!r} is driven by more than one loop")
    elif kind == "state_feedback":
        K = c.take(t, "K", "controller", "matrix")
        N = c.take(t, "N", "controller", "matrix")
        refs = c.take(t, "references", "controller", "list")
        if refs is not None:
            for j, r in enumerate(refs):
                problem = name_in(ref_names, "references")(r) if isinstance(r, str) else \
                    f"expected a reference name, found {describe_value(r)}"
                if problem:
                    c.add(f"controller.references[{j}]", problem)
        m, p = len(inputs), len(outputs)
        if K is not None:
            k = np.atleast_2d(np.array(K, dtype=np.float64))
            if k.shape != (m, p):
                c.add("controller.K", f"has shape {k.shape}, expected ({m}, {p}) "
                                      f"(inputs x outputs)")
            settings["K"] = k
        if N is not None and refs is not None:
            nn = np.array(N, dtype=np.float64).reshape(m, -1) if np.size(N) == m * len(refs) \
                else np.atleast_2d(np.array(N, dtype=np.float64))
            if nn.shape != (m, len(refs)):
                c.add("controller.N", f"has shape {nn.shape}, expected ({m}, {len(refs)}) "
                                      f"(inputs x references)")
            settings["N"] = nn
        settings["references"] = refs
    elif kind == "open_loop":
        drive = c.take(t, "drive", "controller", "table")
        if drive is not None:
            for inp, ref in drive.items():
                if inp not in in_names:
                    c.add(f"controller.drive.{inp}",
                          name_in(in_names, "plant inputs")(inp) or "unknown input")
                elif not isinstance(ref, str) or ref not in ref_names:
                    c.add(f"controller.drive.{inp}",
                          (name_in(ref_names, "references")(ref) or "unknown reference")
                          if isinstance(ref, str) else f"expected a reference name, "
                                                       f"found {describe_value(ref)}")
            settings["drive"] = drive
    return ControllerSpec(kind, settings)


def _windup(value: str) -> str | None:
    """One of WINDUP; a value of an earlier version names its replacement."""
    if value in RENAMED_WINDUP:
        return (f"expected one of {', '.join(WINDUP)}, found {value!r} (an old value); "
                f"did you mean '{RENAMED_WINDUP[value]}'?")
    return one_of(WINDUP)(value)


def check_controller_table(rig: Rig, table: Any, path: str) -> tuple[ControllerSpec | None,
                                                                    list[RigIssue]]:
    """Check a built-in law given outside [controller] (the reference controller's law in
    ``[link.controller]``, say) against ``rig``'s signals, with key paths under ``path``."""
    c = _Checker(str(rig.path))
    spec = _controller(c, {"controller": table}, list(rig.inputs), list(rig.outputs),
                       list(rig.references), rig.plant)
    issues = [RigIssue(i.file, path + i.key[len("controller"):], i.message) for i in c.issues]
    if not issues and spec.kind == "external":
        issues.append(RigIssue(str(rig.path), f"{path}.kind", "expected a built-in law "
                               "(pid, state_feedback, open_loop), found 'external'"))
    return (None if issues else spec), issues
