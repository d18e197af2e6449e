"""Signal conditioning between the plant and the link: sensor and actuator chains.

A real sensor does not hand the controller the plant's exact output, and a real drive
does not apply the controller's command exactly. These chains add the usual
imperfections (scaling, noise, transport delay, saturation, quantization, rate limits)
so the controller under test meets them on the bench. Both satisfy
:class:`plantrig.sim.engine._contracts.SignalChain`; all channels of a chain are processed
together with numpy, and ``apply`` allocates no arrays (every buffer is made at
construction).

Each channel is described by a table (one per signal in the rig file; checked into
SensorChannel and ActuatorChannel by sim/config/_chain_settings.py), or by a plain dict in
Python. Every key is optional; unknown keys are refused. A bad dict raises
ChainSpecError (a ValueError) naming chain, channel and key, e.g.
``sensors[2].delay_ticks: ...``.

Sensor channel keys (plant output y in engineering units -> value sent):

``name``         str, label used in messages (default ``"sensor<i>"``)
``gain``         float, multiplies y (default 1.0)
``offset``       float, added after the gain (default 0.0)
``noise_std``    float >= 0, standard deviation of added Gaussian noise, engineering
                 units (default 0.0); drawn from one numpy Generator seeded by the chain
``delay_ticks``  int 0..100000, transport delay in whole ticks (default 0)
``lo``, ``hi``   floats, saturation range (default unbounded)
``step``         float > 0, quantization step: v -> round(v / step) * step
``adc_bits``     int 1..32, ADC resolution; needs ``adc_lo`` and ``adc_hi``
``adc_lo``, ``adc_hi``  floats, the ADC input range (adc_lo < adc_hi)
``send_counts``  bool, send the ADC counts 0..2^bits-1 instead of the reconstructed
                 engineering value (needs ``adc_bits``; default false)

``step`` and ``adc_bits`` exclude each other.

Sensor order, fixed: gain/offset -> noise -> delay -> saturate (lo/hi) -> quantize
(step, or ADC: eng -> counts clipped to 0..2^bits-1 -> counts or eng). A NaN plant
output passes through as NaN: hiding a diverged plant is not this chain's job.

Actuator channel keys (value received from the controller -> plant input u):

``name``         str, label used in messages (default ``"actuator<i>"``)
``dac_bits``     int 1..32, the command arrives as DAC counts; needs ``dac_lo``/``dac_hi``
``dac_lo``, ``dac_hi``  floats, the engineering range that counts 0..2^bits-1 span
``gain``         float, multiplies the command (default 1.0; not with ``dac_bits``)
``offset``       float, added after the gain (default 0.0; not with ``dac_bits``)
``lo``, ``hi``   floats, saturation range (default unbounded)
``rate``         float > 0, largest change of u per second (default unlimited); the
                 chain needs the tick length ``dt`` for it
``initial``      float, u before the first good command and the rate limiter's start
                 (default 0.0; must lie inside lo..hi)

Actuator order, fixed: non-finite guard -> counts to eng (counts clipped to
0..2^bits-1) or gain/offset -> saturate -> rate limit -> hold the last good value
wherever the command was NaN/inf or the result is not finite (counted in
``non_finite_count``).

ADC/DAC transfer (common practice for a unipolar straight-binary converter whose end
codes sit on the range ends; some datasheets divide by 2^bits instead):
counts = round((v - lo) / (hi - lo) * (2^bits - 1)), v = lo + counts * (hi - lo) / (2^bits - 1).
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from numbers import Real
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from plantrig.sim.config._chain_settings import (
    MAX_BITS,
    ActuatorChannel,
    SensorChannel,
    actuator_channel,
    channel_list,
    sensor_channel,
)
from plantrig.sim.config._checker import Checker, RigFileError, RigIssue

Vector = NDArray[np.float64]



class ChainSpecError(RigFileError):
    """Mistakes in a chain given in Python; ``chain``, ``index`` and ``key`` name the
    first one (a rig file's chains are checked by load_rig instead)."""

    def __init__(self, issues: Sequence[RigIssue]) -> None:
        super().__init__(issues)
        first = re.match(r"(\w+)\[(\d+)\]\.?(.*)", self.issues[0].key)
        self.chain, self.index, self.key = (first.group(1), int(first.group(2)),
                                            first.group(3) or "*") if first else ("", 0, "*")


# --- converter transfer functions -------------------------------------------------


def _to_counts(v: Vector, lo: Vector, span: Vector, top: Vector, out: Vector) -> Vector:
    """In place: out = clip(rint((v - lo) / span * top), 0, top)."""
    np.subtract(v, lo, out=out)
    np.divide(out, span, out=out)
    np.multiply(out, top, out=out)
    np.rint(out, out=out)
    np.maximum(out, 0.0, out=out)
    np.minimum(out, top, out=out)
    return out


def _to_eng(counts: Vector, lo: Vector, span: Vector, top: Vector, out: Vector) -> Vector:
    """In place: out = lo + counts * span / top (counts already clipped)."""
    np.multiply(counts, span, out=out)
    np.divide(out, top, out=out)
    np.add(out, lo, out=out)
    return out


def _converter_args(bits: ArrayLike, lo: ArrayLike, hi: ArrayLike) -> tuple[Vector, Vector, Vector]:
    b = np.asarray(bits)
    if not np.all((b == np.round(b)) & (b >= 1) & (b <= MAX_BITS)):
        raise ValueError(f"bits must be whole numbers 1..{MAX_BITS}, got {bits!r}")
    lo_a = np.asarray(lo, dtype=np.float64)
    hi_a = np.asarray(hi, dtype=np.float64)
    if not np.all(np.isfinite(lo_a) & np.isfinite(hi_a) & (hi_a > lo_a)):
        raise ValueError(f"range needs finite lo < hi, got lo={lo!r}, hi={hi!r}")
    top = np.exp2(b.astype(np.float64)) - 1.0
    return lo_a, hi_a - lo_a, top


def eng_to_counts(v: ArrayLike, bits: ArrayLike, lo: ArrayLike, hi: ArrayLike) -> Vector:
    """Converter counts for engineering value(s) ``v``, clipped to 0..2^bits-1.

    counts = round((v - lo) / (hi - lo) * (2^bits - 1)), ties to even. Returned as
    float64 holding whole numbers, so it fits the chains' Vector buffers.
    """
    lo_a, span, top = _converter_args(bits, lo, hi)
    v_a = np.asarray(v, dtype=np.float64)
    out = np.empty(np.broadcast_shapes(v_a.shape, lo_a.shape, top.shape))
    return _to_counts(v_a, lo_a, span, top, out)


def counts_to_eng(counts: ArrayLike, bits: ArrayLike, lo: ArrayLike, hi: ArrayLike) -> Vector:
    """Engineering value(s) for converter ``counts`` (clipped to 0..2^bits-1 first)."""
    lo_a, span, top = _converter_args(bits, lo, hi)
    c = np.clip(np.asarray(counts, dtype=np.float64), 0.0, top)
    out = np.empty(np.broadcast_shapes(c.shape, lo_a.shape))
    return _to_eng(c, lo_a, span, top, out)


def _column(values: Sequence[float]) -> Vector:
    return np.array(values, dtype=np.float64)


def _converter_columns(
    convs: Sequence[tuple[int, float, float] | None],
) -> tuple[NDArray[np.bool_], Vector, Vector, Vector]:
    """Per-channel lo, span, top; harmless placeholders (0, 1, 1) where there is none."""
    mask = np.array([c is not None for c in convs], dtype=bool)
    lo = _column([c[1] if c else 0.0 for c in convs])
    span = _column([c[2] - c[1] if c else 1.0 for c in convs])
    top = _column([2.0 ** c[0] - 1.0 if c else 1.0 for c in convs])
    return mask, lo, span, top


# --- chains ------------------------------------------------------------------------


class SensorChain:
    """Plant output y -> values for the controller, all channels at once.

    ``tick`` is not used: each ``apply`` call is one tick, and the delay line advances
    one row per call. Before ``delay_ticks`` calls have passed, a delayed channel
    repeats its first value (the line starts filled with it).
    """

    def __init__(self, channels: Sequence[SensorChannel], seed: int) -> None:
        if not channels:
            raise ValueError("sensors: at least one channel is needed")
        self.channels = tuple(channels)
        self.seed = seed
        n = self.n_channels = len(channels)
        ch = self.channels
        self._gain = _column([c.gain for c in ch])
        self._offset = _column([c.offset for c in ch])
        self._std = _column([c.noise_std for c in ch])
        self._noisy = bool(np.any(self._std > 0))
        self._lo = _column([c.lo for c in ch])
        self._hi = _column([c.hi for c in ch])
        self._has_step = np.array([c.step > 0 for c in ch], dtype=bool)
        self._step = _column([c.step if c.step > 0 else 1.0 for c in ch])
        self._has_adc, self._adc_lo, self._adc_span, self._adc_top = _converter_columns(
            [c.adc for c in ch]
        )
        self._send_counts = np.array([c.send_counts for c in ch], dtype=bool)
        # Delay line: ring of (max delay + 1) rows; channel j reads row head - d_j.
        self._delay = np.array([c.delay_ticks for c in ch], dtype=np.int64)
        self._ring_len = int(self._delay.max()) + 1
        self._ring = np.zeros((self._ring_len, n))
        self._ring_flat = self._ring.reshape(-1)
        self._rows = list(self._ring)
        self._cols = np.arange(n, dtype=np.int64)
        self._idx = np.zeros(n, dtype=np.int64)
        self._w = np.zeros(n)
        self._z = np.zeros(n)
        self._q = np.zeros(n)
        self._c = np.zeros(n)
        self.reset()

    def reset(self) -> None:
        """Empty the delay line and restart the noise stream from the seed."""
        self._rng = np.random.default_rng(self.seed)
        self._head = 0
        self._primed = False

    def apply(self, tick: int, src: Vector, dst: Vector) -> None:
        w = self._w
        np.multiply(src, self._gain, out=w)
        np.add(w, self._offset, out=w)
        if self._noisy:
            self._rng.standard_normal(out=self._z)
            np.multiply(self._z, self._std, out=self._z)
            np.add(w, self._z, out=w)
        if self._ring_len > 1:
            if not self._primed:
                self._ring[...] = w
                self._primed = True
            head = self._head
            np.copyto(self._rows[head], w)
            np.subtract(head, self._delay, out=self._idx)
            np.mod(self._idx, self._ring_len, out=self._idx)
            np.multiply(self._idx, self.n_channels, out=self._idx)
            np.add(self._idx, self._cols, out=self._idx)
            np.take(self._ring_flat, self._idx, out=w, mode="wrap")  # "raise" buffers out
            self._head = (head + 1) % self._ring_len
        np.maximum(w, self._lo, out=w)
        np.minimum(w, self._hi, out=w)
        if self._has_step.any():
            q = self._q
            np.divide(w, self._step, out=q)
            np.rint(q, out=q)
            np.multiply(q, self._step, out=q)
            np.copyto(w, q, where=self._has_step)
        if self._has_adc.any():
            _to_counts(w, self._adc_lo, self._adc_span, self._adc_top, out=self._c)
            _to_eng(self._c, self._adc_lo, self._adc_span, self._adc_top, out=self._q)
            np.copyto(w, self._q, where=self._has_adc)
            np.copyto(w, self._c, where=self._send_counts)
        np.copyto(dst, w)


class ActuatorChain:
    """Controller command -> plant input u, all channels at once.

    A NaN or infinite command never reaches ``dst``: the channel holds its last good
    output and ``non_finite_count`` grows by one per rejected channel value.
    """

    def __init__(self, channels: Sequence[ActuatorChannel], dt: float | None = None) -> None:
        if not channels:
            raise ValueError("actuators: at least one channel is needed")
        ch = self.channels = tuple(channels)
        n = self.n_channels = len(ch)
        self._has_rate = np.array([math.isfinite(c.rate) for c in ch], dtype=bool)
        if self._has_rate.any():
            i = int(np.argmax(self._has_rate))
            if dt is None or not (isinstance(dt, Real) and math.isfinite(dt) and dt > 0):
                raise ChainSpecError([RigIssue(SPEC, f"actuators[{i}].rate",
                                               f"needs the tick length dt > 0, found {dt!r}")])
        self.dt = dt
        self._gain = _column([c.gain for c in ch])
        self._offset = _column([c.offset for c in ch])
        self._lo = _column([c.lo for c in ch])
        self._hi = _column([c.hi for c in ch])
        self._max_step = _column([c.rate * dt if math.isfinite(c.rate) and dt else 0.0 for c in ch])
        self._min_step = -self._max_step
        self._has_dac, self._dac_lo, self._dac_span, self._dac_top = _converter_columns(
            [c.dac for c in ch]
        )
        self._initial = _column([c.initial for c in ch])
        self._last = self._initial.copy()
        self._w = np.zeros(n)
        self._q = np.zeros(n)
        self._ok = np.zeros(n, dtype=bool)
        self._ok2 = np.zeros(n, dtype=bool)
        self._bad = np.zeros(n, dtype=bool)
        self.non_finite_count = 0

    def reset(self) -> None:
        """Back to the initial values; the non-finite counter restarts at zero."""
        np.copyto(self._last, self._initial)
        self.non_finite_count = 0

    def apply(self, tick: int, src: Vector, dst: Vector) -> None:
        w, q = self._w, self._q
        np.isfinite(src, out=self._ok)
        np.logical_not(self._ok, out=self._bad)
        np.copyto(w, src)
        # Bad entries are replaced now, so no inf arithmetic below; overwritten at the end.
        np.copyto(w, 0.0, where=self._bad)
        if self._has_dac.any():
            np.maximum(w, 0.0, out=q)
            np.minimum(q, self._dac_top, out=q)
            _to_eng(q, self._dac_lo, self._dac_span, self._dac_top, out=q)
            np.copyto(w, q, where=self._has_dac)
        np.multiply(w, self._gain, out=w)
        np.add(w, self._offset, out=w)
        np.maximum(w, self._lo, out=w)
        np.minimum(w, self._hi, out=w)
        if self._has_rate.any():
            np.subtract(w, self._last, out=q)
            np.maximum(q, self._min_step, out=q)
            np.minimum(q, self._max_step, out=q)
            np.add(q, self._last, out=q)
            np.copyto(w, q, where=self._has_rate)
        np.isfinite(w, out=self._ok2)
        np.logical_and(self._ok, self._ok2, out=self._ok)
        np.logical_not(self._ok, out=self._bad)
        np.copyto(w, self._last, where=self._bad)
        self.non_finite_count += int(np.count_nonzero(self._bad))
        np.copyto(self._last, w)
        np.copyto(dst, w)


SPEC = "chain spec"   # the "file" named in a ChainSpecError's messages


def _checked(group: str, spec: object, read: Any) -> list[Any]:
    c = Checker(SPEC)
    tables = channel_list(c, group, spec)
    channels = [read(c, f"{group}[{i}]", t, f"{group[:-1]}{i}") for i, t in enumerate(tables)]
    if c.issues:
        raise ChainSpecError(c.issues)
    return channels


def build_sensor_chain(spec: list[dict[str, Any]], seed: int) -> SensorChain:
    """Sensor chain from one dict per channel (keys in the module docstring)."""
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ValueError(f"sensors: seed must be a whole number >= 0, got {seed!r}")
    return SensorChain(_checked("sensors", spec, sensor_channel), seed)


def build_actuator_chain(spec: list[dict[str, Any]], dt: float | None = None) -> ActuatorChain:
    """Actuator chain from one dict per channel; ``dt`` (s) is needed when a rate is set."""
    return ActuatorChain(_checked("actuators", spec, actuator_channel), dt)
