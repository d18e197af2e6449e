"""Stretches of plain fast-mode ticks run in C (sim/engine/_stretch.c).

A plain tick is one of an LTI plant (one step per tick) under the built-in PID loops,
in fast mode, with no link, no signal chain, no fault that needs Python in every tick
(sensor and actuator faults that are one arithmetic operation, disturbances and
parameter steps are done in C), no interlock freezing the plant (one forcing safe
inputs is done in C), no scenario condition watched and every limit's value inside its
warn band (each limit's screen runs in C): nothing in it can raise an event. The
engine hands every run of such ticks up to its next orders (operator commands, fault ends, scenario
steps) to run_stretch and runs every other tick itself, so each feature is still there
the tick it is needed, and idle ones cost nothing.

The C tick writes the same bits as the Python tick: the PID law operation for operation,
and the plant product through the BLAS routine numpy's np.dot calls for it (found in
numpy's own library, and checked against np.dot on the rig's model before it is used).
Where either cannot be had, there are no stretches and every tick is the Python one.
"""

from __future__ import annotations

import ctypes
import functools
import importlib
import importlib.machinery
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from plantrig.sim.faults._faults import FaultOp
from plantrig.sim.model._controllers import Pid, PidLoops
from plantrig.sim.model._plant import LinearStepper

if TYPE_CHECKING:
    from plantrig.sim.engine._engine import Engine

KERNEL = "_stretch_kernel"
# numpy's BLAS entry point for float64 matrix-vector products, by the name its
# scipy-openblas build exports, and whether it takes 64-bit integers (ILP64)
NUMPY_GEMV = (("scipy_cblas_dgemv64_", True), ("scipy_cblas_dgemv", False))
ROW_MAJOR, NO_TRANS = 101, 111
WINDUP_CODES = {"unwind": 0, "freeze": 1, "off": 2}
# one pid_loop of _stretch.c: measure, drive, reference, windup (int64); kp, ki, kd, dt,
# d_pole, d_gain, unwind_gain, lo, hi, integral, derivative, y_prev (double); has_prev
LOOP_WORDS, AT_INTEGRAL = 17, 13
CHECKS = 4          # random [x; u] vectors the product is compared on before use


class _Fields(ctypes.Structure):
    """The ``stretch`` struct of _stretch.c."""

    _fields_ = [("gemv", ctypes.c_void_p), ("gemv_int64", ctypes.c_int64),
                ("n", ctypes.c_int64), ("m", ctypes.c_int64), ("p", ctypes.c_int64),
                ("n_refs", ctypes.c_int64), ("n_columns", ctypes.c_int64),
                ("block", ctypes.c_void_p), ("row", ctypes.c_void_p),
                ("at_r", ctypes.c_int64), ("at_cmd", ctypes.c_int64),
                ("at_sent", ctypes.c_int64), ("at_y", ctypes.c_int64),
                ("at_xu", ctypes.c_int64), ("next", ctypes.c_void_p),
                ("ed_d", ctypes.c_void_p), ("disturbed", ctypes.c_int64),
                ("loops", ctypes.c_void_p), ("n_loops", ctypes.c_int64),
                ("tick", ctypes.c_double), ("n_limits", ctypes.c_int64),
                ("rates", ctypes.c_int64), ("primed", ctypes.c_int64),
                ("limit_at", ctypes.c_void_p), ("warn_low", ctypes.c_void_p),
                ("warn_high", ctypes.c_void_p), ("rate_warn_tick", ctypes.c_void_p),
                ("seen", ctypes.c_void_p), ("loops_next", ctypes.c_void_p),
                ("drive", ctypes.c_void_p), ("seen_now", ctypes.c_void_p),
                ("n_ops", ctypes.c_int64), ("ops", ctypes.c_void_p),
                ("forcing", ctypes.c_int64), ("force_mask", ctypes.c_void_p),
                ("safe_u", ctypes.c_void_p), ("demand", ctypes.c_void_p)]


# one fault_op of _stretch.c (sim/faults/_faults.py's FaultOp)
OP_DTYPE = np.dtype([("place", np.int64), ("kind", np.int64), ("at", np.int64),
                     ("a", np.float64), ("b", np.float64)])


