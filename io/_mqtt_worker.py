"""The asyncio side of the MQTT link: runs off the real-time thread, in its own process.

The tick loop and this worker meet through one AF_UNIX SOCK_SEQPACKET socket pair: each
datagram is one record, sends are non-blocking on both ends and a full buffer drops the
newest record (counted). The worker holds at most ``send_queue`` sensor messages waiting
for the broker (drop-oldest, counted) and validates every command before the loop sees
it, so nothing untrusted crosses to the plant.

Records, first byte the type::

    loop -> worker   b"S" + <q d {p}d>  sensor values: tick, t, values
                     b"Q"               close: publish 'offline', disconnect, exit
    worker -> loop   b"C" + <q q {m}d>  a valid command: seq, echoed tick, values
                     b"E" + kind \\t detail (UTF-8)   an event for the run record
                     b"H" + JSON        health counters (every 0.1 s and on exit)

Connections follow aiomqtt 2.x practice (FIELD-NOTES.md): no automatic reconnect, so a
fresh Client per attempt with exponential backoff; TCP_NODELAY on the socket; retained
'online' status republished on every connect (retained messages vanish when a broker
without persistence restarts) and a retained last will 'offline'. One TaskGroup owns the
tasks of one connection (publish, receive, heartbeat, close), after aiomqtt's own design.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import datetime as _dt
import json
import math
import os
import random
import socket
import ssl
import struct
import sys
import time
from collections import deque
from dataclasses import dataclass, field
from typing import Any

import aiomqtt
from aiomqtt.exceptions import MqttConnectError

from plantrig.io._frames import Kind, SeqTracker
from plantrig.io._mqtt_config import MqttSettings
from plantrig.io._mqtt_payload import TICK_MODULUS, Codec, PayloadError, check_range

HEALTH_PERIOD_S = 0.1
LATENCY_WINDOW = 4096
TCP_NODELAY = (socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
AUTH_CODES = {4, 5, 134, 135}  # bad user name or password / not authorised (v3.1.1, v5)


@dataclass(frozen=True)
class ChannelSpec:
    """What the worker must know of the rig to check commands and label status."""

    rig_name: str
    tick_s: float
    inputs: tuple[str, ...]
    outputs: tuple[str, ...]
    lo: tuple[float, ...]
    hi: tuple[float, ...]


def sensor_struct(n_outputs: int) -> struct.Struct:
    return struct.Struct(f"<cqd{n_outputs}d")


def command_struct(n_inputs: int) -> struct.Struct:
    return struct.Struct(f"<cqq{n_inputs}d")


class _Closing(Exception):
    """Raised inside a connection's TaskGroup once 'offline' is published on close."""


class _DropOldestQueue(asyncio.Queue):  # type: ignore[type-arg]
    """aiomqtt's incoming queue: when full, the oldest message goes (counted)."""

    dropped = 0

    def put_nowait(self, item: Any) -> None:
        if self.maxsize > 0 and self.full():
            self.get_nowait()
            type(self).dropped += 1
        super().put_nowait(item)


@dataclass
class _Counters:
    values: dict[str, float] = field(default_factory=dict)

    def inc(self, key: str, by: float = 1.0) -> None:
        self.values[key] = self.values.get(key, 0.0) + by


def connect_failure(exc: BaseException) -> tuple[str, str]:
    """Event kind and a plain-words detail for a failed connection attempt."""
    rc = getattr(exc, "rc", None)
    code = getattr(rc, "value", rc)
    if isinstance(exc, MqttConnectError) and code in AUTH_CODES:
        return "link_auth_failed", (f"broker refused the credentials ({rc}, code {code}); "
                                    "check link.username and the password")
    return "link_connect_failed", str(exc) or type(exc).__name__


def tls_context(settings: MqttSettings) -> ssl.SSLContext | None:
    """An SSLContext from [link.tls], or None without TLS."""
    tls = settings.tls
    if tls is None:
        return None
    ctx = ssl.create_default_context(cafile=tls.ca_file)
    if tls.cert_file and tls.key_file:
        ctx.load_cert_chain(tls.cert_file, tls.key_file)
    if tls.insecure:
        ctx.check_hostname = False
        ctx.verify_mode = ssl.CERT_NONE
    return ctx


