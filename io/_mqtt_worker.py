"""The asyncio side of the MQTT link: runs off the real-time thread, in its own process.

The tick loop and this worker meet through one AF_UNIX SOCK_SEQPACKET socket pair: each
datagram is one record, sends are non-blocking on both ends and a full buffer drops the
newest record (counted). The worker holds at most ``send_queue`` sensor messages waiting
for the broker (drop-oldest, counted) and checks every command before the loop sees it,
so nothing untrusted crosses to the plant.

Records, first byte the type::

    loop -> worker   b"S" + <q d {p}d>  sensor values: tick, t, values
                     b"T" + JSON        the rig's run state (docs/protocol.md 1.2): kept
                                        in every status document, published at once
                     b"h"               send the health counters now (the run's end)
                     b"Q"               close: publish 'offline', disconnect, exit
    worker -> loop   b"C" + <q q {m}d>  a valid command: seq, echoed tick, values
                     b"E" + kind TAB detail (UTF-8)   an event for the run record
                     b"H" + JSON        health counters (every 0.1 s and at the end)
                     b"h" + JSON        the same, answering b"h"

Connections follow aiomqtt 2.x practice (docs/platform.md): no automatic reconnect, so a
fresh Client for every attempt with exponential backoff; TCP_NODELAY on the socket; the
retained 'online' status republished on every connect (retained messages vanish when a
broker without persistence restarts) and a retained last will 'offline'. One TaskGroup
owns the tasks of one connection (publish, receive, heartbeat, close), after aiomqtt's
own design.
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
import signal
import socket
import ssl
import struct
import sys
import time
from collections import deque
from dataclasses import dataclass
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
REJECT_REASONS = ("range", "echo", "retained")  # well-formed, but must not be used
EVENT_RECORD_MAX = 60_000  # bytes of an event record: the loop receives into 64 KiB
CLOSED = "link closed"  # the reason in the 'offline' status after a clean close
ABANDONED = "rig process ended without closing the link"


@dataclass(frozen=True)
class ChannelSpec:
    """What the worker must know of the rig to check commands and describe itself."""

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


class _DropOldestQueue(asyncio.Queue[Any]):
    """aiomqtt's incoming queue: when full, the oldest message goes (counted)."""

    dropped = 0

    def put_nowait(self, item: Any) -> None:
        if self.maxsize > 0 and self.full():
            self.get_nowait()
            type(self).dropped += 1
        super().put_nowait(item)