@functools.cache
def _kernel() -> Any:
    """run_stretch from the compiled kernel beside this module, or None if not built."""
    here = Path(__file__).parent
    for suffix in importlib.machinery.EXTENSION_SUFFIXES:
        path = here / f"{KERNEL}{suffix}"
        if path.exists():
            try:
                run = ctypes.PyDLL(str(path)).run_stretch   # a short call: keep the GIL
            except (OSError, AttributeError):
                return None
            run.argtypes = [ctypes.c_void_p, ctypes.c_int64, ctypes.c_int64,
                            ctypes.c_void_p, ctypes.c_void_p]
            run.restype = ctypes.c_int64
            return run
    return None


@functools.cache
def _numpy_gemv() -> tuple[int, bool] | None:
    """(address, takes int64) of the BLAS dgemv numpy calls, or None if not found."""
    try:
        numpy_core = ctypes.CDLL(importlib.import_module("numpy._core._multiarray_umath")
                                 .__file__)
    except OSError:
        return None
    for name, int64 in NUMPY_GEMV:
        try:
            address = ctypes.cast(getattr(numpy_core, name), ctypes.c_void_p).value
        except AttributeError:
            continue
        if address:
            return address, int64
    return None


def _same_as_numpy(block: np.ndarray, gemv: tuple[int, bool]) -> bool:
    """Whether calling ``gemv`` as _stretch.c does gives np.dot's bits on ``block``."""
    integer = ctypes.c_int64 if gemv[1] else ctypes.c_int
    pointer, real = ctypes.c_void_p, ctypes.c_double
    call = ctypes.CFUNCTYPE(None, ctypes.c_int, ctypes.c_int, integer, integer, real,
                            pointer, integer, pointer, integer, real, pointer,
                            integer)(gemv[0])
    rows, cols = block.shape
    rng = np.random.default_rng(7)
    for _ in range(CHECKS):
        x = np.ascontiguousarray(rng.normal(size=cols) * 10.0 ** rng.integers(-3, 4, size=cols))
        mine, numpy_s = np.zeros(rows), np.zeros(rows)
        call(ROW_MAJOR, NO_TRANS, rows, cols, 1.0, block.ctypes.data, cols, x.ctypes.data,
             1, 0.0, mine.ctypes.data, 1)
        np.dot(block, x, out=numpy_s)
        if mine.tobytes() != numpy_s.tobytes():
            return False
    return True


