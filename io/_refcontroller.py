"""The reference controller: a worked example of the controller's end of a link.

Firmware authors can read this top to bottom as the shape of their main loop:

    1. wait for bytes (the transport's read returns within its poll time)
    2. cut them into frames and decode each one; drop bad, repeated or stale frames
    3. for each sensor frame stamped k: compute the command for tick k + 1 from its
       values and the references at t = (k + 1) * tick, and send it stamped k
    4. when nothing needed saying for heartbeat_period, send a heartbeat; send a
       status frame (binary mode) on start, on each change between waiting and
       running, and every status_period

It is paced by the rig's sensor frames, not by a clock of its own. The rig writes the
sensor frame of tick k at the end of tick k and reads commands at the start of tick
k + 1, so an answer that arrives within the tick is used exactly where the built-in
controller's would be: the closed loop over the wire equals the same rig run fast with
the law built in (to float32 rounding on a binary link; exactly in text mode).

The law is the rig file's [link.controller] table (same keys as [controller]), run with
plantrig.sim's own Pid / PidLoops / StateFeedback through build_controller. The
transport is pluggable: anything with read(), write() and close() (Transport below);
SerialTransport is the one for a UART or a pty.
"""

from __future__ import annotations

import dataclasses
import gc
import os
import select
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from plantrig.io._frames import TICK_MODULUS, FrameError, Kind, SeqTracker
from plantrig.io._pty import FdPort
from plantrig.io._wire import WireFormat
from plantrig.sim import ControllerSpec, LinkSettings, Rig, RigFileError, RigIssue, build_controller

WRITE_TIMEOUT_S = 0.05
FIFO_PRIORITY = 5   # below the rig's loop (plantrig.sim uses 10), above ordinary work

# status frame values: [state, detail, rx_ok, rx_bad, answered]
STATE_WAITING, STATE_RUNNING = 0.0, 1.0
# enum members as module names: Kind.X is an attribute lookup on the enum class each time
_SENSOR, _COMMAND = Kind.SENSOR, Kind.COMMAND
_QUIET_KINDS = frozenset({int(Kind.HEARTBEAT), int(Kind.STATUS)})  # not answered, not bad


class Transport(Protocol):
    """Moves bytes for the controller. read() waits at most its poll time and returns
    b"" if nothing came; read() and write() raise OSError when the far end is gone."""

    name: str

    def read(self) -> bytes: ...
    def write(self, data: bytes) -> bool: ...   # False: dropped (output buffer full)
    def close(self) -> None: ...


class SerialTransport:
    """A serial port (device path or pyserial URL) with the [link] line settings."""

    def __init__(self, port: str, options: dict[str, Any], poll_s: float) -> None:
        import serial
        self._timeout_error = serial.SerialTimeoutException
        parity = {"none": serial.PARITY_NONE, "even": serial.PARITY_EVEN,
                  "odd": serial.PARITY_ODD, "mark": serial.PARITY_MARK,
                  "space": serial.PARITY_SPACE}[options["parity"]]
        self.ser = serial.serial_for_url(port, baudrate=options["baud"],
                                         bytesize=options["byte_size"], parity=parity,
                                         stopbits=options["stop_bits"], timeout=poll_s,
                                         write_timeout=WRITE_TIMEOUT_S)
        self.name = port
        self.poll_s = poll_s
        # A POSIX device is driven through its fd: one select and one read per frame,
        # where pyserial spends an in_waiting ioctl, its read loop and a second ioctl.
        self._fd: FdPort | None = None
        if os.name == "posix" and isinstance(self.ser, serial.Serial):
            self._fd = FdPort(self.ser.fileno(), name=port, owns_fd=False)

    def read(self) -> bytes:
        if self._fd is not None:
            self._fd.wait_readable(self.poll_s)
            return self._fd.read_some()
        data = self.ser.read(max(1, self.ser.in_waiting))   # waits up to poll_s
        if data and self.ser.in_waiting:
            data += self.ser.read(self.ser.in_waiting)
        return bytes(data)

    def write(self, data: bytes) -> bool:
        if self._fd is not None:
            return _write_all(self._fd, data, WRITE_TIMEOUT_S)
        try:
            self.ser.write(data)
        except self._timeout_error:
            return False
        return True

    def close(self) -> None:
        self.ser.close()


def _write_all(port: FdPort, data: bytes, timeout_s: float) -> bool:
    """Write all of ``data``, waiting for room at most ``timeout_s``; False if it did not
    fit in time (the rest is dropped; the far end resynchronises at the next delimiter)."""
    view = memoryview(data)
    deadline = time.monotonic() + timeout_s
    while view:
        n = port.write_some(view)
        view = view[n:]
        if view:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                return False
            select.select([], [port.fd], [], remaining)
    return True


