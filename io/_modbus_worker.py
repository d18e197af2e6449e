"""The Modbus side of the link: a pymodbus server (TCP or RTU) in its own process.

The rig is the server (slave) the controller polls. This worker keeps the register
image, checks every request against the rig's register map (plantrig.io._modbus_map)
and answers refused ones with the protocol's exception responses; only a write that
passes every check becomes a command for the tick loop. Exception codes (Modbus
application protocol, section 7; from memory): 01 illegal function, 02 illegal data
address, 03 illegal data value.

The loop and this worker meet through one AF_UNIX SOCK_SEQPACKET socket pair, as the
MQTT link does (one datagram per record, non-blocking, a full buffer drops the newest)::

    loop -> worker   b"S" + <q {p}d>     sensor values of a tick: tick, values
                     b"T" + <hh>         the rig's run state and detail codes
                     b"h"                send the health counters now (the run's end)
                     b"Q"                close: stop serving, exit
    worker -> loop   b"C" + <q {m}d>     a command: echoed tick (-1: not written), values
                     b"E" + kind TAB detail   an event for the run record
                     b"H" + JSON         health counters (every 0.1 s and at the end)
                     b"h" + JSON         the same, answering b"h"
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import math
import os
import socket
import struct
import sys
import termios
from typing import Any

from pymodbus.constants import ExcCodes
from pymodbus.framer import FramerType
from pymodbus.pdu import ExceptionResponse, ModbusPDU
from pymodbus.server import ModbusSerialServer, ModbusTcpServer
from pymodbus.server.requesthandler import ServerRequestHandler
from pymodbus.simulator import SimData, SimDevice

from plantrig.io._modbus_map import (
    RegisterMap,
    RegisterSpec,
    ValueRefused,
    decode_value,
    encode_value,
    join_words,
    split_words,
)

HEALTH_PERIOD_S = 0.1
END_GRACE_S = 0.3     # answers kept up after the run ended (see _on_loop_readable)
FIFO_PRIORITY = 5      # below the rig's loop (10); the server only wakes for requests
# the function codes served; every other one is answered with exception 01
SERVED = (1, 2, 3, 4, 5, 6, 15, 16, 23)
BIT_TABLES = ("coil", "discrete")
TABLE_OF_FC = {1: "coil", 5: "coil", 15: "coil", 2: "discrete", 3: "holding", 6: "holding",
               16: "holding", 23: "holding", 4: "input"}
_STATUS, _ECHO = "status", "echo"


def sensor_struct(n: int) -> struct.Struct:
    return struct.Struct(f"<cq{n}d")


def command_struct(n: int) -> struct.Struct:
    return struct.Struct(f"<cq{n}d")


STATE_STRUCT = struct.Struct("<chh")


class _Unserved(ModbusPDU):
    """A request with a function code the rig does not serve: answered with exception
    01 under its own function code (pymodbus alone answers an unknown code with
    function code 0x80, which a client cannot match to its request)."""

    def decode(self, data: bytes) -> None:
        self.payload = data

    @classmethod
    def calculateRtuFrameSize(cls, data: bytes) -> int:
        return len(data)      # RTU: no length field to go by; the frame is what arrived

    async def datastore_update(self, context: Any, device_id: int) -> ModbusPDU:
        return ExceptionResponse(self.function_code, ExcCodes.ILLEGAL_FUNCTION)


_RequestPair = tuple[type[ModbusPDU], type[ModbusPDU]]   # request and response classes


class ServedTable(dict[int, _RequestPair]):
    """The decoder's table of request classes: the served ones, _Unserved for the rest."""

    def __init__(self, table: dict[int, _RequestPair]) -> None:
        super().__init__({fc: entry for fc, entry in table.items() if fc in SERVED})
        self.refused = {fc: type(f"Unserved{fc}", (_Unserved,), {"function_code": fc})
                        for fc in range(1, 0x80) if fc not in SERVED}

    def get(self, fc: int, default: Any = None) -> Any:
        if fc in self:
            return self[fc]
        cls = self.refused.get(fc)
        return (cls, cls) if cls is not None else default


