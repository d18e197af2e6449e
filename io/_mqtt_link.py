"""MqttLink: the tick loop's side of a controller reached through an MQTT broker.

Every method the loop calls is non-blocking: values go to the worker (plantrig.io.
_mqtt_worker, its own process by default) through a non-blocking socket and commands
come back the same way, already checked. The watchdog runs here, on plant ticks: no
valid command for ``watchdog_timeout`` gives one ``link_lost`` event, the next valid
command one ``link_restored``.

Why a process and not a thread: docs/platform.md measured that a busy Python thread in
the loop's process delays every wake-up by about one GIL switch interval; the worker
parses JSON and runs paho's packet handling for every message. bench/bench_mqtt.py
measures both placements (``worker = "thread"`` is kept for that comparison and for
platforms where spawning is costly).
"""

from __future__ import annotations

import json
import select
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Sequence
from typing import Any

import numpy as np

from plantrig.io._mqtt_config import MqttSettings, mqtt_settings
from plantrig.io._mqtt_worker import (
    ChannelSpec,
    command_struct,
    sensor_struct,
    setup_record,
    worker_main,
)
from plantrig.io._rig_state import RigState
from plantrig.sim import Event, Rig, Signal, Vector, silent_ticks_allowed

SOCKET_BUFFER = 1 << 16
LATENCY_BINS = 64
# the worker process: `python -m` imports plantrig.io's light __init__ and the worker
# module with what it needs (aiomqtt), never the simulator
WORKER_COMMAND = [sys.executable, "-m", "plantrig.io._mqtt_worker"]
CLOSE_WAIT_S = 3.0
READY_EVENTS = {"link_connected", "link_auth_failed", "link_connect_failed"}


