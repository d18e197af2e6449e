"""The [link] keys of kind = "modbus" and the register map they describe.

Checked with the rig file's Checker in the same pass as the rest of the rig; the map
is kept as plain JSON-ready data (LinkSettings.options["map"]) that plantrig.io's
Modbus link and its worker read. The keys and the map are documented in
docs/modbus_link.md.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from plantrig.sim.config._checker import Checker, finite_number, one_of, text, whole_number

if TYPE_CHECKING:
    from plantrig.sim.config._link_settings import LinkContext

# registers one value of each data type takes (16-bit words; common practice)
REGISTER_TYPES = {"int16": 1, "uint16": 1, "int32": 2, "uint32": 2, "float32": 2, "bool": 1}
ADDRESS_LIMIT = 1 << 16
MODBUS_DEFAULTS: dict[str, Any] = {
    "transport": "tcp", "host": "127.0.0.1", "port": 502, "serial_port": "",
    "baud": 19200, "parity": "even", "stop_bits": 1, "byte_size": 8, "unit_id": 1,
    "word_order": "big", "status_address": 0, "echo_address": 0,
}
MODBUS_KEYS = frozenset({*MODBUS_DEFAULTS, "registers"})
REGISTER_KEYS = frozenset({"address", "type", "scale", "offset"})

_address = whole_number(0, ADDRESS_LIMIT - 1, "a register address")
_CHECKS = {
    "transport": one_of(("tcp", "rtu")), "host": text,
    "port": whole_number(1, 65535, "a TCP port"), "serial_port": text,
    "baud": whole_number(1, 10_000_000, "a baud rate"),
    "parity": one_of(("none", "even", "odd")), "stop_bits": one_of((1, 2)),
    "byte_size": one_of((8,)), "unit_id": whole_number(1, 247, "a unit id"),
    "word_order": one_of(("big", "little")), "status_address": _address,
    "echo_address": _address,
}


def check_modbus_keys(c: Checker, table: dict[str, Any], rig: LinkContext) -> dict[str, Any]:
    """The Modbus link's own keys and its register map, every mistake at once."""
    out = {key: c.value(table, key, "link", MODBUS_DEFAULTS[key], check)
           for key, check in _CHECKS.items()}
    if out["transport"] == "rtu" and not out["serial_port"]:
        c.add("link.serial_port", "missing: transport = \"rtu\" needs a serial port "
                                  "(`--port` overrides it)")
    registers = table.get("registers")
    if not isinstance(registers, dict):
        c.add("link.registers", "missing table: every input and output needs its register "
                                "(address, and optionally type, scale, offset)")
        registers = {}
    c.no_unknown(registers, [s.name for s in (*rig.outputs, *rig.inputs)], "link.registers")
    sensors: list[dict[str, Any]] = []
    commands: list[dict[str, Any]] = []
    for group, signals, tables in (("outputs", rig.outputs, ("input", "discrete")),
                                   ("inputs", rig.inputs, ("holding", "coil"))):
        for s in signals:
            spec = _register(c, registers, s.name, group, tables)
            if spec is not None:
                (sensors if group == "outputs" else commands).append(spec)
    _check_overlaps(c, out, [*sensors, *commands])
    out["map"] = {"sensors": sensors, "commands": commands, "word_order": out["word_order"],
                  "status_address": out["status_address"],
                  "echo_address": out["echo_address"]}
    return out


def _register(c: Checker, registers: dict[str, Any], name: str, group: str,
              tables: tuple[str, str]) -> dict[str, Any] | None:
    """One signal's register: its table, address, type, scale and offset."""
    where = f"link.registers.{name}"
    entry = registers.get(name)
    if not isinstance(entry, dict):
        if registers:
            c.add(where, f"missing: plant.{group} {name!r} needs its register "
                         "(e.g. { address = 4, type = \"float32\" })")
        return None
    c.no_unknown(entry, REGISTER_KEYS, where)
    if "address" not in entry:
        c.add(f"{where}.address", "missing")
    kind = c.value(entry, "type", where, "float32", one_of(tuple(REGISTER_TYPES)))
    scale = c.value(entry, "scale", where, 1.0, finite_number)
    if scale == 0:
        c.add(f"{where}.scale", "expected a non-zero number, found 0")
        scale = 1.0
    return {"name": name, "table": tables[1] if kind == "bool" else tables[0],
            "address": int(c.value(entry, "address", where, 0, _address)), "type": kind,
            "scale": float(scale), "offset": float(c.value(entry, "offset", where, 0.0,
                                                           finite_number))}


def _check_overlaps(c: Checker, out: dict[str, Any], specs: list[dict[str, Any]]) -> None:
    """No two signals (nor a signal and the fixed registers) share a register."""
    fixed = [("input", out["status_address"], 4, "the status registers (tick, state)"),
             ("holding", out["echo_address"], 2, "the echo registers")]
    used: dict[tuple[str, int], str] = {}
    for table_name, base, width, what in fixed:
        for a in range(base, base + width):
            used[(table_name, a)] = what
    for spec in specs:
        start = spec["address"]
        for a in range(start, start + REGISTER_TYPES[spec["type"]]):
            where = f"link.registers.{spec['name']}.address"
            if a >= ADDRESS_LIMIT:
                c.add(where, "runs past register 65535")
                break
            other = used.get((spec["table"], a))
            if other:
                c.add(where, f"{spec['table']} register {a} is already {other}")
                break
            used[(spec["table"], a)] = f"used by {spec['name']}"