class _InLoopHandler(ServerRequestHandler):
    """pymodbus' request handler, serving each decoded request as a task of the server's
    own event loop. pymodbus hands it over with run_coroutine_threadsafe although it is
    already on that loop: a write to the loop's self-pipe, a read back and another pass
    of the loop for every request. Without them the worker needs about a quarter less
    CPU (20,000 fuzzed requests over four connections: 3.8-4.3 s with, 2.9-3.1 s
    without), CPU the rig's loop on the same machine keeps."""

    def __init__(self, *args: Any) -> None:
        super().__init__(*args)
        self._serving: set[asyncio.Task[None]] = set()   # the loop holds tasks weakly

    def handle_later(self) -> None:
        task = self.loop.create_task(self.handle_request())
        self._serving.add(task)
        task.add_done_callback(self._serving.discard)


class _TcpServer(ModbusTcpServer):
    def callback_new_connection(self) -> ServerRequestHandler:
        return _InLoopHandler(self, self.trace_packet, self.trace_pdu, self.trace_connect)


class _SerialServer(ModbusSerialServer):
    def callback_new_connection(self) -> ServerRequestHandler:
        return _InLoopHandler(self, self.trace_packet, self.trace_pdu, self.trace_connect)


class RegisterImage:
    """The register image and its checks, as a pymodbus server context.

    pymodbus calls ``async_getValues`` / ``async_setValues`` for every request it
    decoded; returning an ExcCodes member makes it send that exception response.
    """

    def __init__(self, regs: RegisterMap, lo: tuple[float, ...], hi: tuple[float, ...],
                 clamp: bool, unit_id: int, on_command: Any, on_refused: Any) -> None:
        self.map = regs
        self.order = regs.word_order
        self.lo, self.hi, self.clamp = lo, hi, clamp
        self.unit_id = unit_id
        self.on_command, self.on_refused = on_command, on_refused
        # per table: address -> (owner, word index); owner a RegisterSpec or a fixed name
        self.cells: dict[str, dict[int, tuple[Any, int]]] = {t: {} for t in TABLE_OF_FC.values()}
        self.words: dict[str, dict[int, int]] = {t: {} for t in TABLE_OF_FC.values()}
        for spec in (*regs.sensors, *regs.commands):
            self._place(spec.table, spec.address, spec, spec.width)
        self._place("input", regs.status_address, _STATUS, 4)
        self._place("holding", regs.echo_address, _ECHO, 2)
        self.command_index = {spec.name: i for i, spec in enumerate(regs.commands)}
        self.command = [self._initial(spec, i) for i, spec in enumerate(regs.commands)]
        self.clamped = 0

    def _place(self, table: str, address: int, owner: Any, width: int) -> None:
        for i in range(width):
            self.cells[table][address + i] = (owner, i)
            self.words[table][address + i] = 0

    def _initial(self, spec: RegisterSpec, i: int) -> float:
        """Commands start at the input's safe-side value 0 clipped into its range."""
        value = min(max(0.0, self.lo[i]), self.hi[i])
        self._store(spec, value)
        return value

    def _store(self, spec: RegisterSpec, value: float) -> bool:
        words, clipped = encode_value(spec, value, self.order)
        for j, w in enumerate(words):
            self.words[spec.table][spec.address + j] = w
        return clipped

    # -- what the loop writes ----------------------------------------------------------
    def put_sensors(self, tick: int, values: tuple[float, ...]) -> int:
        """Store one tick's sensor values; how many had to be clipped to their type."""
        clipped = 0
        for spec, v in zip(self.map.sensors, values, strict=True):
            clipped += self._store(spec, v)
        hi, lo = split_words(tick & 0xFFFFFFFF, self.order)
        base, w = self.map.status_address, self.words["input"]
        w[base], w[base + 1] = hi, lo
        return clipped

    def put_state(self, code: int, detail: int) -> None:
        base, w = self.map.status_address, self.words["input"]
        w[base + 2], w[base + 3] = code & 0xFFFF, detail & 0xFFFF

    # -- pymodbus context --------------------------------------------------------------
    def device_ids(self) -> list[int]:
        return [self.unit_id]

    async def async_getValues(self, device_id: int, func_code: int, address: int,
                              count: int = 1) -> list[int] | list[bool] | ExcCodes:
        table = TABLE_OF_FC.get(func_code)
        if table is None:
            return self._refuse(ExcCodes.ILLEGAL_FUNCTION, "function", f"function {func_code}")
        cells, words = self.cells[table], self.words[table]
        try:
            out = [words[a] for a in range(address, address + count)]
        except KeyError:
            return self._refuse(ExcCodes.ILLEGAL_ADDRESS, "address",
                                f"read of {table} {address}..{address + count - 1}: "
                                f"{self._unmapped(cells, address, count)} is not mapped")
        if table in BIT_TABLES:
            return [bool(v) for v in out]
        return out

    async def async_setValues(self, device_id: int, func_code: int, address: int,
                              values: list[int] | list[bool]) -> ExcCodes | None:
        table = TABLE_OF_FC.get(func_code)
        if table not in ("holding", "coil"):
            return self._refuse(ExcCodes.ILLEGAL_FUNCTION, "function", f"function {func_code}")
        cells = self.cells[table]
        end = address + len(values)
        touched: dict[Any, int] = {}
        for a in range(address, end):
            if a not in cells:
                return self._refuse(ExcCodes.ILLEGAL_ADDRESS, "address",
                                    f"write to {table} {address}..{end - 1}: {a} is not a "
                                    "command register")
            owner, _ = cells[a]
            touched[owner] = touched.get(owner, 0) + 1
        for owner, n in touched.items():
            width = owner.width if isinstance(owner, RegisterSpec) else 2
            if n != width:
                name = owner.name if isinstance(owner, RegisterSpec) else "echo"
                return self._refuse(ExcCodes.ILLEGAL_ADDRESS, "partial",
                                    f"write covers {n} of the {width} registers of {name}")
        image = dict(self.words[table])
        for a, word in zip(range(address, end), values, strict=True):
            image[a] = int(word)
        command = list(self.command)
        clamped = False
        for owner in touched:
            if owner == _ECHO:
                continue
            i = self.command_index[owner.name]
            words = [image[owner.address + j] for j in range(owner.width)]
            try:
                v = decode_value(owner, words, self.order)
            except ValueRefused as exc:
                return self._refuse(ExcCodes.ILLEGAL_VALUE, exc.reason, str(exc))
            if not self.lo[i] <= v <= self.hi[i]:
                if not self.clamp:
                    return self._refuse(ExcCodes.ILLEGAL_VALUE, "range",
                                        f"{owner.name} = {v:g} outside "
                                        f"[{self.lo[i]:g}, {self.hi[i]:g}]")
                v = min(max(v, self.lo[i]), self.hi[i])
                clamped = True
            command[i] = v
        self.words[table] = image
        self.command = command
        echo = -1
        if _ECHO in touched:
            base = self.map.echo_address
            echo = join_words(image[base], image[base + 1], self.order)
        if clamped:
            self.clamped += 1
            for spec in self.map.commands:       # the registers hold what is used
                self._store(spec, command[self.command_index[spec.name]])
        self.on_command(echo, command, clamped)
        return None

    def _refuse(self, code: ExcCodes, reason: str, detail: str) -> ExcCodes:
        self.on_refused(code, reason, detail)
        return code

    @staticmethod
    def _unmapped(cells: dict[int, Any], address: int, count: int) -> int:
        return next(a for a in range(address, address + count) if a not in cells)


