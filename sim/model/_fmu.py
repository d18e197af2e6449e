"""FMU plants (FMI 2.0) through fmpy: model exchange and co-simulation.

A model exchange FMU gives derivatives; it becomes an ODE plant whose f and h call the
FMU, so plantrig's own fixed-step integrator (RK4 or Euler with substeps) steps it like
any ODE and the model summary linearises it. A co-simulation FMU brings its own solver:
each tick sets the inputs, reads the outputs and calls doStep over the tick. Rig signals
map to FMU variables by name (the signal's name, or ``[plant.variables]``); parameters
are set from ``[plant.params]`` before initialisation. An FMU's binary is code: it is
loaded only by load_rig (check and run print its path and SHA-256 first), never when a
run folder is read as data.
"""

from __future__ import annotations

import ctypes
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.config._checker import did_you_mean
from plantrig.sim.model._plant import LinearForm, ModelError, OdePlant, ParameterChange

Vector = NDArray[np.float64]
INTERFACES = ("model_exchange", "co_simulation")


class FmuIssue(ModelError):
    """A rig-file mistake about the FMU; ``key`` is the rig-file key path under plant."""


@dataclass(frozen=True)
class FmuOdePlant(OdePlant):
    """A model exchange FMU as an ODE plant (f and h call the FMU)."""

    fmu_file: Path = Path()


@dataclass(frozen=True)
class FmuSlavePlant:
    """A co-simulation FMU: stepped by its own doStep over each tick."""

    fmu_file: Path
    instance: Any
    input_refs: tuple[int, ...]
    output_refs: tuple[int, ...]
    state_refs: tuple[int, ...]
    can_save_state: bool
    params: dict[str, Any] = field(default_factory=dict)

    @property
    def shape(self) -> tuple[int, int, int]:
        return len(self.state_refs), len(self.input_refs), len(self.output_refs)


def _suggest(name: str, known: list[str]) -> str:
    return did_you_mean(name, known)


def load_fmu(path: Path, interface: str, states: list[str], inputs: list[str],
             outputs: list[str], variables: dict[str, str], params: dict[str, Any],
             x0: Vector) -> FmuOdePlant | FmuSlavePlant:
    """Read, check and instantiate an FMU; raise FmuIssue naming the rig-file key."""
    import fmpy
    from fmpy.fmi2 import FMU2Model, FMU2Slave

    if not path.is_file():
        raise FmuIssue("file", f"expected an FMU file relative to the rig file, found no file "
                               f"at {path}")
    try:
        md = fmpy.read_model_description(str(path))
    except (zipfile.BadZipFile, OSError, ValueError, KeyError, Exception) as exc:  # noqa: B014
        raise FmuIssue("file", f"not a readable FMU: {type(exc).__name__}: {exc}") from None
    if md.fmiVersion != "2.0":
        raise FmuIssue("file", f"expected an FMI 2.0 FMU, found FMI {md.fmiVersion}")
    kind = md.modelExchange if interface == "model_exchange" else md.coSimulation
    if kind is None:
        offered = [name for name, part in (("model_exchange", md.modelExchange),
                                           ("co_simulation", md.coSimulation)) if part]
        raise FmuIssue("interface", f"expected an interface the FMU offers "
                                    f"({', '.join(offered) or 'none'}), found {interface!r}")
    with zipfile.ZipFile(path) as archive:
        members = archive.namelist()
    platforms = sorted({m.split("/")[1] for m in members
                        if m.startswith("binaries/") and m.count("/") >= 2 and m.split("/")[2]})
    library = f"binaries/{fmpy.platform}/{kind.modelIdentifier}{fmpy.sharedLibraryExtension}"
    if library not in members:
        raise FmuIssue("file", f"expected a binary for this platform ({fmpy.platform}), "
                               f"found binaries for {', '.join(platforms) or 'none'}")
    if md.numberOfEventIndicators:
        raise FmuIssue("file", f"the FMU has {md.numberOfEventIndicators} event indicators; "
                               "plantrig steps FMUs without event handling")
    by_name = {v.name: v for v in md.modelVariables}
    names = sorted(by_name)

    def ref(signal: str, key: str, causalities: tuple[str, ...]) -> int:
        name = variables.get(signal, signal)
        where = f"variables.{signal}" if signal in variables else key
        v = by_name.get(name)
        if v is None:
            raise FmuIssue(where, f"expected a variable of {path.name}, found {name!r}"
                                  f"{_suggest(name, names)}")
        if v.type != "Real":
            raise FmuIssue(where, f"expected a Real variable, found {name!r} of type {v.type}")
        if causalities and v.causality not in causalities:
            raise FmuIssue(where, f"expected {name!r} to have causality "
                                  f"{' or '.join(causalities)}, found {v.causality}")
        return int(v.valueReference)

    in_refs = [ref(s, f"inputs[{i}].name", ("input",)) for i, s in enumerate(inputs)]
    out_refs = [ref(s, f"outputs[{i}].name", ("output",)) for i, s in enumerate(outputs)]
    state_refs = [ref(s, f"states[{i}].name", ()) for i, s in enumerate(states)]
    if interface == "model_exchange":
        fmu_states = [d.variable.derivative.name for d in md.derivatives]
        mapped = [variables.get(s, s) for s in states]
        if mapped != fmu_states:
            raise FmuIssue("states", f"expected the FMU's continuous states in its order "
                                     f"({', '.join(fmu_states)}), found {', '.join(mapped)}")
    param_refs = []
    for name, value in params.items():
        v = by_name.get(name)
        if v is None or v.causality != "parameter":
            known = sorted(k for k, var in by_name.items() if var.causality == "parameter")
            found = "no such variable" if v is None else f"causality {v.causality}"
            raise FmuIssue(f"params.{name}", f"expected a parameter of {path.name} "
                                             f"({', '.join(known)}), found {found}"
                                             f"{_suggest(name, known)}")
        param_refs.append((int(v.valueReference), float(value)))

    unzipped = fmpy.extract(str(path))
    cls = FMU2Model if interface == "model_exchange" else FMU2Slave
    try:
        fmu = cls(guid=md.guid, unzipDirectory=unzipped, modelIdentifier=kind.modelIdentifier,
                  instanceName="plant")
        fmu.instantiate()
        if param_refs:
            fmu.setReal([r for r, _ in param_refs], [v for _, v in param_refs])
        fmu.setupExperiment(startTime=0.0)
        fmu.enterInitializationMode()
        fmu.exitInitializationMode()
    except Exception as exc:  # the FMU's binary may fail in any way
        raise FmuIssue("file", f"the FMU's binary failed to start: {type(exc).__name__}: "
                               f"{exc}") from None
    if interface == "co_simulation":
        if len(x0) and state_refs:
            fmu.setReal(state_refs, [float(v) for v in x0])
        return FmuSlavePlant(path, fmu, tuple(in_refs), tuple(out_refs), tuple(state_refs),
                             bool(md.coSimulation.canGetAndSetFMUstate), dict(params))
    fmu.enterContinuousTimeMode()
    return _exchange_plant(fmu, path, len(states), in_refs, out_refs, dict(params))