def connect_failure(exc: BaseException) -> tuple[str, str]:
    """Event kind and a plain-words detail for a failed connection attempt."""
    rc = getattr(exc, "rc", None)
    code = getattr(rc, "value", rc)
    if isinstance(exc, MqttConnectError) and code in AUTH_CODES:
        return "link_auth_failed", (f"the broker refused the credentials ({rc}, code {code}); "
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


def event_record(kind: str, detail: str) -> bytes:
    """``kind`` TAB ``detail`` as UTF-8, at most EVENT_RECORD_MAX bytes: a longer detail
    is cut at a character boundary, with a marker that says how long it was."""
    data = f"{kind}\t{detail}".encode()
    if len(data) <= EVENT_RECORD_MAX:
        return data
    head = data[:EVENT_RECORD_MAX - 100].decode(errors="ignore")
    return (head + f" [... cut: {len(data)} bytes in all, the link passes the first "
                   f"{len(head.encode())}]").encode()


def admit(counts: dict[str, int], key: str, per_kind: int) -> str:
    """'item', 'summary' or '' for the newest event of ``key``: the first ``per_kind`` are
    itemised, then one summary at 10x, 100x, ... (the serial link's rule)."""
    n = counts.get(key, 0) + 1
    counts[key] = n
    if n <= per_kind:
        return "item"
    q = n / per_kind
    return "summary" if q == int(q) and 10 ** round(math.log10(q)) == q else ""


class Worker:
    """One MQTT session for the life of a run, reconnecting as needed."""

    def __init__(self, settings: MqttSettings, spec: ChannelSpec, sock: socket.socket) -> None:
        self.s = settings
        self.spec = spec
        self.sock = sock
        self.m = len(spec.inputs)
        self.sensor_rec = sensor_struct(len(spec.outputs))
        self.command_rec = command_struct(self.m)
        self.topics = {name: settings.topic(name) for name in
                       ("sensors", "commands", "heartbeat", "status")}
        self.codec = Codec(settings.payload, settings.encoding, settings.scale,
                           settings.max_payload)
        self.outbox: deque[tuple[int, float, tuple[float, ...]]] = deque()
        self.n: dict[str, float] = {}
        self.seq = SeqTracker()
        self.out_seq = {"sensors": 0, "heartbeat": 0, "status": 0}
        self.last_tick: int | None = None  # newest sensor tick published (may be -1)
        self.sent_at_tick = [-2] * LATENCY_WINDOW
        self.sent_at_ns = [0] * LATENCY_WINDOW
        self.rtt_ms: deque[float] = deque(maxlen=LATENCY_WINDOW)
        self.connected = False
        self.established = False  # this attempt got as far as a live session
        self.last_failure: str | None = None
        self.gate: dict[str, int] = {}
        self.close_reason = CLOSED
        self.session = f"{os.getpid():x}-{time.time_ns() & 0xFFFFFFFF:08x}"
        self.started = time.monotonic()
        self.run_state: dict[str, Any] = {}   # the loop's newest b"T" record
        self.queue_type: type[_DropOldestQueue] = type("_Queue", (_DropOldestQueue,),
                                                       {"dropped": 0})

    # ---- talking to the loop -------------------------------------------------------
    def inc(self, key: str) -> None:
        self.n[key] = self.n.get(key, 0.0) + 1.0

    def _next(self, topic: str) -> int:
        seq = self.out_seq[topic]
        self.out_seq[topic] = (seq + 1) % 65536
        return seq

    def _to_loop(self, record: bytes) -> None:
        try:
            self.sock.send(record)
        except BlockingIOError:
            self.inc("dropped_to_loop")
        except OSError:
            self._stop(ABANDONED)  # the loop's end is gone: nothing left to serve

    def event(self, kind: str, detail: str = "", reason: str = "") -> None:
        """Pass an event to the loop, itemised up to events_per_kind per kind and reason."""
        key = f"{kind}:{reason}" if reason else kind
        verdict = admit(self.gate, key, self.s.events_per_kind)
        if verdict == "item":
            self._to_loop(b"E" + event_record(kind, detail))
        elif verdict == "summary":
            self._to_loop(b"E" + (f"events_suppressed\t{key}: {self.gate[key]} so far; the "
                                  f"first {self.s.events_per_kind} are itemised, link health "
                                  "has the totals").encode())

    def health(self) -> dict[str, float]:
        h = dict(self.n)
        h["connected"] = 1.0 if self.connected else 0.0
        h["dropped_in"] = float(self.queue_type.dropped)
        h["duplicates"] = float(self.seq.duplicates)
        h["out_of_order"] = float(self.seq.out_of_order)
        h["lost_in"] = float(self.seq.lost)
        h["resyncs"] = float(self.seq.resyncs)
        if self.rtt_ms:
            lat = sorted(self.rtt_ms)
            n = len(lat)
            h["latency_ms_p50"] = lat[(n - 1) // 2]
            h["latency_ms_p99"] = lat[max(0, math.ceil(0.99 * n) - 1)]
            h["latency_ms_max"] = lat[-1]
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
            if not rec:  # the loop's process ended (or crashed) without closing the link
                self._stop(ABANDONED)
                return
            if rec[:1] == b"S" and len(rec) == self.sensor_rec.size:
                _, tick, t, *values = self.sensor_rec.unpack(rec)
                if not self.connected:
                    self.inc("dropped_offline")
                    continue
                if len(self.outbox) >= self.s.send_queue:
                    self.outbox.popleft()
                    self.inc("dropped_out")
                self.outbox.append((tick, t, tuple(values)))
                self.outbox_ready.set()
            elif rec[:1] == b"T":
                try:
                    self.run_state = dict(json.loads(rec[1:]))
                except (ValueError, TypeError):
                    self.inc("bad_loop_records")
                    continue
                self.status_ready.set()
            elif rec[:1] == b"h":
                self._to_loop(b"h" + json.dumps(self.health()).encode())
            elif rec[:1] == b"Q":
                self._stop(CLOSED)
            else:
                self.inc("bad_loop_records")

    def _stop(self, reason: str) -> None:
        if not self.stopping.is_set():
            self.close_reason = reason
            self.stopping.set()

    # ---- one connection ------------------------------------------------------------
    def _status(self, state: str, reason: str = "") -> bytes:
        doc: dict[str, Any] = {
            "seq": self._next("status"), "state": state, "rig": self.spec.rig_name,
            "rig_id": self.s.rig_id, "session": self.session,
            "time_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="milliseconds"),
        }
        if state == "online":
            doc.update({
                "tick_s": self.spec.tick_s, "payload": self.s.payload,
                "encoding": self.s.encoding, "inputs": list(self.spec.inputs),
                "outputs": list(self.spec.outputs), "topics": dict(self.topics),
                "qos": dict(self.s.qos), "connects": int(self.n.get("connects", 0)),
            })
        doc.update(self.run_state)
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
            will=will, keepalive=s.keepalive, timeout=s.timeout,
            protocol=aiomqtt.ProtocolVersion.V311, tls_context=tls_context(s),
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
                    payload = codec.sensors(self.out_seq["sensors"], tick, t, values)
                except ValueError as exc:  # a value the binary encoding cannot carry
                    self.inc("encode_errors")
                    self.event("encode_error", f"sensor values for tick {tick} not sent: {exc}")
                    continue
                self._next("sensors")
                slot = tick % LATENCY_WINDOW
                self.sent_at_tick[slot] = tick
                self.sent_at_ns[slot] = time.perf_counter_ns()
                self.last_tick = tick
                await client.publish(topic, payload, qos=qos)
                self.inc("frames_out")

    async def _status_publisher(self, client: aiomqtt.Client) -> None:
        """Publish the status document again whenever the rig's run state changes."""
        while True:
            await self.status_ready.wait()
            self.status_ready.clear()
            await client.publish(self.topics["status"], self._status("online"),
                                 qos=self.s.qos["status"], retain=True)
            self.inc("status_out")

    async def _heartbeat(self, client: aiomqtt.Client) -> None:
        topic, qos = self.topics["heartbeat"], self.s.qos["heartbeat"]
        while True:
            tick = self.last_tick if self.last_tick is not None else -1
            payload = self.codec.heartbeat(self._next("heartbeat"), tick,
                                           time.monotonic() - self.started)
            await client.publish(topic, payload, qos=qos)
            self.inc("heartbeats_out")
            await asyncio.sleep(self.s.heartbeat_period)

    def _check(self, message: aiomqtt.Message) -> tuple[int, int, tuple[float, ...]]:
        """(seq, echoed tick, values) of a command that may be used, else PayloadError."""
        payload = message.payload
        if not payload:   # an empty retained message clears the topic: nothing was said
            raise PayloadError("empty", "an empty message (clears a retained one)")
        if not isinstance(payload, bytes | bytearray):
            raise PayloadError("schema", f"payload of type {type(payload).__name__}")
        if message.retain:
            raise PayloadError("retained", "a retained command is stale by definition")
        seq, echo, values = self.codec.decode(Kind.COMMAND, bytes(payload), self.m)
        last = self.last_tick
        behind = None if last is None else (last - echo) % TICK_MODULUS
        if last is None or behind is None or behind >= TICK_MODULUS // 2:
            raise PayloadError("echo", f"echoes tick {echo}, newest sent "
                                       f"{'none' if last is None else last}")
        echo = last - behind  # a binary frame's tick is u32: unwrap it
        try:
            check_range(values, self.spec.lo, self.spec.hi, self.spec.inputs)
        except PayloadError as exc:
            if self.s.out_of_range != "clamp":
                raise
            values = tuple(min(max(v, lo), hi) for v, lo, hi in
                           zip(values, self.spec.lo, self.spec.hi, strict=True))
            self.inc("clamped")
            self.event("clamped_command", f"{exc.detail}; clamped to {list(values)}")
        return seq, echo, values

    def _accept(self, message: aiomqtt.Message) -> None:
        """Check one command message; pass it to the loop only if every rule holds."""
        self.inc("frames_in")
        try:
            seq, echo, values = self._check(message)
        except PayloadError as exc:
            if exc.reason == "empty":
                self.inc("empty_messages")
                return
            if exc.reason in REJECT_REASONS or exc.rejected:
                self.inc(f"rejected_{exc.reason}")
                self.event("rejected_command", f"{exc.reason}: {exc.detail}", exc.reason)
            else:
                self.inc(f"bad_{exc.reason}")
                self.event("bad_frame", f"{exc.reason}: {exc.detail}", exc.reason)
            return
        newest = self.seq.last
        if not self.seq.check(seq):
            if self.seq.last == seq:
                self.event("duplicate_frame", f"seq {seq} seen already; dropped")
            else:
                self.event("out_of_order_frame", f"seq {seq} is older than seq {newest}; "
                                                 "dropped")
            return
        slot = echo % LATENCY_WINDOW
        if self.sent_at_tick[slot] == echo:
            self.rtt_ms.append((time.perf_counter_ns() - self.sent_at_ns[slot]) / 1e6)
            self.sent_at_tick[slot] = -2  # one round trip per sensor message
        self.inc("commands_in")
        self._to_loop(self.command_rec.pack(b"C", seq, echo, *values))

    async def _receiver(self, client: aiomqtt.Client) -> None:
        async for message in client.messages:
            self._accept(message)

    async def _close_when_asked(self, client: aiomqtt.Client) -> None:
        await self.stopping.wait()
        with contextlib.suppress(aiomqtt.MqttError, asyncio.TimeoutError):
            await asyncio.wait_for(client.publish(
                self.topics["status"], self._status("offline", self.close_reason),
                qos=self.s.qos["status"], retain=True), timeout=1.0)
        raise _Closing

    async def _session(self, client: aiomqtt.Client) -> None:
        """Serve one live connection until it drops or the loop closes the link."""
        self.inc("connects")
        first = self.n["connects"] == 1
        if not first:
            self.inc("reconnects")
        self.outbox.clear()  # values from before an outage are stale
        self.seq.reset()
        self.status_ready.clear()  # the status below carries the newest run state
        await client.publish(self.topics["status"], self._status("online"),
                             qos=self.s.qos["status"], retain=True)
        self.inc("status_out")
        await client.subscribe(self.topics["commands"], qos=self.s.qos["commands"])
        self.connected = self.established = True
        self.last_failure = None
        self._send_health()  # before the event: the loop's counters agree with it
        self.event("link_connected" if first else "link_reconnected",
                   f"{self.s.host}:{self.s.port} as {self.s.client_id}")
        try:
            async with asyncio.TaskGroup() as tg:
                tg.create_task(self._publisher(client), name="mqtt-publish")
                tg.create_task(self._receiver(client), name="mqtt-receive")
                tg.create_task(self._heartbeat(client), name="mqtt-heartbeat")
                tg.create_task(self._status_publisher(client), name="mqtt-status")
                tg.create_task(self._close_when_asked(client), name="mqtt-close")
        finally:
            self.connected = False

    def _failed(self, exc: BaseException) -> None:
        """Count and event a lost connection or a failed attempt (each new failure once)."""
        if self.established:
            self.inc("disconnects")
            self._send_health()  # before the event, as on connect
            self.event("link_disconnected", str(exc) or type(exc).__name__)
            return
        kind, detail = connect_failure(exc)
        detail = f"{self.s.host}:{self.s.port}: {detail}"
        self.inc("auth_failures" if kind == "link_auth_failed" else "connect_failures")
        self._send_health()
        if self.last_failure != detail:
            self.event(kind, detail)
            self.last_failure = detail

    async def _health_ticker(self) -> None:
        while True:
            self._send_health()
            await asyncio.sleep(HEALTH_PERIOD_S)

    async def run(self) -> None:
        loop = asyncio.get_running_loop()
        self.stopping = asyncio.Event()
        self.outbox_ready = asyncio.Event()
        self.status_ready = asyncio.Event()
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
    """Worker process entry (plantrig.io._mqtt_link.WORKER_COMMAND); argv[1] is the fd of
    its end of the socket pair. The settings arrive as the first record, never on the
    command line, which other users can read. A Ctrl-C reaches the whole process
    group: the worker leaves it to the rig, which closes the link when it has stopped."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
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


if __name__ == "__main__":
    sys.exit(process_main(sys.argv))
