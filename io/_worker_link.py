"""WorkerLink: the tick loop's side of a link whose protocol work runs in a worker.

The MQTT and Modbus links both keep their client or server (asyncio, packet parsing,
checks of every untrusted message) out of the loop's process: a busy thread there would
delay every wake-up by about one GIL switch interval (docs/platform.md). The worker and
the loop meet through a non-blocking SOCK_SEQPACKET socket pair, one record a message:

    loop -> worker   b"S" sensor values   b"T" the rig's run state   b"Q" close
                     b"h" send the health counters now
    worker -> loop   b"C" a checked command   b"E" kind TAB detail (an event)
                     b"H" the worker's health counters as JSON, every 0.1 s
                     b"h" the same, answering b"h"

This class is everything the loop does with those records, the same for both links:
it keeps the newest command, runs the watchdog on plant ticks (no command for
``watchdog_timeout`` gives one ``link_lost``, the next command one ``link_restored``),
waits for the answer in lockstep runs (a wait that runs out is a missed tick, not a
loss), keeps the latency histogram, merges the health
and closes the worker. A subclass starts its worker and says how its records are laid
out (``_pack_sensor``, ``_state_record``, ``_take_command``) and how its events read.
"""

from __future__ import annotations

import json
import select
import socket
import subprocess
import threading
import time
from typing import Any, ClassVar

import numpy as np

from plantrig.io._rig_state import RigState
from plantrig.sim import Event, Vector, silent_ticks_allowed

SOCKET_BUFFER = 1 << 16
LATENCY_BINS = 64
HEALTH_WAIT_S = 0.5   # the longest health() waits for the worker's answer to b"h"


