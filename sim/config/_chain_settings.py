"""The rig file's [[sensors]] and [[actuators]] tables as typed channel settings.

One table per signal, matched by ``name`` to a plant output (sensors) or input
(actuators); signals without a table pass through unchanged. Checked with the rig
file's Checker in the same pass as the rest of the rig, every mistake at once. The keys
and what the chains do with them are documented in sim/engine/_conditioning.py.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from plantrig.sim.config._checker import (
    Checker,
    boolean,
    describe_value,
    is_number,
    one_of,
    text,
    whole_number,
)

if TYPE_CHECKING:
    from plantrig.sim.config._rigfile import Signal

MAX_BITS = 32
MAX_DELAY_TICKS = 100_000  # 100 s at 1 kHz; the line holds (delay + 1) rows per channel
SENSOR_KEYS = frozenset(
    "name gain offset noise_std delay_ticks lo hi step adc_bits adc_lo adc_hi send_counts".split()
)
ACTUATOR_KEYS = frozenset("name dac_bits dac_lo dac_hi gain offset lo hi rate initial".split())


@dataclass(frozen=True, slots=True)
class SensorChannel:
    """One sensor channel, checked (keys in sim/engine/_conditioning.py)."""

    name: str
    gain: float = 1.0
    offset: float = 0.0
    noise_std: float = 0.0
    delay_ticks: int = 0
    lo: float = -math.inf
    hi: float = math.inf
    step: float = 0.0
    adc: tuple[int, float, float] | None = None
    send_counts: bool = False


@dataclass(frozen=True, slots=True)
class ActuatorChannel:
    """One actuator channel, checked (keys in sim/engine/_conditioning.py)."""

    name: str
    gain: float = 1.0
    offset: float = 0.0
    dac: tuple[int, float, float] | None = None
    lo: float = -math.inf
    hi: float = math.inf
    rate: float = math.inf
    initial: float = 0.0


def _number(value: Any) -> str | None:
    """A number; infinite is allowed (a one-sided range), NaN is not."""
    if is_number(value) and not math.isnan(value):
        return None
    return f"expected a number, found {describe_value(value)}"


def _finite(value: Any) -> str | None:
    if is_number(value) and math.isfinite(value):
        return None
    return f"expected a finite number, found {describe_value(value)}"


class _Channel:
    """Reads one channel table with key paths under ``where``; a wrong value is recorded
    and its default used, so the rest of the table is still checked."""

    def __init__(self, c: Checker, where: str, spec: Mapping[str, Any],
                 known: frozenset[str]) -> None:
        self.c, self.where, self.spec = c, where, spec
        c.no_unknown(dict(spec), known, where)

    def has(self, key: str) -> bool:
        return key in self.spec

    def add(self, key: str, message: str) -> None:
        self.c.add(f"{self.where}.{key}", message)

    def get(self, key: str, default: Any, check: Any) -> Any:
        return self.c.value(dict(self.spec), key, self.where, default, check)

    def limits(self) -> tuple[float, float]:
        lo = float(self.get("lo", -math.inf, _number))
        hi = float(self.get("hi", math.inf, _number))
        if lo >= hi:
            self.add("hi", f"expected a number greater than lo ({lo:g}), found {hi:g}")
        return lo, hi

    def converter(self, prefix: str) -> tuple[int, float, float] | None:
        bits_key, lo_key, hi_key = f"{prefix}_bits", f"{prefix}_lo", f"{prefix}_hi"
        if not self.has(bits_key):
            for k in (lo_key, hi_key):
                if self.has(k):
                    self.add(k, f"applies only with {bits_key}")
            return None
        bits = int(self.get(bits_key, 0, whole_number(1, MAX_BITS)))
        for k in (lo_key, hi_key):
            if not self.has(k):
                self.add(k, f"missing (needed with {bits_key})")
        lo, hi = float(self.get(lo_key, 0.0, _finite)), float(self.get(hi_key, 1.0, _finite))
        if lo >= hi and self.has(lo_key) and self.has(hi_key):
            self.add(hi_key, f"expected a number greater than {lo_key} ({lo:g}), found {hi:g}")
        return (bits, lo, hi) if bits else None


def sensor_channel(c: Checker, where: str, spec: Mapping[str, Any],
                   default_name: str) -> SensorChannel:
    """One [[sensors]] table, checked (mistakes recorded in ``c``)."""
    r = _Channel(c, where, spec, SENSOR_KEYS)
    noise_std = float(r.get("noise_std", 0.0, _finite))
    if noise_std < 0:
        r.add("noise_std", f"expected a number >= 0, found {noise_std:g}")
    step = float(r.get("step", 0.0, _finite))
    if r.has("step") and step <= 0:
        r.add("step", f"expected a number > 0, found {step:g}")
    adc = r.converter("adc")
    if r.has("adc_bits") and r.has("step"):
        r.add("step", "cannot be used together with adc_bits")
    send_counts = bool(r.get("send_counts", False, boolean))
    if send_counts and not r.has("adc_bits"):
        r.add("send_counts", "needs adc_bits, adc_lo and adc_hi")
    lo, hi = r.limits()
    return SensorChannel(
        name=r.get("name", default_name, text), gain=float(r.get("gain", 1.0, _finite)),
        offset=float(r.get("offset", 0.0, _finite)), noise_std=noise_std,
        delay_ticks=int(r.get("delay_ticks", 0, whole_number(0, MAX_DELAY_TICKS))),
        lo=lo, hi=hi, step=step, adc=adc, send_counts=send_counts)


def actuator_channel(c: Checker, where: str, spec: Mapping[str, Any],
                     default_name: str) -> ActuatorChannel:
    """One [[actuators]] table, checked (mistakes recorded in ``c``)."""
    r = _Channel(c, where, spec, ACTUATOR_KEYS)
    dac = r.converter("dac")
    if r.has("dac_bits"):
        for k in ("gain", "offset"):
            if r.has(k):
                r.add(k, "cannot be used together with dac_bits")
    rate = float(r.get("rate", math.inf, _number))
    if r.has("rate") and not rate > 0:
        r.add("rate", f"expected a number > 0, found {rate:g}")
    lo, hi = r.limits()
    initial = float(r.get("initial", 0.0, _finite))
    if not lo <= initial <= hi:
        r.add("initial", f"expected a value inside lo..hi ({lo:g}..{hi:g}), found {initial:g}")
    return ActuatorChannel(
        name=r.get("name", default_name, text), gain=float(r.get("gain", 1.0, _finite)),
        offset=float(r.get("offset", 0.0, _finite)), dac=dac, lo=lo, hi=hi, rate=rate,
        initial=initial)


def channel_list(c: Checker, group: str, spec: object) -> Sequence[Mapping[str, Any]]:
    """A list of channel tables (the Python API's form of a chain)."""
    if isinstance(spec, str | bytes | Mapping) or not isinstance(spec, Sequence) or not all(
            isinstance(s, Mapping) for s in spec):
        c.add(f"{group}[0]", f"expected a list of tables, found {describe_value(spec)}")
        return []
    if not spec:
        c.add(f"{group}[0]", "expected at least one channel, found none")
    return spec


def rig_chain(c: Checker, group: str, tables: list[dict[str, Any]],
              signals: Sequence[Signal]) -> tuple[Any, ...]:
    """The rig's channels for ``group`` ("sensors" or "actuators") in plant order: a
    table's channel, or a pass-through one for a signal without a table; () when the
    file has no tables."""
    if not tables:
        return ()
    names = [s.name for s in signals]
    read = sensor_channel if group == "sensors" else actuator_channel
    by_name: dict[str, Any] = {}
    for i, table in enumerate(tables):
        where = f"{group}[{i}]"
        name = c.take(table, "name", where, "str",
                      check=one_of(tuple(names), "plant " + ("outputs" if group == "sensors"
                                                             else "inputs")))
        channel = read(c, where, table, str(name))
        if name is None:
            continue
        if name in by_name:
            c.add(f"{where}.name", f"expected one table per signal, found a second for "
                                   f"{name!r}")
        by_name[name] = channel
    return tuple(by_name.get(name) or read(c, "", {}, name) for name in names)
