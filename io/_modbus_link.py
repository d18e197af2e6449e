"""ModbusLink: the tick loop's side of a controller that polls the rig over Modbus.

The rig is the Modbus server (slave): the controller (a PLC, a board, the reference
controller) reads the sensor values from input registers and writes its command to
holding registers. The pymodbus server runs in its own process
(plantrig.io._modbus_worker; a busy thread in the loop's process would delay its
wake-ups, docs/platform.md) and meets the loop through a non-blocking socket pair, as
the MQTT link's worker does: the loop's side of it is plantrig.io._worker_link's. The
watchdog runs there on plant ticks and counts the controller's accepted writes: no
accepted write for ``watchdog_timeout`` is ``link_lost``.

[link] keys of kind "modbus" are checked by check_modbus_keys (docs/modbus_link.md).
"""

from __future__ import annotations

import json
import sys
from typing import Any

from plantrig.io._modbus_config import modbus_setup
from plantrig.io._modbus_worker import STATE_STRUCT, command_struct, sensor_struct
from plantrig.io._rig_state import RigState
from plantrig.io._worker_link import WorkerLink
from plantrig.sim import Event, LinkSettings, Rig, Vector

OPEN_TIMEOUT_S = 10.0
# the server process: `python -m` imports plantrig.io's light __init__ and the worker
# module with what it needs (pymodbus), never the simulator
WORKER_COMMAND = [sys.executable, "-m", "plantrig.io._modbus_worker"]


class ServerNotListening(OSError):
    """The Modbus server could not start listening; says why."""


class ModbusLink(WorkerLink):
    """A ControllerLink over Modbus TCP or RTU (see the module doc)."""

    LOST_TEXT = "no accepted write for {seconds:.3f} s"
    RESTORED_TEXT = "accepted writes again"
    GONE_TEXT = "the Modbus server process ended"

    def __init__(self, rig: Rig, settings: LinkSettings, port: Any = None) -> None:
        super().__init__(tick=rig.tick, n_inputs=len(rig.inputs), n_outputs=len(rig.outputs),
                         watchdog_timeout=settings.watchdog_timeout,
                         lockstep=settings.lockstep, rig_state=RigState.for_rig(rig),
                         sensor=sensor_struct(len(rig.outputs)),
                         command=command_struct(len(rig.inputs)))
        self.settings = settings
        self.setup = modbus_setup(rig, settings, port)

    def open(self) -> None:
        """Start the server process; wait until it listens. A server that cannot listen
        (the address in use, a line setting the port refuses) raises ServerNotListening with its
        cause, so the run ends at tick 0 as with a serial port that cannot open."""
        if self._sock is not None:
            return
        self._socket_pair()
        self._start_process(WORKER_COMMAND, json.dumps(self.setup).encode())
        started = self._await_events({"link_listening", "link_not_connected"},
                                     OPEN_TIMEOUT_S)
        refused = [e.detail for e in self._events if e.kind == "link_not_connected"]
        if refused or self._gone:
            raise ServerNotListening(refused[-1] if refused else "Modbus server: its "
                                     "process ended before it listened")
        if not started:
            self._events.append(Event(-1, 0.0, "link_not_connected", "the Modbus server "
                                      f"did not start within {OPEN_TIMEOUT_S} s"))

    def describe(self) -> dict[str, Any]:
        s = self.setup
        where = (f"{s['host']}:{s['port']}" if s["transport"] == "tcp" else
                 f"{s['serial_port']} {s['baud']} {s['parity']}")
        return {"kind": "modbus", "transport": s["transport"], "address": where,
                "unit_id": s["unit_id"], "word_order": s["word_order"]}

    # ---- the records of the Modbus server process -----------------------------------
    def _pack_sensor(self, tick: int, t: float, values: Vector) -> None:
        self._sensor.pack_into(self._out, 0, b"S", tick, *values)

    def _state_record(self) -> bytes:
        # the worker puts it in the status input registers
        return STATE_STRUCT.pack(b"T", self.rig_state.code, self.rig_state.detail)

    def _take_command(self, buf: bytearray, tick: int) -> None:
        _, echo, *values = self._command.unpack_from(buf)
        self._newest[:] = values
        if echo >= 0:
            # the echo is a u32 tick; unwrap it near the current tick
            self.last_echo_tick = echo - ((echo - tick + (1 << 31)) // (1 << 32)) * (1 << 32)