class WorkerLink:
    """A ControllerLink whose worker (a process, or a thread) does the protocol work."""

    # event texts: {silence} reads "0.101 s (101 ticks)", {seconds} is the silence in s
    LOST_TEXT: ClassVar[str] = "no valid command for {silence}"
    RESTORED_TEXT: ClassVar[str] = "valid commands again after {silence}"
    GONE_TEXT: ClassVar[str] = "the worker ended"
    CLOSE_WAIT_S: ClassVar[float] = 2.0   # for the worker's own goodbye after b"Q"
    REAP_WAIT_S: ClassVar[float] = 2.0    # then for the process or thread to end

    def __init__(self, *, tick: float, n_inputs: int, n_outputs: int,
                 watchdog_timeout: float, lockstep: bool, rig_state: RigState,
                 sensor: Any, command: Any) -> None:
        self.tick = tick
        self.m, self.p = n_inputs, n_outputs
        self._sensor = sensor
        self._command = command
        self._out = bytearray(sensor.size)
        self._in = bytearray(65536)
        self._newest = np.zeros(n_inputs)
        self.watchdog_timeout = watchdog_timeout
        self.watchdog_ticks = silent_ticks_allowed(watchdog_timeout, tick)
        self.lockstep = lockstep
        self._waited_out = False   # a lockstep wait ran out and no answer came since
        self.rig_state = rig_state
        self._sock: socket.socket | None = None
        self._peer: socket.socket | None = None
        self._worker: Any = None
        self._events: list[Event] = []
        self._worker_health: dict[str, float] = {}
        self._health_raw: bytes | None = None
        self._health_answered = False
        self._tick_now, self._t_now = -1, 0.0   # the newest tick receive() saw
        self.last_valid_tick: int | None = None
        self.last_echo_tick = -2  # none yet (-1 is the answer to the values before tick 0)
        self.lost = False
        self._gone = False
        self._fresh = False
        self.counts = dict.fromkeys(("commands_used", "superseded", "dropped_to_worker",
                                     "missed_ticks", "late", "link_lost", "link_restored"), 0)
        self.age_hist = np.zeros(LATENCY_BINS, dtype=np.int64)

    # ---- what a subclass says -------------------------------------------------------
    def _pack_sensor(self, tick: int, t: float, values: Vector) -> None:
        """Pack one b"S" record into ``self._out``."""
        raise NotImplementedError

    def _state_record(self) -> bytes:
        """The b"T" record of ``self.rig_state``."""
        raise NotImplementedError

    def _take_command(self, buf: bytearray, tick: int) -> None:
        """Unpack a b"C" record into ``self._newest`` and ``self.last_echo_tick``."""
        raise NotImplementedError

    # ---- starting the worker --------------------------------------------------------
    def _socket_pair(self) -> tuple[socket.socket, socket.socket]:
        mine, theirs = socket.socketpair(socket.AF_UNIX, socket.SOCK_SEQPACKET)
        for s in (mine, theirs):
            s.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, SOCKET_BUFFER)
            s.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, SOCKET_BUFFER)
        self._sock, self._peer = mine, theirs
        return mine, theirs

    def _start_process(self, command: list[str], setup: bytes) -> None:
        """Start the worker as ``command`` + the fd of its end; its first record is
        ``setup``."""
        mine, theirs = self._sock, self._peer
        assert mine is not None and theirs is not None
        mine.send(setup)
        self._worker = subprocess.Popen([*command, str(theirs.fileno())],
                                        pass_fds=(theirs.fileno(),), stdin=subprocess.DEVNULL)
        theirs.close()  # the child holds its own copy
        self._peer = None

    def _await_events(self, kinds: set[str], timeout: float) -> bool:
        """Wait up to ``timeout`` s for one of the worker's events ``kinds``."""
        sock = self._sock
        assert sock is not None
        sock.setblocking(False)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline and not self._gone:
            select.select([sock], [], [], max(0.0, deadline - time.monotonic()))
            if any(ev.kind in kinds for ev in self._drain(-1, 0.0)):
                return True
        return False

    # ---- ControllerLink -------------------------------------------------------------
    def receive(self, tick: int, t: float, out: Vector) -> bool:
        self._tick_now, self._t_now = tick, t
        self._drain(tick, t)
        if self.lockstep and not self.lost and self.last_echo_tick < tick - 1:
            self._wait_for_answer(tick, t)
        if self.last_valid_tick is None:
            self.last_valid_tick = tick  # the watchdog starts with the first tick
        if self._fresh:
            self._fresh = False
            self._waited_out = False
            out[:] = self._newest
            if self.lost:
                self.lost = False
                self.counts["link_restored"] += 1
                self._events.append(Event(tick, t, "link_restored",
                                          self.RESTORED_TEXT.format(**self._silence(tick))))
            self.last_valid_tick = tick
            self.counts["commands_used"] += 1
            if self.last_echo_tick >= -1:
                age = tick - self.last_echo_tick  # 1: answered within the tick
                self.age_hist[min(max(age, 0), LATENCY_BINS - 1)] += 1
                if age > 1:
                    self.counts["late"] += 1
            return True
        if tick > 0:
            self.counts["missed_ticks"] += 1
        if not self.lost and tick - self.last_valid_tick > self.watchdog_ticks:
            self._lose(tick, t, f"watchdog: {self.LOST_TEXT.format(**self._silence(tick))} "
                                f"(timeout {self.watchdog_timeout:g} s)")
        return False

    def send(self, tick: int, t: float, values: Vector) -> None:
        if self._sock is None or self._gone:
            self.counts["dropped_to_worker"] += 1
            return
        self._pack_sensor(tick, t, values)
        try:
            self._sock.send(self._out)
        except BlockingIOError:  # the worker is a full buffer behind: drop the newest
            self.counts["dropped_to_worker"] += 1
        except OSError as exc:
            self._worker_gone(tick, t, f"send failed: {exc}")

    def state(self, tick: int, state: str, detail: str = "") -> None:
        """The rig's run state changed: the worker tells the controller (and tells it
        again after a reconnect)."""
        self.rig_state.set(tick, state, detail)
        if self._sock is None or self._gone:
            return
        try:
            self._sock.send(self._state_record())
        except OSError:
            self.counts["dropped_to_worker"] += 1

    def drain_events(self) -> list[Event]:
        events, self._events = self._events, []
        return events

    def health(self) -> dict[str, float]:
        """The worker's counters and the loop's own, under the names of docs/protocol.md
        section 5; latency_ticks_*: ticks from a sensor record to the tick its answer
        was used.

        Called once, at the run's end: the worker is asked for its counters (up to
        HEALTH_WAIT_S), so they count every command the loop has taken; its periodic
        ones can be 0.1 s old, which read as more commands used than accepted.
        """
        self._ask_health()
        if self._health_raw is not None:
            try:
                self._worker_health = json.loads(self._health_raw)
            except ValueError:
                pass
            self._health_raw = None
        h = {k: float(v) for k, v in self._worker_health.items()}
        h.update({k: float(v) for k, v in self.counts.items()})
        # values that never left the rig, whether the worker's send queue overflowed,
        # its peer (an MQTT broker) was away or the worker was a buffer behind
        h["dropped_out"] = (h.get("dropped_out", 0.0) + h["dropped_to_worker"]
                            + h.get("dropped_offline", 0.0))
        total = int(self.age_hist.sum())
        if total:
            cum = np.cumsum(self.age_hist)
            h["latency_ticks_p50"] = float(np.searchsorted(cum, (total + 1) // 2))
            h["latency_ticks_max"] = float(np.flatnonzero(self.age_hist)[-1])
        return h

    def close(self) -> None:
        """Ask the worker to say goodbye and stop; wait a little, then end it."""
        sock, worker = self._sock, self._worker
        if sock is None:
            return
        if not self._gone:
            try:
                sock.send(b"Q")
            except OSError:
                pass
            deadline = time.monotonic() + self.CLOSE_WAIT_S
            while time.monotonic() < deadline and not self._gone:
                select.select([sock], [], [], max(0.0, deadline - time.monotonic()))
                self._drain(-1, 0.0)
        if isinstance(worker, threading.Thread):
            worker.join(timeout=self.REAP_WAIT_S)
        elif worker is not None:
            try:
                worker.wait(timeout=self.REAP_WAIT_S)
            except subprocess.TimeoutExpired:
                worker.kill()
                worker.wait(timeout=1.0)
        sock.close()
        if self._peer is not None:
            self._peer.close()
        self._sock = self._peer = None
        self._worker = None

    # ---- helpers --------------------------------------------------------------------
    def _ask_health(self) -> None:
        """Send b"h" and read records until the worker's answer (or HEALTH_WAIT_S)."""
        sock = self._sock
        if sock is None or self._gone:
            return
        self._health_answered = False
        try:
            sock.send(b"h")
        except OSError:
            return
        deadline = time.monotonic() + HEALTH_WAIT_S
        while not self._health_answered and not self._gone:
            left = deadline - time.monotonic()
            if left <= 0:
                return
            select.select([sock], [], [], left)
            self._drain(self._tick_now, self._t_now)

    def _silence(self, tick: int) -> dict[str, Any]:
        last = self.last_valid_tick if self.last_valid_tick is not None else tick
        seconds = (tick - last) * self.tick
        return {"seconds": seconds, "silence": f"{seconds:.3f} s ({tick - last} ticks)"}

    def _lose(self, tick: int, t: float, why: str) -> None:
        self.lost = True
        self.counts["link_lost"] += 1
        self._events.append(Event(tick, t, "link_lost", why))

    def _wait_for_answer(self, tick: int, t: float) -> None:
        """Lockstep (fast runs only): wait up to watchdog_timeout for the answer to the
        sensor values of tick - 1, so an external controller runs as a built-in one.

        An answer that misses the wait is no loss by itself (docs/protocol.md section 5):
        the tick goes on without it, a missed tick with the last command held, and the
        answer counts as late when it comes; only the watchdog on plant ticks in
        receive() declares the link lost, as on the serial link. Once a wait has run
        out, the ticks of the same silence wait one tick each, so a dead controller
        holds the run about twice the timeout, not (timeout / tick) times it."""
        assert self._sock is not None
        limit = self.tick if self._waited_out else self.watchdog_timeout
        deadline = time.monotonic() + limit
        while self.last_echo_tick < tick - 1 and not self._gone:
            left = deadline - time.monotonic()
            if left <= 0:
                self._waited_out = True
                return
            select.select([self._sock], [], [], left)
            self._drain(tick, t)

    def _worker_gone(self, tick: int, t: float, detail: str) -> None:
        if not self._gone:
            self._gone = True
            self._events.append(Event(tick, t, "link_worker_gone", detail))

    def _drain(self, tick: int, t: float) -> list[Event]:
        """Read every record the worker sent; keep the newest command, return the events."""
        sock = self._sock
        new: list[Event] = []
        if sock is None or self._gone:
            return new
        buf, size = self._in, self._command.size
        while True:
            try:
                n = sock.recv_into(buf)
            except BlockingIOError:
                break
            except OSError as exc:
                self._worker_gone(tick, t, f"receive failed: {exc}")
                break
            if n == 0:
                self._worker_gone(tick, t, self.GONE_TEXT)
                break
            code = buf[0]
            if code == 0x43 and n == size:  # b"C"
                if self._fresh:
                    self.counts["superseded"] += 1
                self._take_command(buf, tick)
                self._fresh = True
            elif code == 0x45:  # b"E"
                kind, _, detail = bytes(buf[1:n]).decode(errors="replace").partition("\t")
                ev = Event(tick, t, kind, detail)
                self._events.append(ev)
                new.append(ev)
            elif code == 0x48 or code == 0x68:  # b"H", or b"h" answering ours
                self._health_raw = bytes(buf[1:n])
                self._health_answered = self._health_answered or code == 0x68
        return new
