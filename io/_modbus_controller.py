"""The reference controller as a Modbus client (master), the way a PLC polls the rig.

Each cycle: read the status and sensor input registers; when the sensor tick has moved
on, compute the command for the next tick with the rig file's [link.controller] law
(ReferenceController.command_for, as over serial) and write it, with the echoed tick,
to the holding registers. Contiguous registers go in one request (function 04 to read,
16 to write), as a PLC's scan would group them. pymodbus' synchronous client is used:
the controller has nothing else to do while it waits for an answer.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

from plantrig.io._modbus_map import (
    RegisterMap,
    decode_value,
    encode_value,
    join_words,
    split_words,
)
from plantrig.io._refcontroller import ReferenceController
from plantrig.io._rig_state import STATE_CODES

Run = tuple[int, int]   # (first address, count)


def runs(addresses: list[int]) -> list[Run]:
    """Contiguous runs of register addresses, each one request (at most 120 registers)."""
    out: list[Run] = []
    for a in sorted(set(addresses)):
        if out and out[-1][0] + out[-1][1] == a and out[-1][1] < 120:
            out[-1] = (out[-1][0], out[-1][1] + 1)
        else:
            out.append((a, 1))
    return out


class ModbusPoller:
    """Reads the rig's registers and writes commands through a pymodbus client."""

    def __init__(self, controller: ReferenceController, regs: RegisterMap, client: Any,
                 unit_id: int) -> None:
        self.controller = controller
        self.regs = regs
        self.client = client
        self.unit = unit_id
        order = regs.word_order
        self.order = order
        status = list(range(regs.status_address, regs.status_address + 4))
        self.input_runs = runs(status + [a for s in regs.sensors if s.table == "input"
                                         for a in range(s.address, s.address + s.width)])
        self.discrete = [s for s in regs.sensors if s.table == "discrete"]
        self.write_specs = [s for s in regs.commands if s.table == "holding"]
        self.coils = [s for s in regs.commands if s.table == "coil"]
        self.holding_runs = runs(list(range(regs.echo_address, regs.echo_address + 2)) +
                                 [a for s in self.write_specs
                                  for a in range(s.address, s.address + s.width)])
        self.last_tick: int | None = None
        self.errors = 0

    def _read(self) -> dict[int, int] | None:
        words: dict[int, int] = {}
        for first, count in self.input_runs:
            r = self.client.read_input_registers(first, count=count, device_id=self.unit)
            if r.isError():
                self.errors += 1
                return None
            words.update(zip(range(first, first + count), r.registers, strict=False))
        return words

    def cycle(self) -> bool:
        """One poll; True if it answered a new sensor tick."""
        words = self._read()
        if words is None:
            return False
        base = self.regs.status_address
        tick = join_words(words[base], words[base + 1], self.order)
        self.controller.on_rig_status((float(words[base + 2]), float(words[base + 3])))
        if tick == self.last_tick or words[base + 2] == STATE_CODES["idle"]:
            return False    # nothing new, or no values yet (the zeros read as tick 0)
        self.last_tick = tick
        values = [decode_value(s, [words[s.address + j] for j in range(s.width)], self.order)
                  for s in self.regs.sensors if s.table == "input"]
        for s in self.discrete:
            r = self.client.read_discrete_inputs(s.address, count=1, device_id=self.unit)
            values.insert(self.regs.sensors.index(s), float(bool(r.bits[0])))
        u = self.controller.command_for(tick, tuple(values))
        self._write(tick, u)
        return True

    def _write(self, tick: int, u: Any) -> None:
        image: dict[int, int] = {}
        image.update(zip((self.regs.echo_address, self.regs.echo_address + 1),
                         split_words(tick, self.order), strict=True))
        index = {s.name: i for i, s in enumerate(self.regs.commands)}
        for s in self.write_specs:
            words, _ = encode_value(s, float(u[index[s.name]]), self.order)
            image.update(zip(range(s.address, s.address + s.width), words, strict=True))
        for first, count in self.holding_runs:
            r = self.client.write_registers(first, [image[a] for a in range(first, first + count)],
                                            device_id=self.unit)
            if r.isError():
                self.errors += 1
        for s in self.coils:
            self.client.write_coil(s.address, bool(u[index[s.name]] >= 0.5), device_id=self.unit)


def run_modbus_controller(controller: ReferenceController, setup: dict[str, Any], *,
                          stop: Callable[[], bool], on_connected: Callable[[], None],
                          connect_timeout: float = 10.0) -> str:
    """Connect (retrying up to ``connect_timeout``), call ``on_connected``, then poll the
    rig until ``stop()`` or the server goes away; say why it ended."""
    from pymodbus.client import ModbusSerialClient, ModbusTcpClient
    from pymodbus.exceptions import ConnectionException, ModbusIOException

    regs = RegisterMap.from_json(setup["map"])
    if setup["transport"] == "tcp":
        client: Any = ModbusTcpClient(setup["host"], port=setup["port"], timeout=1,
                                      retries=0)
    else:
        client = ModbusSerialClient(setup["serial_port"], baudrate=setup["baud"],
                                    parity=setup["parity"][0].upper(),
                                    stopbits=setup["stop_bits"], timeout=0.5, retries=0)
    deadline = time.monotonic() + connect_timeout
    while not client.connect():
        if time.monotonic() > deadline or stop():
            return "no connection to the rig"
        time.sleep(0.05)
    poller = ModbusPoller(controller, regs, client, setup["unit_id"])
    on_connected()
    try:
        while not stop():
            try:
                if not poller.cycle():
                    time.sleep(0.0001)    # the rig's tick has not moved on yet
            except (ConnectionException, ModbusIOException, OSError) as exc:
                return f"the rig stopped answering ({type(exc).__name__})"
    finally:
        client.close()
        controller.counts.refused += poller.errors
    return "stopped"