class MqttLink:
    """A ControllerLink over MQTT (see plantrig.io._mqtt_payload for the topics)."""

    def __init__(self, settings: MqttSettings, *, inputs: Sequence[Signal],
                 outputs: Sequence[Signal], tick: float, rig_name: str,
                 interlocks: Sequence[str] = ()) -> None:
        self.settings = settings
        self.tick = tick
        self.spec = ChannelSpec(rig_name, tick, tuple(s.name for s in inputs),
                                tuple(s.name for s in outputs),
                                tuple(float(s.min) for s in inputs),
                                tuple(float(s.max) for s in inputs))
        self.m, self.p = len(inputs), len(outputs)
        self._sensor = sensor_struct(self.p)
        self._command = command_struct(self.m)
        self._out = bytearray(self._sensor.size)
        self._in = bytearray(65536)
        self._newest = np.zeros(self.m)
        self.watchdog_ticks = silent_ticks_allowed(settings.watchdog_timeout, tick)
        self.lockstep = settings.lockstep
        self._sock: socket.socket | None = None
        self._peer: socket.socket | None = None
        self._worker: Any = None
        self._events: list[Event] = []
        self._worker_health: dict[str, float] = {}
        self._health_raw: bytes | None = None
        self.last_valid_tick: int | None = None
        self.last_echo_tick = -2  # none yet (-1 is the answer to the values before tick 0)
        self.lost = False
        self._gone = False
        self._fresh = False
        self.rig_state = RigState(interlocks)
        self.counts = dict.fromkeys(("commands_used", "superseded",
                                     "dropped_to_worker", "missed_ticks", "late", "link_lost",
                                     "link_restored"), 0)
        self.age_hist = np.zeros(LATENCY_BINS, dtype=np.int64)

    @classmethod
    def from_rig(cls, rig: Rig, settings: MqttSettings) -> MqttLink:
        return cls(settings, inputs=rig.inputs, outputs=rig.outputs, tick=rig.tick,
                   rig_name=rig.name, interlocks=[i.name for i in rig.interlocks])

    # ---- ControllerLink -------------------------------------------------------------
    def open(self) -> None:
        """Start the worker and wait up to open_timeout for its first connection result."""
        if self._sock is not None:
            return
        mine, theirs = socket.socketpair(socket.AF_UNIX, socket.SOCK_SEQPACKET)
        for s in (mine, theirs):
            s.setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, SOCKET_BUFFER)
            s.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, SOCKET_BUFFER)
        self._sock, self._peer = mine, theirs
        if self.settings.worker == "thread":
            self._worker = threading.Thread(target=worker_main, daemon=True,
                                            args=(self.settings, self.spec, theirs),
                                            name=f"mqtt-{self.settings.rig_id}")
            self._worker.start()
        else:
            mine.send(setup_record(self.settings, self.spec))
            self._worker = subprocess.Popen(
                [*WORKER_COMMAND, str(theirs.fileno())],
                pass_fds=(theirs.fileno(),), stdin=subprocess.DEVNULL)
            theirs.close()  # the child holds its own copy
            self._peer = None
        mine.setblocking(False)
        deadline = time.monotonic() + self.settings.open_timeout
        while time.monotonic() < deadline and not self._gone:
            select.select([mine], [], [], max(0.0, deadline - time.monotonic()))
            if any(ev.kind in READY_EVENTS for ev in self._drain(-1, 0.0)):
                return
        if not self._gone:
            self._events.append(Event(-1, 0.0, "link_not_connected",
                                      f"no connection to {self.settings.host}:"
                                      f"{self.settings.port} within {self.settings.open_timeout}"
                                      " s; the run starts and the link keeps trying"))

    def receive(self, tick: int, t: float, out: Vector) -> bool:
        self._drain(tick, t)
        if self.lockstep and not self.lost and self.last_echo_tick < tick - 1:
            self._wait_for_answer(tick, t)
        if self.last_valid_tick is None:
            self.last_valid_tick = tick  # the watchdog starts with the first tick
        if self._fresh:
            self._fresh = False
            out[:] = self._newest
            if self.lost:
                self.lost = False
                self.counts["link_restored"] += 1
                self._events.append(Event(tick, t, "link_restored",
                                          f"valid commands again after {self._silence(tick)}"))
            self.last_valid_tick = tick
            self.counts["commands_used"] += 1
            age = tick - self.last_echo_tick  # 1: answered within the tick
            self.age_hist[min(max(age, 0), LATENCY_BINS - 1)] += 1
            if age > 1:
                self.counts["late"] += 1
            return True
        if tick > 0:
            self.counts["missed_ticks"] += 1
        if not self.lost and tick - self.last_valid_tick > self.watchdog_ticks:
            self._lose(tick, t, f"watchdog: no valid command for {self._silence(tick)} "
                                f"(timeout {self.settings.watchdog_timeout:g} s)")
        return False

    def _wait_for_answer(self, tick: int, t: float) -> None:
        """Lockstep (fast runs only): wait up to watchdog_timeout for the answer to the
        sensor values of tick - 1, so an external controller runs as a built-in one."""
        assert self._sock is not None
        deadline = time.monotonic() + self.settings.watchdog_timeout
        while self.last_echo_tick < tick - 1 and not self._gone:
            left = deadline - time.monotonic()
            if left <= 0:
                self._lose(tick, t, f"watchdog: lockstep waited "
                                    f"{self.settings.watchdog_timeout:g} s for the answer to "
                                    f"tick {tick - 1}")
                return
            select.select([self._sock], [], [], left)
            self._drain(tick, t)

    def _lose(self, tick: int, t: float, why: str) -> None:
        self.lost = True
        self.counts["link_lost"] += 1
        self._events.append(Event(tick, t, "link_lost", why))

    def send(self, tick: int, t: float, values: Vector) -> None:
        if self._sock is None or self._gone:
            self.counts["dropped_to_worker"] += 1
            return
        self._sensor.pack_into(self._out, 0, b"S", tick, t, *values)
        try:
            self._sock.send(self._out)
        except BlockingIOError:  # the worker is a full buffer behind: drop the newest
            self.counts["dropped_to_worker"] += 1
        except OSError as exc:
            self._worker_gone(tick, t, f"send failed: {exc}")

    def state(self, tick: int, state: str, detail: str = "") -> None:
        """The rig's run state changed: the worker publishes it in the retained status
        document at once, and in every status document after (reconnects included)."""
        self.rig_state.set(tick, state, detail)
        if self._sock is None or self._gone:
            return
        try:
            self._sock.send(b"T" + json.dumps(self.rig_state.document()).encode())
        except OSError:
            self.counts["dropped_to_worker"] += 1

    def drain_events(self) -> list[Event]:
        events, self._events = self._events, []
        return events

    def health(self) -> dict[str, float]:
        """The worker's counters (at most 0.1 s old) and the loop's own.

        latency_ticks_*: ticks from a sensor message to the tick its answer was used;
        latency_ms_*: from publishing a sensor message to receiving its answer, in the
        worker (broker and controller included, the loop's tick excluded).
        """
        if self._health_raw is not None:
            try:
                self._worker_health = json.loads(self._health_raw)
            except ValueError:
                pass
            self._health_raw = None
        merged = {k: float(v) for k, v in self._worker_health.items()}
        merged.update({k: float(v) for k, v in self.counts.items()})
        # one name for every link (docs/protocol.md 5): values that never left the rig,
        # whether the send queue overflowed, the broker was away or the worker was behind
        merged["dropped_out"] = (merged.get("dropped_out", 0.0) + merged["dropped_to_worker"]
                                 + merged.get("dropped_offline", 0.0))
        total = int(self.age_hist.sum())
        if total:
            cum = np.cumsum(self.age_hist)
            merged["latency_ticks_p50"] = float(np.searchsorted(cum, (total + 1) // 2))
            merged["latency_ticks_max"] = float(np.flatnonzero(self.age_hist)[-1])
        return merged

    def describe(self) -> dict[str, Any]:
        """The broker and topics this link really uses (recorded with the run)."""
        s = self.settings
        used = {"kind": "mqtt", "broker": f"{s.host}:{s.port}", "tls": s.tls is not None,
                "topics": s.topic("#"), "payload": s.payload, "encoding": s.encoding}
        return {**used, "client_id": s.client_id} if s.client_id else used

    def close(self) -> None:
        """Ask the worker to publish 'offline' and disconnect; wait a little, then end it."""
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
        if isinstance(worker, threading.Thread):
            worker.join(timeout=CLOSE_WAIT_S / 3)
        elif worker is not None:
            try:
                worker.wait(timeout=CLOSE_WAIT_S / 3)
            except subprocess.TimeoutExpired:
                worker.kill()
                worker.wait(timeout=1.0)
        sock.close()
        if self._peer is not None:
            self._peer.close()
        self._sock = self._peer = None
        self._worker = None

    # ---- helpers --------------------------------------------------------------------
    def _silence(self, tick: int) -> str:
        last = self.last_valid_tick if self.last_valid_tick is not None else tick
        return f"{(tick - last) * self.tick:.3f} s ({tick - last} ticks)"

    def _worker_gone(self, tick: int, t: float, detail: str) -> None:
        if not self._gone:
            self._gone = True
            self._events.append(Event(tick, t, "link_worker_gone", detail))

    def _drain(self, tick: int, t: float) -> tuple[Event, ...]:
        """Read every record the worker sent; keep the newest command, return the events."""
        sock = self._sock
        if sock is None or self._gone:
            return ()
        new: list[Event] = []
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
                self._worker_gone(tick, t, "the MQTT worker ended")
                break
            code = buf[0]
            if code == 0x43 and n == command.size:  # b"C"
                if self._fresh:
                    self.counts["superseded"] += 1
                _, _seq, echo, *values = command.unpack_from(buf)
                self._newest[:] = values
                self.last_echo_tick = echo
                self._fresh = True
            elif code == 0x45:  # b"E"
                kind, _, detail = bytes(buf[1:n]).decode(errors="replace").partition("\t")
                ev = Event(tick, t, kind, detail)
                self._events.append(ev)
                new.append(ev)
            elif code == 0x48:  # b"H"
                self._health_raw = bytes(buf[1:n])
        return tuple(new)


def build_mqtt_link(rig: Rig, link: Any, endpoint: Any = None) -> MqttLink:
    """An MqttLink from a rig's checked [link] settings (plantrig.io._link_config builds it)."""
    return MqttLink.from_rig(rig, mqtt_settings(link, endpoint))
