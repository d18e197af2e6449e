"""The Modbus register map of a rig: where each signal lives and how it is encoded.

Kept free of pymodbus so the worker process (plantrig.io._modbus_worker) loads it
quickly; the rig file's keys are checked by sim/config/_modbus_settings.py. The rig file's
``[link.registers]`` gives each signal a register address, a data type, a scale and an
offset (docs/modbus_link.md)::

    raw = round((value - offset) / scale)   int16, uint16, int32, uint32
    raw = (value - offset) / scale          float32 (IEEE 754 binary32)
    value = raw * scale + offset            what the rig reads back

Registers are 16-bit words sent big-endian (the Modbus application protocol; common
practice); a 32-bit value spans two registers whose order ``word_order`` sets: "big"
puts the high word at the lower address (the usual default, common practice), "little"
the low word. Sensors (the rig's outputs) are input registers, or discrete inputs for
type "bool"; commands (the rig's inputs) are holding registers, or coils for "bool".

Fixed registers beside the signals (addresses relative to ``status_address`` in the
input registers, ``echo_address`` in the holding registers)::

    input +0..+1   tick of the newest sensor values (uint32, in word order)
    input +2       the rig's run state (docs/protocol.md 1.2: 0 idle .. 4 ended)
    input +3       its detail (the interlock holding the safe state, or the exit code)
    holding +0..+1 echo: the sensor tick the controller's command answers (uint32;
                   optional: writing it gives the rig its latency figure)
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass
from typing import Any

from plantrig.sim import REGISTER_TYPES as TYPES

INT_RANGE = {"int16": (-(1 << 15), (1 << 15) - 1), "uint16": (0, (1 << 16) - 1),
             "int32": (-(1 << 31), (1 << 31) - 1), "uint32": (0, (1 << 32) - 1),
             "bool": (0, 1)}
TABLES = ("input", "holding", "discrete", "coil")
F32_MAX = 3.4028234663852886e38   # the largest finite float32


class ValueRefused(ValueError):
    """A written value the rig will not use: ``reason`` is 'non_finite' or 'range'."""

    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(detail)
        self.reason = reason


@dataclass(frozen=True)
class RegisterSpec:
    """One signal's place in the map."""

    name: str
    table: str                 # "input", "holding", "discrete" or "coil"
    address: int
    type: str = "float32"
    scale: float = 1.0
    offset: float = 0.0

    @property
    def width(self) -> int:
        return TYPES[self.type]


@dataclass(frozen=True)
class RegisterMap:
    """Every signal's place, the fixed registers and the word order."""

    sensors: tuple[RegisterSpec, ...]
    commands: tuple[RegisterSpec, ...]
    word_order: str = "big"
    status_address: int = 0
    echo_address: int = 0

    def to_json(self) -> dict[str, Any]:
        return {"sensors": [vars_of(s) for s in self.sensors],
                "commands": [vars_of(s) for s in self.commands],
                "word_order": self.word_order, "status_address": self.status_address,
                "echo_address": self.echo_address}

    @classmethod
    def from_json(cls, doc: dict[str, Any]) -> RegisterMap:
        return cls(tuple(RegisterSpec(**s) for s in doc["sensors"]),
                   tuple(RegisterSpec(**s) for s in doc["commands"]), doc["word_order"],
                   doc["status_address"], doc["echo_address"])


def vars_of(spec: RegisterSpec) -> dict[str, Any]:
    return {"name": spec.name, "table": spec.table, "address": spec.address,
            "type": spec.type, "scale": spec.scale, "offset": spec.offset}


def split_words(value32: int, word_order: str) -> tuple[int, int]:
    """A 32-bit unsigned number as two registers in ``word_order``."""
    hi, lo = (value32 >> 16) & 0xFFFF, value32 & 0xFFFF
    return (hi, lo) if word_order == "big" else (lo, hi)


def join_words(first: int, second: int, word_order: str) -> int:
    hi, lo = (first, second) if word_order == "big" else (second, first)
    return (hi << 16) | lo


def encode_value(spec: RegisterSpec, value: float, word_order: str) -> tuple[list[int], bool]:
    """Registers (or one 0/1 bit) for an engineering ``value``, and whether it had to be
    clipped to what the type can carry (a sensor beyond it: like an ADC at full scale)."""
    raw = (value - spec.offset) / spec.scale
    if spec.type == "bool":
        return [1 if value >= 0.5 else 0], False
    if spec.type == "float32":
        clipped = not abs(raw) <= F32_MAX          # NaN too
        if clipped:
            raw = 0.0 if math.isnan(raw) else math.copysign(F32_MAX, raw)
        (u32,) = struct.unpack(">I", struct.pack(">f", raw))
        return list(split_words(u32, word_order)), clipped
    lo, hi = INT_RANGE[spec.type]
    n = round(raw) if math.isfinite(raw) else (hi if raw > 0 else lo)
    clipped = not lo <= n <= hi
    n = min(max(n, lo), hi)
    if spec.width == 1:
        return [n & 0xFFFF], clipped
    return list(split_words(n & 0xFFFFFFFF, word_order)), clipped


def decode_value(spec: RegisterSpec, words: list[int], word_order: str) -> float:
    """The engineering value of a signal's registers; ValueRefused('non_finite') for a
    NaN or infinite float32."""
    if spec.type == "bool":
        return float(bool(words[0]))
    if spec.width == 1:
        n = words[0]
        if spec.type == "int16" and n >= 1 << 15:
            n -= 1 << 16
        raw = float(n)
    else:
        u32 = join_words(words[0], words[1], word_order)
        if spec.type == "float32":
            (raw,) = struct.unpack(">f", struct.pack(">I", u32))
            if not math.isfinite(raw):
                raise ValueRefused("non_finite", f"{spec.name}: float32 pattern "
                                                 f"0x{u32:08X} is not finite")
        elif spec.type == "int32" and u32 >= 1 << 31:
            raw = float(u32 - (1 << 32))
        else:
            raw = float(u32)
    value = raw * spec.scale + spec.offset
    if not math.isfinite(value):
        raise ValueRefused("non_finite", f"{spec.name}: {raw!r} x {spec.scale:g} overflows")
    return value