def law_spec(rig: Rig, settings: LinkSettings) -> ControllerSpec:
    """The law to run: [link.controller], or the rig's own [controller] if built in."""
    if settings.controller is not None:
        return settings.controller
    if rig.controller.kind != "external":
        return rig.controller
    raise RigFileError([RigIssue(str(rig.path), "link.controller",
                                 "missing table: the reference controller needs a law "
                                 "(kind = \"pid\", \"state_feedback\" or \"open_loop\", with "
                                 "the same keys as [controller])")])


@dataclass
class ControllerCounts:
    rx_ok: int = 0          # sensor frames answered
    rx_bad: int = 0         # frames that failed to decode, or sensor frames of wrong size
    duplicates: int = 0
    out_of_order: int = 0
    tx_dropped: int = 0     # frames the port would not take in time
    tx_errors: int = 0      # commands that could not be encoded (beyond the encoding)
    heartbeats: int = 0
    status: int = 0
    rig_heartbeats: int = 0
    connects: int = 0       # connections made (MQTT: to the broker)
    refused: int = 0        # requests the rig answered with an error (Modbus)
    # the rig's run state (a STATUS frame, the MQTT status document, the Modbus status
    # registers; docs/protocol.md 1.2) as "state/detail", in order, changes only
    rig_states: list[str] = dataclasses.field(default_factory=list)


# the counts the closing lines name for each kind of link, in this order; a kind of link
# says only what it can count (Modbus has no sequence numbers, serial no connections)
COUNT_WORDS = {"rx_ok": "answered", "rx_bad": "bad", "duplicates": "duplicates",
               "out_of_order": "out of order", "tx_dropped": "dropped",
               "tx_errors": "not encoded", "heartbeats": "heartbeats", "status": "status",
               "rig_heartbeats": "rig heartbeats", "connects": "connects",
               "refused": "refused by the rig"}
LINK_COUNTS = {
    "serial": ("rx_ok", "rx_bad", "duplicates", "out_of_order", "tx_dropped", "tx_errors",
               "heartbeats", "status", "rig_heartbeats"),
    "mqtt": ("rx_ok", "rx_bad", "duplicates", "out_of_order", "tx_dropped", "connects"),
    "modbus": ("rx_ok", "refused"),
}


def end_lines(kind: str, reason: str, counts: ControllerCounts) -> list[str]:
    """The reference controller's closing console lines, one form for every kind of
    link: why it ended and its counts (LINK_COUNTS[kind], always led by 'answered'),
    then the rig states it read, e.g.

        controller: the rig closed the link; answered 1501, bad 0, ..., connects 1
        controller: rig states running/0 ended/0
    """
    said = ", ".join(f"{COUNT_WORDS[name]} {getattr(counts, name)}" for name in LINK_COUNTS[kind])
    return [f"controller: {reason}; {said}",
            f"controller: rig states {' '.join(counts.rig_states) or 'none'}"]


RIG_STATE_NAMES = {0: "idle", 1: "running", 2: "tripped", 3: "fault", 4: "ended"}


def rig_state_word(values: tuple[float, ...]) -> str:
    """'tripped/1' for a rig STATUS [2, 1, ...]: the state's name and its detail code."""
    state = RIG_STATE_NAMES.get(int(values[0]), f"state{values[0]:g}")
    return f"{state}/{values[1]:g}"


