"""ModbusLink: the tick loop's side of a controller that polls the rig over Modbus.

The rig is the Modbus server (slave): the controller (a PLC, a board, the reference
controller) reads the sensor values from input registers and writes its command to
holding registers. The pymodbus server runs in its own process
(plantrig.io._modbus_worker; a busy thread in the loop's process would delay its
wake-ups, docs/platform.md) and meets the loop through a non-blocking socket pair, as
the MQTT link does. The watchdog runs here on plant ticks and counts the controller's
accepted writes: no accepted write for ``watchdog_timeout`` is ``link_lost``.

[link] keys of kind "modbus" are checked by check_modbus_keys (docs/modbus_link.md).
"""

from __future__ import annotations

import json
import select
import socket
import subprocess
import sys
import time
from typing import Any

import numpy as np

from plantrig.io._modbus_config import modbus_setup
from plantrig.io._modbus_worker import STATE_STRUCT, command_struct, sensor_struct
from plantrig.io._rig_state import RigState
from plantrig.sim import Event, LinkSettings, Rig, Vector, silent_ticks_allowed

SOCKET_BUFFER = 1 << 16
LATENCY_BINS = 64
OPEN_TIMEOUT_S = 10.0
CLOSE_WAIT_S = 2.0
# the server process: `python -m` imports plantrig.io's light __init__ and the worker
# module with what it needs (pymodbus), never the simulator
WORKER_COMMAND = [sys.executable, "-m", "plantrig.io._modbus_worker"]


