"""The serial link: the tick loop's end of a UART (or a pty) to the controller under test.

Every call runs on the real-time thread and never blocks: each tick reads what the
port holds (non-blocking), cuts it into frames, decodes them and keeps the newest valid
command; each tick's sensor frame is written non-blocking, and a full output buffer
drops the frame (counted) rather than wait. Everything from the controller is untrusted:
bad frames, replays, stale or impossible tick stamps, wrong channel counts and values
beyond an input's range are counted, reported as events and kept from the plant. A port
that fails (the far end of a pty closed, a USB adapter pulled) gives link_lost and is
retried; the loop runs on and the engine applies the rig's on_link_silence policy.

Tick stamps (docs/protocol.md): the sensor frame written at the end of tick k carries k
(the engine primes the link with k = -1, i.e. 2**32 - 1, before tick 0); a command
carries the stamp of the sensor frame it answers. A command answering k - 1 read at
tick k has latency 1 tick: the wire loop then matches the built-in controller exactly.
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Callable
from typing import Any, Protocol

import numpy as np

from plantrig.io._frames import REASONS, TICK_MODULUS, FrameError, Kind, SeqTracker
from plantrig.io._pty import FdPort
from plantrig.io._rig_state import RigState
from plantrig.io._wire import WireFormat
from plantrig.sim import Event, LinkSettings, Rig, silent_ticks_allowed

Vector = np.ndarray
RETRY_S = 0.5          # a failed port is retried this often (plant time)
STAMP_RING = 4096      # send times kept for the round-trip estimate (ticks)
RTT_RING = 1 << 16     # round-trip samples kept for percentiles
LATENCY_BINS = 256     # latency histogram in ticks; the last bin holds everything above
HALF = TICK_MODULUS // 2
REJECT_REASONS = ("count", "range", "echo", "kind")
# enum members as module names: Kind.X is an attribute lookup on the enum class each time
_SENSOR, _COMMAND, _HEARTBEAT, _STATUS = Kind.SENSOR, Kind.COMMAND, Kind.HEARTBEAT, Kind.STATUS


class BytePort(Protocol):
    """What the link needs of a port: non-blocking byte moves that raise OSError on loss."""

    name: str

    def read_some(self) -> bytes: ...
    def write_some(self, data: bytes | memoryview) -> int: ...
    def wait_readable(self, timeout: float) -> None: ...
    def discard_input(self) -> None: ...
    def close(self) -> None: ...


class LinkError(OSError):
    """A port that cannot be opened; carries the port's name."""

    def __init__(self, port: str, reason: str) -> None:
        super().__init__(f"serial port {port}: {reason}")
        self.port = port


class _PyserialPort:
    """A pyserial port as a BytePort. A POSIX device is driven through its fd directly,
    since pyserial 3.5's write with write_timeout=0 spins on a full buffer."""

    def __init__(self, ser: Any) -> None:
        import serial
        self.ser = ser
        self.name = str(ser.name or ser.port)
        self._fd: FdPort | None = None
        if os.name == "posix" and isinstance(ser, serial.Serial):
            self._fd = FdPort(ser.fileno(), name=self.name, owns_fd=False)

    def read_some(self) -> bytes:
        return self._fd.read_some() if self._fd else bytes(self.ser.read(4096))

    def write_some(self, data: bytes | memoryview) -> int:
        return self._fd.write_some(data) if self._fd else int(self.ser.write(bytes(data)) or 0)

    def wait_readable(self, timeout: float) -> None:
        if self._fd:
            self._fd.wait_readable(timeout)
        elif not self.ser.in_waiting:
            time.sleep(min(timeout, 1e-4))

    def discard_input(self) -> None:
        self.ser.reset_input_buffer()

    def close(self) -> None:
        self.ser.close()


def open_serial_port(url: str, options: dict[str, Any]) -> BytePort:
    """Open a device path or pyserial URL with the [link] line settings, non-blocking."""
    import serial
    parity = {"none": serial.PARITY_NONE, "even": serial.PARITY_EVEN, "odd": serial.PARITY_ODD,
              "mark": serial.PARITY_MARK, "space": serial.PARITY_SPACE}[options["parity"]]
    try:
        ser = serial.serial_for_url(url, baudrate=options["baud"], bytesize=options["byte_size"],
                                    parity=parity, stopbits=options["stop_bits"], timeout=0,
                                    write_timeout=0)
    except (OSError, ValueError) as exc:
        raise LinkError(url, str(exc)) from None
    return _PyserialPort(ser)