class Stretch:
    """Runs plain ticks of one engine in C; built by ``for_engine``."""

    def __init__(self, engine: Engine, loops: list[Pid], run: Any, gemv: tuple[int, bool],
                 cuts: list[int]) -> None:
        self.engine = engine
        self.loops = loops
        self._run = run
        stepper = engine.stepper
        assert isinstance(stepper, LinearStepper)
        self.stepper = stepper
        rig = engine.rig
        longest = engine.poll_every            # orders are due at least this often
        nr, ncols = len(rig.references), len(engine.columns)
        self.refs = np.zeros((longest, nr))
        self.out = np.zeros((longest, ncols))
        self.state = np.zeros((len(loops), LOOP_WORDS))
        ints = self.state.view(np.int64)
        for i, pid in enumerate(loops):
            ints[i, :4] = (pid.measure, pid.drive, pid.reference, WINDUP_CODES[pid.windup])
            self.state[i, 4:13] = pid.law()
        self._ints = ints
        self.limits = engine.safety.limits
        low, high, rate_tick, rates = self.limits.screen() if self.limits else ([], [], [],
                                                                               False)
        self.watched = np.array(self.limits.watched if self.limits else [], dtype=np.int64)
        self.bounds = np.array([low, high, rate_tick], dtype=np.float64).reshape(3, -1)
        self.seen = np.zeros(len(self.watched))
        # the C tick's scratch: next loop states, drive values, limit values
        self.scratch = (np.zeros_like(self.state), np.zeros(len(loops)),
                        np.zeros_like(self.seen))
        safety = engine.safety                         # its mask changes in place
        self.demand = np.zeros(stepper.n_inputs)
        block, step_out, ed_d = stepper.arrays()       # changed in place, never replaced
        self.fields = _Fields(
            gemv[0], int(gemv[1]), stepper.n_states, stepper.n_inputs, stepper.n_outputs,
            nr, ncols, block.ctypes.data, engine.row.ctypes.data, cuts[0], cuts[1],
            cuts[2], cuts[3], cuts[4], step_out.ctypes.data, ed_d.ctypes.data, 0,
            self.state.ctypes.data, len(loops), rig.tick,
            len(self.watched), int(rates), 0, self.watched.ctypes.data,
            self.bounds[0].ctypes.data, self.bounds[1].ctypes.data,
            self.bounds[2].ctypes.data, self.seen.ctypes.data,
            *(a.ctypes.data for a in self.scratch), 0, None, 0, safety.mask.ctypes.data,
            safety.safe_u.ctypes.data, self.demand.ctypes.data)
        self._ops: list[FaultOp] | None = None       # the faults' operations loaded
        self._op_array = np.zeros(0, dtype=OP_DTYPE)
        self._fields_at = ctypes.addressof(self.fields)
        self._refs_at, self._out_at = self.refs.ctypes.data, self.out.ctypes.data
        self.ticks = 0                  # ticks run in C so far

    @classmethod
    def for_engine(cls, engine: Engine, cuts: list[int]) -> Stretch | None:
        """A Stretch when every tick of this run could be plain, else None. ``cuts``:
        where r, cmd, sent, y and [x; u] start in the engine's record."""
        controller = engine.controller
        loops = [controller] if isinstance(controller, Pid) else \
            controller.loops if isinstance(controller, PidLoops) else None
        if (loops is None or engine.realtime or engine.link is not None
                or engine.actuator_chain is not None or engine.sensor_chain is not None
                or type(engine.stepper) is not LinearStepper):
            return None
        run, gemv = _kernel(), _numpy_gemv()
        if run is None or gemv is None or not _same_as_numpy(engine.stepper.arrays()[0],
                                                             gemv):
            return None
        return cls(engine, loops, run, gemv, cuts)

    def ready(self) -> bool:
        """Whether the ticks from now on are plain until something changes at orders."""
        engine = self.engine
        scenario, safety = engine.scenario, engine.safety
        return not (engine.faults.ops is None or safety.freezing
                    or safety.stop_reason or engine.stop_requested
                    or (scenario is not None and scenario.watching)
                    or (self.limits is not None and not self.limits.all_ok))

    def _load(self, ops: list[FaultOp]) -> None:
        """Hand the active faults' operations to the C tick (ready() saw a list)."""
        self._ops = ops
        self._op_array = np.array([tuple(op) for op in ops], dtype=OP_DTYPE)
        self.fields.n_ops = len(ops)
        self.fields.ops = self._op_array.ctypes.data if ops else None

    def run(self, k: int, end: int) -> int:
        """Ticks k .. end - 1 as far as they are plain, recorded on the engine's tape;
        the first tick not done (the Python tick takes it)."""
        engine, count = self.engine, end - k
        tick = engine.rig.tick
        refs = self.refs
        for i, value in engine.ref_values:
            refs[:count, i] = [value((k + j) * tick) for j in range(count)]
        if engine.any_override:
            chosen = ~np.isnan(engine.ref_override)
            refs[:count, chosen] = engine.ref_override[chosen]
        state = self.state
        for i, pid in enumerate(self.loops):
            y_prev = pid.y_prev
            state[i, AT_INTEGRAL:AT_INTEGRAL + 3] = (pid.integral, pid.derivative,
                                                     0.0 if y_prev is None else y_prev)
            self._ints[i, AT_INTEGRAL + 3] = y_prev is not None
        fields, limits = self.fields, self.limits
        fields.disturbed = self.stepper.disturbed
        fields.forcing = engine.safety.forcing
        ops = engine.faults.ops
        assert ops is not None          # ready() let these ticks run here
        if ops is not self._ops:        # a new list whenever a fault starts or ends
            self._load(ops)
        if limits is not None:
            self.seen[:] = limits.values
            fields.primed = limits.primed
        done = self._run(self._fields_at, k, count, self._refs_at, self._out_at)
        if limits is not None and done:
            limits.screened_elsewhere(self.seen.tolist())
        for i, pid in enumerate(self.loops):
            pid.integral, pid.derivative, y_prev = state[i, AT_INTEGRAL:AT_INTEGRAL + 3].tolist()
            if self._ints[i, AT_INTEGRAL + 3]:
                pid.y_prev = y_prev
        if done:
            engine.tape.append_rows(self.out[:done])
            engine.done = k + done
            self.ticks += done
        return k + done