class Worker:
    """One MQTT session for the life of a run, reconnecting as needed."""

    def __init__(self, settings: MqttSettings, spec: ChannelSpec, sock: socket.socket) -> None:
        self.s = settings
        self.spec = spec
        self.sock = sock
        self.p = len(spec.outputs)
        self.m = len(spec.inputs)
        self.sensor_rec = sensor_struct(self.p)
        self.command_rec = command_struct(self.m)
        self.topics = {name: settings.topic(name) for name in
                       ("sensors", "commands", "heartbeat", "status")}
        self.codec = Codec(settings.payload, settings.encoding, settings.scale,
                           settings.max_payload)
        self.outbox: deque[tuple[int, float, tuple[float, ...]]] = deque()
        self.c = _Counters()
        self.seq = SeqTracker()
        self.sent_seq = 0
        self.heartbeat_seq = 0
        self.status_seq = 0
        self.last_tick: int | None = None
        self.sent_at_tick = [-1] * LATENCY_WINDOW
        self.sent_at_ns = [0] * LATENCY_WINDOW
        self.latencies: deque[float] = deque(maxlen=LATENCY_WINDOW)
        self.connected = False
        self.session = f"{os.getpid():x}-{time.time_ns() & 0xFFFFFFFF:08x}"
        self.started = time.monotonic()
        self.itemised: dict[str, int] = {}
        self.last_failure: str | None = None
        self.established = False
        self.queue_type: type[_DropOldestQueue] = type("_Queue", (_DropOldestQueue,),
                                                       {"dropped": 0})

    # ---- talking to the loop -------------------------------------------------------
    def _to_loop(self, record: bytes) -> None:
        try:
            self.sock.send(record)
        except BlockingIOError:
            self.c.inc("to_loop_dropped")
        except OSError:
            self.stopping.set()  # the loop's end is gone: nothing left to serve

    def event(self, kind: str, detail: str = "") -> None:
        self._to_loop(b"E" + f"{kind}\t{detail}".encode()[:2000])

    def _bad(self, reason: str, detail: str, kind: str = "bad_command") -> None:
        """Count a refused (or clamped) command; event the first events_per_kind of each
        reason, count the rest only (a flooding controller must not flood the record)."""
        if kind == "bad_command":
            self.c.inc(f"err_{reason}")
            self.c.inc("commands_refused")
        else:
            self.c.inc("commands_clamped")
        used = self.itemised.get(reason, 0)
        if used < self.s.events_per_kind:
            self.event(kind, f"{reason}: {detail}")
        else:
            self.c.inc("events_not_itemised")
        self.itemised[reason] = used + 1

    def health(self) -> dict[str, float]:
        h = dict(self.c.values)
        h["connected"] = 1.0 if self.connected else 0.0
        h["receive_queue_dropped"] = float(self.queue_type.dropped)
        h["duplicates"] = float(self.seq.duplicates)
        h["out_of_order"] = float(self.seq.out_of_order)
        h["commands_lost"] = float(self.seq.lost)
        h["seq_resyncs"] = float(self.seq.resyncs)
        if self.latencies:
            lat = sorted(self.latencies)
            n = len(lat)
            h["latency_last_s"] = self.latencies[-1]
            h["latency_p50_s"] = lat[n // 2]
            h["latency_p99_s"] = lat[min(n - 1, math.ceil(0.99 * n) - 1)]
            h["latency_max_s"] = lat[-1]
        return h

    def _send_health(self) -> None:
        self._to_loop(b"H" + json.dumps(self.health()).encode())

    def _on_loop_readable(self) -> None:
        """Take every record the loop sent; sensors go to the outbox only while connected."""
        while True:
            try:
                rec = self.sock.recv(65536)
            except BlockingIOError:
                return
            except OSError:
                rec = b""
            if not rec:  # the loop closed its end
                self.stopping.set()
                return
            if rec[:1] == b"S" and len(rec) == self.sensor_rec.size:
                _, tick, t, *values = self.sensor_rec.unpack(rec)
                if not self.connected:
                    self.c.inc("sensors_dropped_offline")
                    continue
                if len(self.outbox) >= self.s.send_queue:
                    self.outbox.popleft()
                    self.c.inc("send_queue_dropped")
                self.outbox.append((tick, t, tuple(values)))
                self.outbox_ready.set()
            elif rec[:1] == b"Q":
                self.stopping.set()
            else:
                self.c.inc("bad_loop_records")

    # ---- one connection ------------------------------------------------------------
    def _status(self, state: str, reason: str = "") -> bytes:
        self.status_seq += 1
        doc: dict[str, Any] = {
            "seq": self.status_seq % 65536, "state": state, "rig": self.spec.rig_name,
            "rig_id": self.s.rig_id, "session": self.session,
            "time_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="milliseconds"),
        }
        if state == "online":
            doc.update({
                "tick_s": self.spec.tick_s, "payload": self.s.payload,
                "inputs": list(self.spec.inputs), "outputs": list(self.spec.outputs),
                "topics": {k: v for k, v in self.topics.items()},
                "qos": dict(self.s.qos), "connects": int(self.c.values.get("connects", 0)),
            })
        if reason:
            doc["reason"] = reason
        return json.dumps(doc).encode()

    def _client(self) -> aiomqtt.Client:
        s = self.s
        will = aiomqtt.Will(self.topics["status"],
                            self._status("offline", "connection lost (last will)"),
                            qos=s.qos["status"], retain=True)
        return aiomqtt.Client(
            s.host, s.port, identifier=s.client_id, username=s.username,
            password=s.resolved_password() if s.username is not None else None,
            will=will, keepalive=s.keepalive, timeout=max(1.0, s.open_timeout),
            protocol=aiomqtt.ProtocolVersion.V5, tls_context=tls_context(s),
            max_queued_incoming_messages=s.receive_queue, queue_type=self.queue_type,
            socket_options=(TCP_NODELAY,))

    async def _publisher(self, client: aiomqtt.Client) -> None:
        topic, qos, codec = self.topics["sensors"], self.s.qos["sensors"], self.codec
        while True:
            await self.outbox_ready.wait()
            self.outbox_ready.clear()
            while self.outbox:
                tick, t, values = self.outbox.popleft()
                try:
                    payload = codec.sensors(self.sent_seq, tick, t, values)
                except ValueError as exc:  # a value float32 cannot carry
                    self.c.inc("sensors_unencodable")
                    self.event("sensor_not_sent", f"tick {tick}: {exc}")
                    continue
                self.sent_seq = (self.sent_seq + 1) % 65536
                slot = tick % LATENCY_WINDOW
                self.sent_at_tick[slot] = tick
                self.sent_at_ns[slot] = time.perf_counter_ns()
                self.last_tick = tick
                await client.publish(topic, payload, qos=qos)
                self.c.inc("messages_out")

    async def _heartbeat(self, client: aiomqtt.Client) -> None:
        topic, qos = self.topics["heartbeat"], self.s.qos["heartbeat"]
        while True:
            tick = self.last_tick if self.last_tick is not None else 0
            payload = self.codec.heartbeat(self.heartbeat_seq, tick,
                                           time.monotonic() - self.started)
            self.heartbeat_seq = (self.heartbeat_seq + 1) % 65536
            await client.publish(topic, payload, qos=qos)
            self.c.inc("heartbeats_out")
            await asyncio.sleep(self.s.heartbeat_period)

    def _accept(self, message: aiomqtt.Message) -> None:
        """Check one command message; pass it to the loop only if every rule holds."""
        self.c.inc("messages_in")
        payload = message.payload
        if not isinstance(payload, bytes | bytearray):
            payload = str(payload).encode()
        try:
            if message.retain:
                raise PayloadError("retained", "a retained command is stale by definition")
            seq, echo, values = self.codec.decode(Kind.COMMAND, bytes(payload), self.m)
            try:
                check_range(values, self.spec.lo, self.spec.hi, self.spec.inputs)
            except PayloadError as exc:
                if self.s.out_of_range != "clamp":
                    raise
                self._bad("range", exc.detail, kind="command_clamped")
                values = tuple(min(max(v, lo), hi) for v, lo, hi in
                               zip(values, self.spec.lo, self.spec.hi, strict=True))
            last = self.last_tick
            behind = None if last is None else (last - echo) % TICK_MODULUS
            if last is None or behind is None or behind >= TICK_MODULUS // 2:
                raise PayloadError("tick", f"echoes tick {echo}, newest sent "
                                           f"{'none' if last is None else last}")
            echo = last - behind  # unwrap a binary frame's u32 tick
            before = (self.seq.duplicates, self.seq.out_of_order)
            if not self.seq.check(seq):
                kind = "duplicate" if self.seq.duplicates > before[0] else "out_of_order"
                raise PayloadError(kind, f"seq {seq} after {self.seq.last}")
        except PayloadError as exc:
            self._bad(exc.reason, exc.detail)
            return
        slot = echo % LATENCY_WINDOW
        if self.sent_at_tick[slot] == echo:
            self.latencies.append((time.perf_counter_ns() - self.sent_at_ns[slot]) / 1e9)
            self.sent_at_tick[slot] = -1  # measure each sensor message once
        self.c.inc("commands_valid")
        self._to_loop(self.command_rec.pack(b"C", seq, echo, *values))

    async def _receiver(self, client: aiomqtt.Client) -> None:
        async for message in client.messages:
            self._accept(message)

    async def _close_when_asked(self, client: aiomqtt.Client) -> None:
        await self.stopping.wait()
        with contextlib.suppress(aiomqtt.MqttError, asyncio.TimeoutError):
            await asyncio.wait_for(client.publish(
                self.topics["status"], self._status("offline", "link closed"),
                qos=self.s.qos["status"], retain=True), timeout=1.0)
        raise _Closing

    async def _session(self, client: aiomqtt.Client) -> None:
        """Serve one live connection until it drops or the loop closes the link."""
        self.c.inc("connects")
        if self.c.values["connects"] > 1:
            self.c.inc("reconnects")
        self.outbox.clear()  # values from before the outage are stale
        self.seq.reset()
        await client.publish(self.topics["status"], self._status("online"),
                             qos=self.s.qos["status"], retain=True)
        await client.subscribe(self.topics["commands"], qos=self.s.qos["commands"])
        self.connected = self.established = True
        self.last_failure = None
        kind = "link_connected" if self.c.values["connects"] == 1 else "link_reconnected"
        self.event(kind, f"{self.s.host}:{self.s.port} as {self.s.client_id}")
        try:
            async with asyncio.TaskGroup() as tg:
                tg.create_task(self._publisher(client), name="mqtt-publish")
                tg.create_task(self._receiver(client), name="mqtt-receive")
                tg.create_task(self._heartbeat(client), name="mqtt-heartbeat")
                tg.create_task(self._close_when_asked(client), name="mqtt-close")
        finally:
            self.connected = False

    async def _health_ticker(self) -> None:
        while True:
            self._send_health()
            await asyncio.sleep(HEALTH_PERIOD_S)

    async def run(self) -> None:
        loop = asyncio.get_running_loop()
        self.stopping = asyncio.Event()
        self.outbox_ready = asyncio.Event()
        self.sock.setblocking(False)
        loop.add_reader(self.sock.fileno(), self._on_loop_readable)
        ticker = asyncio.create_task(self._health_ticker(), name="mqtt-health")
        delay = self.s.reconnect_min
        closed = False
        try:
            while not closed and not self.stopping.is_set():
                client = self._client()  # a fresh Client for every attempt
                self.established = False
                try:
                    async with client:
                        delay = self.s.reconnect_min
                        await self._session(client)
                except* _Closing:
                    closed = True
                except* (aiomqtt.MqttError, OSError) as group:
                    self._failed(group.exceptions[0])
                if closed:
                    break
                with contextlib.suppress(asyncio.TimeoutError):
                    jitter = 1.0 + random.uniform(-0.2, 0.2)  # common practice: no herds
                    await asyncio.wait_for(self.stopping.wait(), timeout=delay * jitter)
                delay = min(self.s.reconnect_max, delay * 2)
        finally:
            ticker.cancel()
            loop.remove_reader(self.sock.fileno())
            self.connected = False
            self._send_health()
            self.event("link_worker_ended", "")

    def _failed(self, exc: BaseException) -> None:
        """Count and event a lost connection or a failed attempt (each new failure once)."""
        if self.established:
            self.c.inc("disconnects")
            self.event("link_disconnected", str(exc) or type(exc).__name__)
            self.last_failure = None
            return
        kind, detail = connect_failure(exc)
        self.c.inc("auth_failures" if kind == "link_auth_failed" else "connect_failures")
        if self.last_failure != detail:
            self.event(kind, detail)
            self.last_failure = detail


def worker_main(settings: MqttSettings, spec: ChannelSpec, sock: socket.socket) -> None:
    """Run the worker until the loop closes the link (the thread's entry point)."""
    try:
        asyncio.run(Worker(settings, spec, sock).run())
    finally:
        with contextlib.suppress(OSError):
            sock.close()


def setup_record(settings: MqttSettings, spec: ChannelSpec) -> bytes:
    """The first record to a worker process: its settings and channels, as JSON."""
    return json.dumps({"settings": settings.to_dict(),
                       "spec": dataclasses.asdict(spec)}).encode()


def process_main(argv: list[str]) -> int:
    """Worker process entry (see plantrig.io._mqtt_link.WORKER_BOOT); argv[1] is the fd of
    its end of the socket pair. The settings arrive as the first record, never on the
    command line, which other users can read."""
    sock = socket.socket(fileno=int(argv[1]))
    try:
        setup = json.loads(sock.recv(1 << 16))
        d = setup["spec"]
        spec = ChannelSpec(str(d["rig_name"]), float(d["tick_s"]), tuple(d["inputs"]),
                           tuple(d["outputs"]), tuple(d["lo"]), tuple(d["hi"]))
        settings = MqttSettings.from_dict(setup["settings"])
    except (OSError, ValueError, KeyError, TypeError) as exc:
        print(f"plantrig mqtt worker: bad setup record: {exc}", file=sys.stderr)
        return 2
    worker_main(settings, spec, sock)
    return 0