class ModbusLink:
    """A ControllerLink over Modbus TCP or RTU (see the module doc)."""

    def __init__(self, rig: Rig, settings: LinkSettings, port: Any = None) -> None:
        self.settings = settings
        self.setup = modbus_setup(rig, settings, port)
        self.tick = rig.tick
        self.m, self.p = len(rig.inputs), len(rig.outputs)
        self._sensor = sensor_struct(self.p)
        self._command = command_struct(self.m)
        self._out = bytearray(self._sensor.size)
        self._in = bytearray(65536)
        self._newest = np.zeros(self.m)
        self.watchdog_ticks = silent_ticks_allowed(settings.watchdog_timeout, rig.tick)
        self.lockstep = settings.lockstep
        self.rig_state = RigState.for_rig(rig)
        self._sock: socket.socket | None = None
        self._worker: subprocess.Popen[bytes] | None = None
        self._events: list[Event] = []
        self._worker_health: dict[str, float] = {}
        self._health_raw: bytes | None = None
        self.last_valid_tick: int | None = None
        self.last_echo = -2
        self.lost = False
        self._gone = False
        self._fresh = False
        self.counts = dict.fromkeys(("commands_used", "superseded", "dropped_to_worker",
                                     "missed_ticks", "late", "link_lost", "link_restored"), 0)
        self.age_hist = np.zeros(LATENCY_BINS, dtype=np.int64)

    # ---- ControllerLink -------------------------------------------------------------
    def open(self) -> None:
        """Start the server process; wait until it listens (or says why it cannot)."""
        if self._sock is not None:
            return
        mine, theirs = socket.socketpair(socket.AF_UNIX, socket.SOCK_SEQPACKET)
        for s in (mine, theirs):
            s.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, SOCKET_BUFFER)
            s.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, SOCKET_BUFFER)
        mine.send(json.dumps(self.setup).encode())
        self._worker = subprocess.Popen([*WORKER_COMMAND, str(theirs.fileno())],
                                        pass_fds=(theirs.fileno(),), stdin=subprocess.DEVNULL)
        theirs.close()
        mine.setblocking(False)
        self._sock = mine
        deadline = time.monotonic() + OPEN_TIMEOUT_S
        while time.monotonic() < deadline and not self._gone:
            select.select([mine], [], [], max(0.0, deadline - time.monotonic()))
            if any(e.kind in ("link_listening", "link_not_connected")
                   for e in self._drain(-1, 0.0)):
                return
        self._events.append(Event(-1, 0.0, "link_not_connected",
                                  f"the Modbus server did not start within {OPEN_TIMEOUT_S} s"))

    def receive(self, tick: int, t: float, out: Vector) -> bool:
        self._drain(tick, t)
        if self.lockstep and not self.lost and self.last_echo < tick - 1:
            self._wait_for_answer(tick, t)
        if self.last_valid_tick is None:
            self.last_valid_tick = tick  # the watchdog starts with the first tick
        if self._fresh:
            self._fresh = False
            out[:] = self._newest
            if self.lost:
                self.lost = False
                self.counts["link_restored"] += 1
                self._events.append(Event(tick, t, "link_restored", "accepted writes again"))
            self.last_valid_tick = tick
            self.counts["commands_used"] += 1
            if self.last_echo >= -1:
                age = tick - self.last_echo
                self.age_hist[min(max(age, 0), LATENCY_BINS - 1)] += 1
                if age > 1:
                    self.counts["late"] += 1
            return True
        if tick > 0:
            self.counts["missed_ticks"] += 1
        if not self.lost and tick - self.last_valid_tick > self.watchdog_ticks:
            self.lost = True
            self.counts["link_lost"] += 1
            silent = (tick - self.last_valid_tick) * self.tick
            self._events.append(Event(tick, t, "link_lost", f"watchdog: no accepted write for "
                                      f"{silent:.3f} s (timeout "
                                      f"{self.settings.watchdog_timeout:g} s)"))
        return False

    def send(self, tick: int, t: float, values: Vector) -> None:
        if self._sock is None or self._gone:
            self.counts["dropped_to_worker"] += 1
            return
        self._sensor.pack_into(self._out, 0, b"S", tick, *values)
        try:
            self._sock.send(self._out)
        except BlockingIOError:
            self.counts["dropped_to_worker"] += 1
        except OSError as exc:
            self._worker_gone(tick, t, f"send failed: {exc}")

    def state(self, tick: int, state: str, detail: str = "") -> None:
        """The rig's run state: the worker puts it in the status input registers."""
        self.rig_state.set(tick, state, detail)
        if self._sock is not None and not self._gone:
            try:
                self._sock.send(STATE_STRUCT.pack(b"T", self.rig_state.code,
                                                  self.rig_state.detail))
            except OSError:
                self.counts["dropped_to_worker"] += 1

    def drain_events(self) -> list[Event]:
        events, self._events = self._events, []
        return events

    def health(self) -> dict[str, float]:
        """The worker's counters (at most 0.1 s old) and the loop's own."""
        if self._health_raw is not None:
            try:
                self._worker_health = json.loads(self._health_raw)
            except ValueError:
                pass
            self._health_raw = None
        h = {k: float(v) for k, v in self._worker_health.items()}
        h.update({k: float(v) for k, v in self.counts.items()})
        h["dropped_out"] = h.get("dropped_out", 0.0) + h["dropped_to_worker"]
        total = int(self.age_hist.sum())
        if total:
            cum = np.cumsum(self.age_hist)
            h["latency_ticks_p50"] = float(np.searchsorted(cum, (total + 1) // 2))
            h["latency_ticks_max"] = float(np.flatnonzero(self.age_hist)[-1])
        return h

    def describe(self) -> dict[str, Any]:
        s = self.setup
        where = (f"{s['host']}:{s['port']}" if s["transport"] == "tcp" else
                 f"{s['serial_port']} {s['baud']} {s['parity']}")
        return {"kind": "modbus", "transport": s["transport"], "address": where,
                "unit_id": s["unit_id"], "word_order": s["word_order"]}

    def close(self) -> None:
        sock, worker = self._sock, self._worker
        if sock is None:
            return
        if not self._gone:
            try:
                sock.send(b"Q")
            except OSError:
                pass
            deadline = time.monotonic() + CLOSE_WAIT_S
            while time.monotonic() < deadline and not self._gone:
                select.select([sock], [], [], max(0.0, deadline - time.monotonic()))
                self._drain(-1, 0.0)
        if worker is not None:
            try:
                worker.wait(timeout=CLOSE_WAIT_S)
            except subprocess.TimeoutExpired:
                worker.kill()
                worker.wait(timeout=1.0)
        sock.close()
        self._sock = self._worker = None

    # ---- helpers --------------------------------------------------------------------
    def _wait_for_answer(self, tick: int, t: float) -> None:
        """Lockstep (fast runs only): wait up to watchdog_timeout for a write echoing
        tick - 1, so the run does not depend on scheduling."""
        assert self._sock is not None
        deadline = time.monotonic() + self.settings.watchdog_timeout
        while self.last_echo < tick - 1 and not self._gone:
            left = deadline - time.monotonic()
            if left <= 0:
                return
            select.select([self._sock], [], [], left)
            self._drain(tick, t)

    def _worker_gone(self, tick: int, t: float, detail: str) -> None:
        if not self._gone:
            self._gone = True
            self._events.append(Event(tick, t, "link_worker_gone", detail))

    def _drain(self, tick: int, t: float) -> list[Event]:
        """Read every record from the worker; keep the newest command."""
        sock = self._sock
        new: list[Event] = []
        if sock is None or self._gone:
            return new
        buf, command = self._in, self._command
        while True:
            try:
                n = sock.recv_into(buf)
            except BlockingIOError:
                break
            except OSError as exc:
                self._worker_gone(tick, t, f"receive failed: {exc}")
                break
            if n == 0:
                self._worker_gone(tick, t, "the Modbus server process ended")
                break
            code = buf[0]
            if code == 0x43 and n == command.size:  # b"C"
                if self._fresh:
                    self.counts["superseded"] += 1
                _, echo, *values = command.unpack_from(buf)
                self._newest[:] = values
                if echo >= 0:
                    # the echo is a u32 tick; unwrap it near the current tick
                    self.last_echo = echo - ((echo - tick + (1 << 31)) // (1 << 32)) * (1 << 32)
                self._fresh = True
            elif code == 0x45:  # b"E"
                kind, _, detail = bytes(buf[1:n]).decode(errors="replace").partition("\t")
                ev = Event(tick, t, kind, detail)
                self._events.append(ev)
                new.append(ev)
            elif code == 0x48:  # b"H"
                self._health_raw = bytes(buf[1:n])
        return new

