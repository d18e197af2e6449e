"""The [link] keys of kind "modbus" and the register map they describe.

Checked like every rig-file table (plantrig.io._link_config hands the kind's own keys
here through LINK_KINDS): one RigIssue per mistake with its key path. Imports neither
pymodbus nor the rest of plantrig.io, so `plantrig check` stays quick. The keys and the
map are documented in docs/modbus_link.md.
"""

from __future__ import annotations

import difflib
import math
from typing import TYPE_CHECKING, Any

from plantrig.io._modbus_map import ADDRESS_LIMIT, TYPES, RegisterMap, RegisterSpec

if TYPE_CHECKING:
    from plantrig.io._link_config import Issues, LinkSettings
    from plantrig.sim import Rig


def one_of(options: tuple[Any, ...]) -> Any:
    def check(v: Any) -> str | None:
        if v in options and not isinstance(v, bool):
            return None
        close = difflib.get_close_matches(str(v), [str(o) for o in options], n=1)
        hint = f"; did you mean '{close[0]}'?" if close else ""
        return f"expected one of {', '.join(str(o) for o in options)}, found {v!r}{hint}"
    return check


def text(v: Any) -> str | None:
    return None if isinstance(v, str) and v else f"expected a non-empty string, found {v!r}"


MODBUS_DEFAULTS: dict[str, Any] = {
    "transport": "tcp", "host": "127.0.0.1", "port": 502, "serial_port": "",
    "baud": 19200, "parity": "even", "stop_bits": 1, "byte_size": 8, "unit_id": 1,
    "word_order": "big", "status_address": 0, "echo_address": 0,
}
MODBUS_KEYS = frozenset({*MODBUS_DEFAULTS, "registers"})
REGISTER_KEYS = frozenset({"address", "type", "scale", "offset"})


def _address(v: Any) -> str | None:
    if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v < ADDRESS_LIMIT:
        return f"expected a register address 0..{ADDRESS_LIMIT - 1}, found {v!r}"
    return None


def _number(v: Any) -> str | None:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        return f"expected a finite number, found {v!r}"
    return None


def check_modbus_keys(rig: Rig, table: dict[str, Any], issues: Issues) -> dict[str, Any]:
    """The Modbus link's own keys and its register map, every mistake at once."""
    out: dict[str, Any] = {}
    for key, check in (("transport", one_of(("tcp", "rtu"))), ("host", text),
                       ("port", lambda v: None if isinstance(v, int) and not isinstance(v, bool)
                        and 0 < v < 65536 else f"expected a TCP port 1..65535, found {v!r}"),
                       ("serial_port", text), ("baud", lambda v: None if isinstance(v, int)
                                               and not isinstance(v, bool) and v > 0 else
                                               f"expected a positive whole number, found {v!r}"),
                       ("parity", one_of(("none", "even", "odd"))),
                       ("stop_bits", one_of((1, 2))), ("byte_size", one_of((8,))),
                       ("unit_id", lambda v: None if isinstance(v, int) and not
                        isinstance(v, bool) and 1 <= v <= 247 else
                        f"expected a unit id 1..247, found {v!r}"),
                       ("word_order", one_of(("big", "little"))),
                       ("status_address", _address), ("echo_address", _address)):
        out[key] = issues.value(table, key, "link", MODBUS_DEFAULTS[key], check)
    if out["transport"] == "rtu" and not out["serial_port"]:
        issues.add("link.serial_port", "missing: transport = \"rtu\" needs a serial port "
                                       "(`--port` overrides it)")
    registers = table.get("registers")
    if not isinstance(registers, dict):
        issues.add("link.registers", "missing table: every input and output needs its "
                                     "register (address, and optionally type, scale, offset)")
        registers = {}
    names = [s.name for s in rig.outputs] + [s.name for s in rig.inputs]
    issues.unknown(registers, frozenset(names), "link.registers")
    sensors: list[RegisterSpec] = []
    commands: list[RegisterSpec] = []
    for group, signals, tables in (("outputs", rig.outputs, ("input", "discrete")),
                                   ("inputs", rig.inputs, ("holding", "coil"))):
        for s in signals:
            where = f"link.registers.{s.name}"
            entry = registers.get(s.name)
            if not isinstance(entry, dict):
                if registers:
                    issues.add(where, f"missing: plant.{group} {s.name!r} needs its register "
                                      "(e.g. { address = 4, type = \"float32\" })")
                continue
            issues.unknown(entry, REGISTER_KEYS, where)
            if "address" not in entry:
                issues.add(f"{where}.address", "missing")
            address = issues.value(entry, "address", where, 0, _address)
            kind = issues.value(entry, "type", where, "float32", one_of(tuple(TYPES)))
            scale = issues.value(entry, "scale", where, 1.0, _number)
            offset = issues.value(entry, "offset", where, 0.0, _number)
            if scale == 0:
                issues.add(f"{where}.scale", "expected a non-zero number, found 0")
                scale = 1.0
            table_name = tables[1] if kind == "bool" else tables[0]
            spec = RegisterSpec(s.name, table_name, int(address), kind, float(scale),
                                float(offset))
            (sensors if group == "outputs" else commands).append(spec)
    fixed = [("input", out["status_address"], 4, "the status registers (tick, state)"),
             ("holding", out["echo_address"], 2, "the echo registers")]
    used: dict[tuple[str, int], str] = {}
    for table_name, base, width, what in fixed:
        for a in range(base, base + width):
            used[(table_name, a)] = what
    for spec in (*sensors, *commands):
        for a in range(spec.address, spec.address + spec.width):
            if a >= ADDRESS_LIMIT:
                issues.add(f"link.registers.{spec.name}.address", "runs past register 65535")
                break
            other = used.get((spec.table, a))
            if other:
                issues.add(f"link.registers.{spec.name}.address",
                           f"{spec.table} register {a} is already {other}")
                break
            used[(spec.table, a)] = f"used by {spec.name}"
    out["map"] = RegisterMap(tuple(sensors), tuple(commands), out["word_order"],
                             out["status_address"], out["echo_address"]).to_json()
    return out


def modbus_setup(rig: Rig, settings: LinkSettings, port: Any = None) -> dict[str, Any]:
    """What the worker needs: the checked options with ``port`` overriding where to
    listen (TCP: PORT or HOST:PORT; RTU: a device path)."""
    o = dict(settings.options)
    if port is not None:
        if o["transport"] == "tcp":
            host, _, number = str(port).rpartition(":")
            o["port"] = int(number)
            if host:
                o["host"] = host
        else:
            o["serial_port"] = str(port)
    o["lo"] = [float(s.min) for s in rig.inputs]
    o["hi"] = [float(s.max) for s in rig.inputs]
    o["out_of_range"] = settings.out_of_range
    o["events_per_kind"] = settings.events_per_kind
    return o