class Worker:
    """One Modbus server for the life of a run."""

    def __init__(self, setup: dict[str, Any], sock: socket.socket) -> None:
        self.setup = setup
        self.sock = sock
        self.regs = RegisterMap.from_json(setup["map"])
        self.n: dict[str, float] = {}
        self.gate: dict[str, int] = {}
        self.sensor_rec = sensor_struct(len(self.regs.sensors))
        self.command_rec = command_struct(len(self.regs.commands))
        self.image = RegisterImage(self.regs, tuple(setup["lo"]), tuple(setup["hi"]),
                                   setup["out_of_range"] == "clamp", setup["unit_id"],
                                   self._command, self._refused)
        self.server: Any = None
        self.held_state: tuple[int, int] | None = None   # until the first sensor values

    def inc(self, key: str, by: float = 1.0) -> None:
        self.n[key] = self.n.get(key, 0.0) + by

    def _to_loop(self, record: bytes) -> None:
        try:
            self.sock.send(record)
        except BlockingIOError:
            self.inc("dropped_to_loop")
        except OSError:
            self.stopping.set()

    def event(self, kind: str, detail: str, key: str) -> None:
        """Pass an event on: the first events_per_kind of each key, then 10x, 100x, ..."""
        n = self.gate.get(key, 0) + 1
        self.gate[key] = n
        per = self.setup["events_per_kind"]
        if n <= per:
            self._to_loop(b"E" + f"{kind}\t{detail}".encode()[:60_000])
            return
        q = n / per
        if q == int(q) and 10 ** round(math.log10(q)) == q:
            self._to_loop(b"E" + (f"events_suppressed\t{key}: {n} so far; the first {per} "
                                  "are itemised, link health has the totals").encode())

    def _command(self, echo: int, values: list[float], clamped: bool) -> None:
        self.inc("commands_in")
        if clamped:
            self.inc("clamped")
            self.event("clamped_command", f"clamped to the input range: {values}",
                       "clamped_command")
        self._to_loop(self.command_rec.pack(b"C", echo, *values))

    def _refused(self, code: ExcCodes, reason: str, detail: str) -> None:
        rejected = reason == "range"
        self.inc(f"{'rejected' if rejected else 'bad'}_{reason}")
        kind = "rejected_command" if rejected else "bad_frame"
        self.event(kind, f"{reason}: {detail}; exception {int(code):02d}", f"{kind}:{reason}")

    def trace_pdu(self, sending: bool, pdu: ModbusPDU) -> ModbusPDU:
        """Count requests in and exception responses out (pymodbus' own among them)."""
        if not sending:
            self.inc("frames_in")
        elif isinstance(pdu, ExceptionResponse):
            code = int(pdu.exception_code)
            self.inc(f"exceptions_{code:02d}")
            fc = pdu.function_code & 0x7F
            if code == ExcCodes.ILLEGAL_FUNCTION and fc not in SERVED:
                self.inc("bad_function")
                self.event("bad_frame", f"function: function code {fc} is not served; "
                                        "exception 01", "bad_frame:function")
        return pdu

    def trace_connect(self, connected: bool) -> None:
        self.inc("connects" if connected else "disconnects")

    def health(self) -> dict[str, float]:
        h = dict(self.n)
        h["clamped"] = float(self.image.clamped)
        return h

    def _on_loop_readable(self) -> None:
        while True:
            try:
                rec = self.sock.recv(65536)
            except BlockingIOError:
                return
            except OSError:
                rec = b""
            if not rec:
                self.stopping.set()
                return
            code = rec[:1]
            if code == b"S" and len(rec) == self.sensor_rec.size:
                _, tick, *values = self.sensor_rec.unpack(rec)
                clipped = self.image.put_sensors(tick, tuple(values))
                self.inc("frames_out")
                if clipped:
                    self.inc("sensor_clipped", clipped)
                if self.held_state is not None:
                    self.image.put_state(*self.held_state)
                    self.held_state = None
            elif code == b"T" and len(rec) == STATE_STRUCT.size:
                _, state, detail = STATE_STRUCT.unpack(rec)
                if not self.n.get("frames_out"):
                    # no sensor values yet: the registers still hold zeros, which a
                    # controller would read as tick 0; say "running" with the first values
                    self.held_state = (state, detail)
                else:
                    self.image.put_state(state, detail)
                self.inc("status_out")
            elif code == b"h":
                self._to_loop(b"h" + json.dumps(self.health()).encode())
            elif code == b"Q":
                # after the end state, keep answering a moment so a polling controller
                # reads how the run ended (the rig's run state registers)
                grace = END_GRACE_S if self.image.words["input"][
                    self.regs.status_address + 2] >= 3 else 0.0
                asyncio.get_running_loop().call_later(grace, self.stopping.set)
                return
            else:
                self.inc("bad_loop_records")

    def _server(self) -> ModbusTcpServer | ModbusSerialServer:
        s = self.setup
        # pymodbus wants a device to build; the register image replaces its datastore
        placeholder = SimDevice(id=s["unit_id"], simdata=[SimData(0)])
        server: ModbusTcpServer | ModbusSerialServer
        if s["transport"] == "tcp":
            server = _TcpServer(placeholder, address=(s["host"], s["port"]),
                                trace_pdu=self.trace_pdu, trace_connect=self.trace_connect)
        else:
            server = _SerialServer(placeholder, framer=FramerType.RTU,
                                   port=s["serial_port"], baudrate=s["baud"],
                                   parity=s["parity"][0].upper(),
                                   stopbits=s["stop_bits"], bytesize=s["byte_size"],
                                   trace_pdu=self.trace_pdu, trace_connect=self.trace_connect)
        # pymodbus types context as its own two datastores, but its server only calls
        # device_ids and async_getValues/async_setValues, which RegisterImage provides
        server.context = self.image  # type: ignore[assignment]
        server.decoder.pdu_table = ServedTable(server.decoder.pdu_table)
        return server

    async def run(self) -> None:
        loop = asyncio.get_running_loop()
        self.stopping = asyncio.Event()
        self.sock.setblocking(False)
        loop.add_reader(self.sock.fileno(), self._on_loop_readable)
        try:
            self.server = self._server()
            await self.server.serve_forever(background=True)
        except (OSError, ValueError, RuntimeError, termios.error) as exc:
            why = (f"the serial port refused the line settings (baud, parity, stop bits: "
                   f"{exc}); a pseudo-terminal takes no parity" if isinstance(exc, termios.error)
                   else f"could not listen on {describe(self.setup)} (in use, or not an "
                        f"address of this machine)" if isinstance(exc, RuntimeError)
                   else str(exc))
            self._to_loop(b"E" + f"link_not_connected\tModbus server: {why}".encode())
            self._to_loop(b"H" + json.dumps(self.health()).encode())
            loop.remove_reader(self.sock.fileno())
            return
        self._to_loop(b"E" + f"link_listening\t{describe(self.setup)}".encode())
        try:
            while not self.stopping.is_set():
                self._to_loop(b"H" + json.dumps(self.health()).encode())
                with contextlib.suppress(asyncio.TimeoutError):
                    await asyncio.wait_for(self.stopping.wait(), HEALTH_PERIOD_S)
        finally:
            loop.remove_reader(self.sock.fileno())
            with contextlib.suppress(Exception):
                await self.server.shutdown()
            self._to_loop(b"H" + json.dumps(self.health()).encode())


def describe(setup: dict[str, Any]) -> str:
    if setup["transport"] == "tcp":
        return f"Modbus TCP on {setup['host']}:{setup['port']}, unit {setup['unit_id']}"
    return (f"Modbus RTU on {setup['serial_port']} at {setup['baud']} baud, unit "
            f"{setup['unit_id']}")


def worker_main(setup: dict[str, Any], sock: socket.socket) -> None:
    try:
        asyncio.run(Worker(setup, sock).run())
    finally:
        with contextlib.suppress(OSError):
            sock.close()


def process_main(argv: list[str]) -> int:
    """Entry point of the worker process: argv[1] is the socket's fd; the first record
    on it is the JSON setup."""
    with contextlib.suppress(OSError, AttributeError):   # where permitted, as the
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(FIFO_PRIORITY))  # controller
    sock = socket.socket(fileno=int(argv[1]))
    sock.setblocking(True)
    setup = json.loads(sock.recv(1 << 20))
    with contextlib.suppress(KeyboardInterrupt):
        worker_main(setup, sock)
    return 0


if __name__ == "__main__":
    sys.exit(process_main(sys.argv))