class ReferenceController:
    """The law and the protocol, with no knowledge of the transport."""

    def __init__(self, rig: Rig, settings: LinkSettings) -> None:
        self.rig = rig
        self.settings = settings
        law = build_controller(dataclasses.replace(rig, controller=law_spec(rig, settings)))
        assert law is not None      # law_spec never gives kind "external", so a law is built
        self.law = law
        self.wire = WireFormat(settings.protocol, settings.encoding, settings.scale,
                               settings.checksum)
        self.splitter = self.wire.splitter()
        self.rx_seq = SeqTracker()
        self.tx_seq = 0
        self.tick_s = rig.tick
        self.references = [r.waveform for r in rig.references]
        self.y = np.zeros(len(rig.outputs))
        self.r = np.zeros(len(rig.references))
        # inputs no loop drives stay at their safe value, as in the engine
        self.u = np.array([s.safe for s in rig.inputs], dtype=np.float64)
        self.counts = ControllerCounts()
        self.last_tick = 0

    def _next_seq(self) -> int:
        seq = self.tx_seq
        self.tx_seq = (seq + 1) & 0xFFFF
        return seq

    def on_bytes(self, data: bytes) -> list[bytes]:
        """Feed received bytes; return the frames to send in answer, oldest first."""
        replies = []
        decode, rx_seq, counts, n_y = self.wire.decode, self.rx_seq, self.counts, len(self.y)
        for piece in self.splitter.feed(data):
            try:
                frame = decode(piece, _SENSOR)
            except FrameError:
                counts.rx_bad += 1
                continue
            dups, late = rx_seq.duplicates, rx_seq.out_of_order
            if not rx_seq.check(frame.seq):
                counts.duplicates += rx_seq.duplicates - dups
                counts.out_of_order += rx_seq.out_of_order - late
                continue
            kind = frame.kind
            if kind != _SENSOR:
                if kind not in _QUIET_KINDS:
                    counts.rx_bad += 1
                elif kind == Kind.STATUS:
                    self.on_rig_status(frame.values)
                else:
                    counts.rig_heartbeats += 1
                continue
            if len(frame.values) != n_y:
                counts.rx_bad += 1
                continue
            reply = self.answer(frame.tick, frame.values)
            if reply is not None:
                replies.append(reply)
        return replies

    def on_rig_status(self, values: tuple[float, ...]) -> None:
        """Note the rig's state (a firmware would go to its own safe state on 2, 3, 4)."""
        word = rig_state_word(values)
        states = self.counts.rig_states
        if not states or states[-1] != word:
            states.append(word)

    def command_for(self, stamp: int, values: tuple[float, ...]) -> np.ndarray:
        """The command answering the sensor values stamped ``stamp`` (any transport).

        The rig uses it at tick k = stamp + 1 (the prime frame before tick 0 is stamped
        2**32 - 1, so k = 0), exactly where its built-in controller reads the values sent
        at tick k - 1 with the references at t_k. Returns the controller's own buffer.
        """
        k = (stamp + 1) % TICK_MODULUS
        t = k * self.tick_s
        self.y[:] = values
        for i, ref in enumerate(self.references):
            self.r[i] = ref.value(t)
        self.law.compute(t, self.y, self.r, self.u)
        self.counts.rx_ok += 1
        self.last_tick = stamp
        return self.u

    def answer(self, stamp: int, values: tuple[float, ...]) -> bytes | None:
        """The command frame answering the sensor frame stamped ``stamp``."""
        self.command_for(stamp, values)
        try:
            return self.wire.encode(_COMMAND, self._next_seq(), stamp, self.u.tolist())
        except FrameError:
            self.counts.tx_errors += 1
            return None

    def heartbeat(self) -> bytes:
        self.counts.heartbeats += 1
        return self.wire.encode(Kind.HEARTBEAT, self._next_seq(), self.last_tick)

    def status(self, running: bool) -> bytes | None:
        """A status frame (binary mode only): [state, detail, rx_ok, rx_bad, answered]."""
        if not self.wire.can_status:
            return None
        self.counts.status += 1
        c = self.counts
        values = (STATE_RUNNING if running else STATE_WAITING, 0.0, float(c.rx_ok),
                  float(c.rx_bad), float(c.rx_ok))
        return self.wire.encode(Kind.STATUS, self._next_seq(), self.last_tick, values)


def run_controller(controller: ReferenceController, transport: Transport, *,
                   stop: Callable[[], bool], clock: Callable[[], float] = time.monotonic
                   ) -> str:
    """Serve the link until ``stop()`` is true or the transport fails; say why it ended."""
    settings = controller.settings
    last_tx = last_rx = -1e9
    last_status = clock()
    was_running = False
    first = controller.status(running=False)
    if first is not None:
        transport.write(first)
    while not stop():
        try:
            data = transport.read()
        except OSError as exc:
            return f"port closed by the far end ({exc})"
        now = clock()
        out = controller.on_bytes(data) if data else []
        if out:
            last_rx = now
        elif now - last_tx >= settings.heartbeat_period:
            out.append(controller.heartbeat())
        running = now - last_rx < settings.heartbeat_period
        if now - last_status >= settings.status_period or running != was_running:
            status = controller.status(running=running)   # periodic, and on each change
            if status is not None:
                out.append(status)
            last_status, was_running = now, running
        for frame in out:
            try:
                sent = transport.write(frame)
            except OSError as exc:
                return f"port closed by the far end ({exc})"
            if not sent:
                controller.counts.tx_dropped += 1
        if out:
            last_tx = now
    return "stopped"


def serial_transport(settings: LinkSettings, port: str | None) -> Transport:
    """The transport for a serial [link]: ``port`` overrides link.port."""
    poll = min(0.05, settings.heartbeat_period, settings.status_period)
    return SerialTransport(port or settings.options["port"], settings.options, poll)


# [link].kind -> how the reference controller reaches the rig; another kind of link adds
# its own entry (a function of the settings and an optional address override).
TRANSPORTS: dict[str, Callable[[LinkSettings, str | None], Transport]] = {
    "serial": serial_transport,
}


def prefer_realtime() -> str:
    """Ask for SCHED_FIFO where permitted (the controller sleeps in read, so it cannot
    hog a core), and freeze the garbage collector's view of the start-up objects."""
    gc.collect()
    gc.freeze()
    try:
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(FIFO_PRIORITY))
    except (OSError, AttributeError):
        return "SCHED_OTHER"
    return f"SCHED_FIFO {FIFO_PRIORITY}"