def _exchange_plant(fmu: Any, path: Path, n: int, in_refs: list[int], out_refs: list[int],
                    params: dict[str, Any]) -> FmuOdePlant:
    x_c = (ctypes.c_double * n)()
    dx_c = (ctypes.c_double * n)()

    def load(t: float, x: Vector, u: Vector) -> None:
        fmu.setTime(t)
        x_c[:] = [float(v) for v in x]
        fmu.setContinuousStates(x_c, n)
        if in_refs:
            fmu.setReal(in_refs, [float(v) for v in u])

    def f(t: float, x: Vector, u: Vector, p: Any) -> Vector:
        load(t, x, u)
        fmu.getDerivatives(dx_c, n)
        return np.array(dx_c[:], dtype=np.float64)

    def h(t: float, x: Vector, u: Vector, p: Any) -> Vector:
        load(t, x, u)
        return np.array(fmu.getReal(out_refs), dtype=np.float64)

    return FmuOdePlant(f, h, n, len(in_refs), len(out_refs), params, fmu_file=path)


class FmuSlaveStepper:
    """One tick of a co-simulation FMU: u set, y read, doStep over the tick.

    A Stepper (sim/model/_plant.py). step() is pure until commit(): when the engine steps a tick
    again (a trip re-runs it with the safe inputs) the FMU state saved before the first
    doStep is restored first; an FMU that cannot save its state keeps the first step's
    state for that tick. Its parameters are fixed at start and it takes no disturbance
    inputs (its own solver owns its equations).
    """

    def __init__(self, plant: FmuSlavePlant, dt: float, x0: Vector,
                 xu: Vector | None = None) -> None:
        self.plant = plant
        self.n_states, self.n_inputs, self.n_outputs = plant.shape
        self.dt = dt
        n = self.n_states
        xu = np.zeros(n + self.n_inputs) if xu is None else xu
        self.x = xu[:n]
        self.u = xu[n:]
        self.y = np.zeros(self.n_outputs)
        self.x_next = np.zeros(n)
        self.params = dict(plant.params)
        self._saved: Any = None
        self._stepped_at: float | None = None
        self.x0 = np.array(x0, dtype=np.float64)
        self.x[:] = self.x0

    def reset(self) -> None:
        self.x[:] = self.x0
        self.u[:] = 0.0

    def output_only(self, t: float) -> None:
        fmu = self.plant.instance
        if self.n_inputs:
            fmu.setReal(list(self.plant.input_refs), [float(v) for v in self.u])
        self.y[:] = fmu.getReal(list(self.plant.output_refs))

    def step(self, t: float) -> None:
        fmu = self.plant.instance
        if self._stepped_at == t:
            if not self.plant.can_save_state:
                self.output_only(t)
                return
            fmu.setFMUstate(self._saved)
        elif self.plant.can_save_state:
            if self._saved is not None:     # a tick that was never committed
                fmu.freeFMUstate(self._saved)
            self._saved = fmu.getFMUstate()
        self.output_only(t)
        fmu.doStep(t, self.dt)
        self._stepped_at = t
        if self.n_states:
            self.x_next[:] = fmu.getReal(list(self.plant.state_refs))

    def commit(self) -> None:
        self.x[:] = self.x_next
        if self._saved is not None:
            self.plant.instance.freeFMUstate(self._saved)
            self._saved = None
        self._stepped_at = None

    def output_and_advance(self, t: float) -> None:
        self.step(t)
        self.commit()

    def change_parameters(self, changes: Sequence[ParameterChange]) -> None:
        raise ModelError("plant", "a co-simulation FMU's parameters are fixed at start")

    def set_disturbance(self, j: int, value: float) -> None:
        raise ModelError("disturbances", "a co-simulation FMU takes no disturbance input")

    def linear_form(self) -> LinearForm:
        return LinearForm(f"co-simulation FMU {self.plant.fmu_file.name} (its own solver, "
                          "one doStep per tick)",
                          unjudged="a co-simulation FMU gives no derivatives")