class _EventGate:
    """Lets the first ``per_kind`` events of each kind through, then only a summary at
    10x, 100x, ... that count, so a flood of garbage cannot fill memory."""

    def __init__(self, per_kind: int) -> None:
        self.per_kind = per_kind
        self.counts: dict[str, int] = {}

    def admit(self, key: str) -> str:
        """'item', 'summary' or '' for the newest event of ``key``."""
        n = self.counts.get(key, 0) + 1
        self.counts[key] = n
        if n <= self.per_kind:
            return "item"
        q = n / self.per_kind
        return "summary" if q == int(q) and 10 ** round(math.log10(q)) == q else ""


class SerialLink:
    """ControllerLink over a serial port, in binary or text line mode (see module doc)."""

    def __init__(self, rig: Rig, settings: LinkSettings, *, port: str | BytePort | None = None,
                 clock_ns: Callable[[], int] = time.perf_counter_ns) -> None:
        self.settings = settings
        self.options = settings.options
        self.port_spec: str | BytePort = port if port is not None else self.options["port"]
        self.name = self.port_spec if isinstance(self.port_spec, str) else self.port_spec.name
        self.wire = WireFormat(settings.protocol, settings.encoding, settings.scale,
                               settings.checksum)
        self.splitter = self.wire.splitter()
        self.clip_sensors = math.isfinite(self.wire.limit)
        self.seq = SeqTracker()
        self.clock_ns = clock_ns
        self.tick_s = rig.tick
        self.n_inputs = len(rig.inputs)
        self.lo = [s.min for s in rig.inputs]
        self.hi = [s.max for s in rig.inputs]
        self.clamp = settings.out_of_range == "clamp"
        self.lockstep = settings.lockstep
        self._waited_out = False   # a lockstep wait ran out and no answer came since
        self.timeout_ticks = silent_ticks_allowed(settings.watchdog_timeout, rig.tick)
        self.retry_ticks = max(1, round(RETRY_S / rig.tick))
        self.gate = _EventGate(settings.events_per_kind)
        self.events: list[Event] = []
        self.io: BytePort | None = None
        self.cmd: tuple[float, ...] = (0.0,) * self.n_inputs  # the newest valid command
        self.sent_buf = np.zeros(len(rig.outputs))
        self.fresh = False
        self.lost = False
        self.port_down = False
        self.retry_at = 0
        self.last_valid_tick = -1
        self.last_echo: int | None = None
        self.last_sent_stamp: int | None = None
        self.tx_seq = 0
        self.pending = b""
        self.status: tuple[float, ...] = ()
        self.rig_state = RigState.for_rig(rig)
        self.told = False           # the engine has told a state: send status at reconnect
        self.heartbeat_ticks = max(1, round(settings.heartbeat_period / rig.tick))
        self.last_tx_tick = 0       # the tick of the newest frame written
        # plain lists: one element at a time they cost a fraction of a numpy scalar access
        self.sent_stamp = [-1] * STAMP_RING
        self.sent_ns = [0] * STAMP_RING
        self.latency_hist = [0] * LATENCY_BINS
        self.rtt_ms = [0.0] * RTT_RING
        self.rtt_count = 0
        self.oversize_seen = 0
        self.n: dict[str, int] = dict.fromkeys(
            ["frames_in", "commands_in", "commands_used", "superseded", "heartbeats_in",
             "status_in", "frames_out", "status_out", "heartbeats_out", "bytes_in", "bytes_out",
             "dropped_out", "encode_errors", "sensor_clipped",
             "clamped", "late", "missed_ticks", "link_lost", "link_restored", "port_errors"]
            + [f"bad_{r}" for r in sorted(REASONS)]
            + [f"rejected_{r}" for r in REJECT_REASONS], 0)
        self._k, self._t = 0, 0.0

    # -- events ------------------------------------------------------------------------

    def _event(self, kind: str, detail: str, reason: str = "") -> None:
        key = f"{kind}:{reason}" if reason else kind
        verdict = self.gate.admit(key)
        if verdict == "item":
            self.events.append(Event(self._k, self._t, kind, detail))
        elif verdict == "summary":
            self.events.append(Event(
                self._k, self._t, "events_suppressed",
                f"{key}: {self.gate.counts[key]} so far; the first {self.gate.per_kind} are "
                "itemised, link health has the totals"))

    # -- ControllerLink ------------------------------------------------------------------

    def open(self) -> None:
        """Open the port and drop stale bytes; raises LinkError if it cannot be opened."""
        if isinstance(self.port_spec, str):
            self.io = open_serial_port(self.port_spec, self.options)
        else:
            self.io = self.port_spec
        try:
            self.io.discard_input()
        except OSError as exc:
            self._port_failed(exc)

    def receive(self, tick: int, t: float, out: Vector) -> bool:
        self._k, self._t = tick, t
        if self.port_down and tick >= self.retry_at:
            self._retry_port()
        if self.io is not None and not self.port_down:
            self._read_port()
            if self.lockstep and not self.lost:
                self._wait_for_answer(tick)
        if tick - self.last_tx_tick >= self.heartbeat_ticks and self.io is not None \
                and not self.port_down:
            self._write_extra(self.wire.encode(_HEARTBEAT, self.tx_seq, tick % TICK_MODULUS),
                              "heartbeats_out")
        if self.fresh:
            out[:] = self.cmd
            self.fresh = False
            self._waited_out = False
            self.n["commands_used"] += 1
            # latency and lateness of the command used, as on every link (protocol.md)
            age = (tick - (self.last_echo or 0)) % TICK_MODULUS   # set with the command
            self.latency_hist[age if age < LATENCY_BINS else LATENCY_BINS - 1] += 1
            if age > 1:
                self.n["late"] += 1
            self.last_valid_tick = tick
            if self.lost:
                self.lost = False
                self.n["link_restored"] += 1
                self._event("link_restored", f"valid commands again on {self.name}")
            return True
        if tick > 0:
            self.n["missed_ticks"] += 1
        if not self.lost and tick - self.last_valid_tick > self.timeout_ticks:
            silent = (tick - self.last_valid_tick) * self.tick_s
            self._lose(f"watchdog: no valid command for {silent:g} s "
                       f"(timeout {self.settings.watchdog_timeout:g} s)")
        return False

    def send(self, tick: int, t: float, values: Vector) -> None:
        if tick < 0:
            self._k, self._t = 0, 0.0
        if self.io is None or self.port_down:
            self.n["dropped_out"] += 1
            return
        stamp = tick % TICK_MODULUS
        out = values
        if self.clip_sensors:
            np.clip(values, -self.wire.limit, self.wire.limit, out=self.sent_buf)
            if not np.array_equal(self.sent_buf, values):
                self.n["sensor_clipped"] += 1
            out = self.sent_buf
        try:
            # a list packs faster than numpy scalars one by one
            data = self.wire.encode(_SENSOR, self.tx_seq, stamp, out.tolist())
        except FrameError as exc:
            self.n["encode_errors"] += 1
            self._event("encode_error", f"sensor frame for tick {tick} not sent: {exc}",
                        exc.reason)
            return
        self.tx_seq = (self.tx_seq + 1) & 0xFFFF
        try:
            if self.pending:
                done = self.io.write_some(self.pending)
                self.pending = self.pending[done:]
                if self.pending:
                    self._drop(tick, "the previous frame is still going out")
                    return
            done = self.io.write_some(data)
        except OSError as exc:
            self._port_failed(exc)
            return
        if done == 0:
            self._drop(tick, "output buffer full")
            return
        if done < len(data):
            self.pending = data[done:]
        n = self.n
        n["frames_out"] += 1
        n["bytes_out"] += len(data)
        self.last_tx_tick = tick
        self.last_sent_stamp = stamp
        if tick >= 0:  # the prime waits out the run's start-up: no round-trip sample
            i = stamp % STAMP_RING
            self.sent_stamp[i] = stamp
            self.sent_ns[i] = self.clock_ns()

    def state(self, tick: int, state: str, detail: str = "") -> None:
        """The rig's run state changed (the engine calls this on a change only): send
        a STATUS frame now, and again whenever the port comes back."""
        self.rig_state.set(tick, state, detail)
        self.told = True
        self._send_status()

    def drain_events(self) -> list[Event]:
        events, self.events = self.events, []
        return events

    def health(self) -> dict[str, float]:
        """Counters, and latency: ticks from a sensor frame to the tick its answer was
        used, and milliseconds from writing it to reading the answer (seen once per
        tick, so an upper bound of the true round trip; bench/bench_serial.py measures
        that)."""
        h: dict[str, float] = {k: float(v) for k, v in self.n.items()}
        h["duplicates"] = float(self.seq.duplicates)
        h["out_of_order"] = float(self.seq.out_of_order)
        h["lost_in"] = float(self.seq.lost)
        h["resyncs"] = float(self.seq.resyncs)
        hist = np.array(self.latency_hist)
        total = int(hist.sum())
        if total:
            cum = np.cumsum(hist)
            h["latency_ticks_p50"] = float(np.searchsorted(cum, (total + 1) // 2))
            h["latency_ticks_max"] = float(np.flatnonzero(hist)[-1])
        n = min(self.rtt_count, RTT_RING)
        if n:
            samples = np.array(self.rtt_ms[:n])
            h["latency_ms_p50"] = float(np.percentile(samples, 50))
            h["latency_ms_p99"] = float(np.percentile(samples, 99))
            h["latency_ms_max"] = float(samples.max())
        if self.status:
            h["controller_state"] = float(self.status[0])
        return h

    def describe(self) -> dict[str, Any]:
        """The port and line settings this link really uses (recorded with the run: the
        rig file's port may have been overridden)."""
        o = self.options
        return {"kind": "serial", "port": str(self.name), "baud": o.get("baud"),
                "parity": o.get("parity"), "stop_bits": o.get("stop_bits"),
                "byte_size": o.get("byte_size"), "protocol": self.settings.protocol,
                "encoding": self.settings.encoding}

    def close(self) -> None:
        if self.io is not None:
            try:
                self.io.close()
            except OSError:
                pass
            self.io = None

    # -- inside ------------------------------------------------------------------------

    def _read_port(self) -> None:
        assert self.io is not None
        while True:
            try:
                data = self.io.read_some()
            except OSError as exc:
                self._port_failed(exc)
                return
            if not data:
                break
            self._feed(data)
            if len(data) < FdPort.READ_SIZE:
                break

    def _wait_for_answer(self, tick: int) -> None:
        """Lockstep (fast runs only): wait for the answer to the sensor frame of
        tick - 1, so the run does not depend on scheduling: up to the watchdog timeout,
        or one tick once a wait has run out in this silence (docs/protocol.md section 5)."""
        want = (tick - 1) % TICK_MODULUS
        limit = self.tick_s if self._waited_out else self.settings.watchdog_timeout
        deadline = self.clock_ns() + int(limit * 1e9)
        while self.last_echo != want and not self.port_down and self.io is not None:
            left = deadline - self.clock_ns()
            if left <= 0:
                self._waited_out = True
                return
            self.io.wait_readable(left / 1e9)
            self._read_port()

    def _feed(self, data: bytes) -> None:
        self.n["bytes_in"] += len(data)
        for piece in self.splitter.feed(data):
            self._accept(piece)
        if self.splitter.oversize != self.oversize_seen:
            self.n["bad_oversize"] += self.splitter.oversize - self.oversize_seen
            self.oversize_seen = self.splitter.oversize
            self._event("bad_frame", "oversize: a run of bytes longer than any frame",
                        "oversize")

    def _accept(self, piece: bytes) -> None:
        """Decode one piece and, if it is a usable command, make it the newest."""
        self.n["frames_in"] += 1
        try:
            frame = self.wire.decode(piece, _COMMAND)
        except FrameError as exc:
            self.n[f"bad_{exc.reason}"] += 1
            self._event("bad_frame", str(exc), exc.reason)
            return
        n = self.n
        seq = self.seq
        dups = seq.duplicates
        if not seq.check(frame.seq):
            if seq.duplicates > dups:
                self._event("duplicate_frame", f"seq {frame.seq} seen already; dropped")
            else:
                self._event("out_of_order_frame", f"seq {frame.seq} is older than seq "
                                                  f"{seq.last}; dropped")
            return
        kind = frame.kind
        if kind != _COMMAND:
            if kind == _HEARTBEAT:
                n["heartbeats_in"] += 1
            elif kind == _STATUS:
                n["status_in"] += 1
                self.status = frame.values
            else:
                self._reject("kind", f"a {kind.name} frame from the controller")
            return
        tick = frame.tick
        age = (self._k - tick) % TICK_MODULUS
        if age == 0 or age >= HALF or self.last_sent_stamp is None:
            self._reject("echo", f"answers tick {tick}, which was never sent")
            return
        if self.last_echo is not None and (tick - self.last_echo) % TICK_MODULUS >= HALF:
            self._reject("echo", f"answers tick {tick}, older than the command in use "
                                 f"(tick {self.last_echo})")
            return
        values = frame.values
        if len(values) != self.n_inputs:
            self._reject("count", f"{len(values)} values, the rig has {self.n_inputs} inputs")
            return
        clamped = False
        for i, (v, lo, hi) in enumerate(zip(values, self.lo, self.hi, strict=True)):
            if v < lo or v > hi:
                if not self.clamp:
                    self._reject("range", f"value {i} = {v:g} outside [{lo:g}, {hi:g}]")
                    return
                clamped = True
        if clamped:
            self.cmd = tuple(min(max(v, lo), hi)
                             for v, lo, hi in zip(values, self.lo, self.hi, strict=True))
            n["clamped"] += 1
            self._event("clamped_command", f"clamped to the input range: {list(values)}")
        else:
            self.cmd = values
        if self.fresh:
            n["superseded"] += 1   # a newer valid command came before the tick took it
        self.fresh = True
        self.last_echo = tick
        n["commands_in"] += 1
        i = tick % STAMP_RING
        if self.sent_stamp[i] == tick:
            self.rtt_ms[self.rtt_count % RTT_RING] = (self.clock_ns() - self.sent_ns[i]) / 1e6
            self.rtt_count += 1

    def _send_status(self) -> None:
        if not self.wire.can_status or self.io is None or self.port_down:
            return
        n = self.n
        bad = sum(v for k, v in n.items() if k.startswith(("bad_", "rejected_")))
        values = self.rig_state.values(n["commands_in"], bad)
        stamp = max(self.rig_state.tick, 0) % TICK_MODULUS
        self._write_extra(self.wire.encode(_STATUS, self.tx_seq, stamp, values), "status_out")

    def _write_extra(self, data: bytes, counter: str) -> None:
        """Write a status frame or heartbeat (not on the per-tick path): finish a
        partly written frame first; if the port will not take it all now, the rest
        goes out before the next frame."""
        assert self.io is not None
        try:
            if self.pending:
                done = self.io.write_some(self.pending)
                self.pending = self.pending[done:]
                if self.pending:
                    self.n["dropped_out"] += 1
                    return
            done = self.io.write_some(data)
        except OSError as exc:
            self._port_failed(exc)
            return
        if done == 0:
            self.n["dropped_out"] += 1
            return
        self.pending = data[done:]
        self.tx_seq = (self.tx_seq + 1) & 0xFFFF
        self.n[counter] += 1
        self.n["bytes_out"] += len(data)
        self.last_tx_tick = self._k

    def _reject(self, reason: str, detail: str) -> None:
        self.n[f"rejected_{reason}"] += 1
        self._event("rejected_command", f"{reason}: {detail}", reason)

    def _drop(self, tick: int, why: str) -> None:
        self.n["dropped_out"] += 1
        self._event("tx_dropped", f"sensor frame for tick {tick} dropped: {why}")

    def _lose(self, why: str) -> None:
        self.lost = True
        self.n["link_lost"] += 1
        self._event("link_lost", why)

    def _port_failed(self, exc: OSError) -> None:
        self.n["port_errors"] += 1
        if not self.port_down:
            self.port_down = True
            self._event("port_error", f"{self.name}: {exc}")
            if not self.lost:
                self._lose(f"port error on {self.name}")
            self.pending = b""
            self.splitter.reset()
            if isinstance(self.port_spec, str) and self.io is not None:
                try:
                    self.io.close()
                except OSError:
                    pass
                self.io = None
        self.retry_at = self._k + self.retry_ticks

    def _retry_port(self) -> None:
        """Try the port again: reopen a named port, or probe a given one by reading."""
        try:
            if self.io is None:
                assert isinstance(self.port_spec, str)
                self.io = open_serial_port(self.port_spec, self.options)
            data = self.io.read_some()
        except OSError:
            self.n["port_errors"] += 1
            self.retry_at = self._k + self.retry_ticks
            return
        self.port_down = False
        self.seq.reset()
        if self.told:
            self._send_status()   # at reconnect, the controller learns where the rig is
        if data:
            self._feed(data)
