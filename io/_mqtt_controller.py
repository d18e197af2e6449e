"""The controller's end of the MQTT link: the reference controller's MQTT transport.

It subscribes to ``<prefix>/<rig_id>/sensors``, checks each message as untrusted (the
same decoder as the rig's end), hands the values to a compute function (the reference
controller's ``command_for``) and publishes the answer on ``.../commands`` with the
sensor tick echoed. It notes the rig's run state from the rig's status documents on
``.../status``. Its own retained status is on ``.../controller/status`` ('online' on
every connect, a retained last will 'offline'). Like the rig's end it uses a fresh
aiomqtt Client for every connection attempt, with exponential backoff, so it rides
through a broker restart; it ends when the rig announces a clean close (a live, not
retained, 'offline' with reason "link closed"), when ``stop()`` is true, or after
``duration`` seconds.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import time
from collections.abc import Callable, Sequence
from typing import Protocol

import aiomqtt

from plantrig.io._frames import Kind, SeqTracker
from plantrig.io._mqtt_config import MqttSettings
from plantrig.io._mqtt_payload import Codec, PayloadError
from plantrig.io._mqtt_worker import CLOSED, TCP_NODELAY, tls_context
from plantrig.io._refcontroller import ControllerCounts

Compute = Callable[[int, tuple[float, ...]], Sequence[float] | None]
RigStatus = Callable[[tuple[float, ...]], None]
STOP_POLL_S = 0.1


class Law(Protocol):
    """What serve_reference needs of plantrig.io.ReferenceController."""

    counts: ControllerCounts

    def command_for(self, stamp: int, values: tuple[float, ...]) -> Sequence[float]: ...
    def on_rig_status(self, values: tuple[float, ...]) -> None: ...


class MqttControllerPeer:
    """Answer every valid sensor message with ``compute(tick, values)`` as a command."""

    def __init__(self, settings: MqttSettings, n_outputs: int, compute: Compute, *,
                 client_id: str | None = None,
                 on_ready: Callable[[str], None] | None = None,
                 on_rig_status: RigStatus | None = None,
                 on_waiting: Callable[[str], None] | None = None) -> None:
        self.s = settings
        self.on_waiting = on_waiting     # told once when the broker cannot be reached
        self.n_outputs = n_outputs
        self.compute = compute
        self.on_ready = on_ready
        self.on_rig_status = on_rig_status
        self.client_id = client_id or f"{settings.client_id}-controller"
        self.codec = Codec(settings.payload, settings.encoding, settings.scale,
                           settings.max_payload)
        self.seq = 0
        self.tracker = SeqTracker()
        self.counts: dict[str, int] = {"answered": 0, "bad": 0, "duplicates": 0,
                                       "out_of_order": 0, "connects": 0, "publish_errors": 0}
        self._pending: set[asyncio.Task[None]] = set()
        self.ended = ""

    def _status(self, state: str) -> bytes:
        return json.dumps({"state": state, "client_id": self.client_id,
                           "payload": self.s.payload}).encode()

    def _client(self) -> aiomqtt.Client:
        s = self.s
        will = aiomqtt.Will(s.topic("controller/status"), self._status("offline"),
                            qos=s.qos["status"], retain=True)
        return aiomqtt.Client(s.host, s.port, identifier=self.client_id, username=s.username,
                              password=s.resolved_password() if s.username else None,
                              keepalive=s.keepalive, timeout=s.timeout,
                              protocol=aiomqtt.ProtocolVersion.V311,
                              will=will, tls_context=tls_context(s),
                              socket_options=(TCP_NODELAY,))

    def _rig_status(self, message: aiomqtt.Message) -> bool:
        """Note the run state of a rig status document; True if it says the rig closed
        the link. A retained 'offline' document is an earlier run's last word: neither."""
        try:
            doc = json.loads(message.payload)  # type: ignore[arg-type]
        except (TypeError, ValueError):
            return False
        if not isinstance(doc, dict) or (message.retain and doc.get("state") == "offline"):
            return False
        code, detail = doc.get("run_state_code"), doc.get("detail_code", 0)
        if self.on_rig_status is not None and isinstance(code, int) and isinstance(detail, int):
            self.on_rig_status((float(code), float(detail)))
        return doc.get("state") == "offline" and doc.get("reason") == CLOSED

    async def _serve(self, client: aiomqtt.Client) -> None:
        s = self.s
        sensors, status = s.topic("sensors"), s.topic("status")
        topic_out, qos_out = s.topic("commands"), s.qos["commands"]
        await client.publish(s.topic("controller/status"), self._status("online"),
                             qos=s.qos["status"], retain=True)
        await client.subscribe(sensors, qos=s.qos["sensors"])
        await client.subscribe(status, qos=s.qos["status"])
        self.tracker.reset()
        self.counts["connects"] += 1
        if self.on_ready is not None and self.counts["connects"] == 1:
            self.on_ready(f"{s.host}:{s.port} {sensors}")
        async for message in client.messages:
            if message.topic.value == status:
                if self._rig_status(message):
                    self.ended = "the rig closed the link"
                    return
                continue
            try:
                payload = message.payload
                if not isinstance(payload, bytes | bytearray):
                    raise PayloadError("schema", "payload is not bytes")
                seq, tick, values = self.codec.decode(Kind.SENSOR, bytes(payload),
                                                      self.n_outputs)
            except PayloadError:
                self.counts["bad"] += 1
                continue
            dups, late = self.tracker.duplicates, self.tracker.out_of_order
            if not self.tracker.check(seq):
                self.counts["duplicates"] += self.tracker.duplicates - dups
                self.counts["out_of_order"] += self.tracker.out_of_order - late
                continue
            command = self.compute(tick, values)
            if command is None:
                continue
            self._publish(client, topic_out, self.codec.command(self.seq, tick, command), qos_out)
            self.seq = (self.seq + 1) % 65536
            self.counts["answered"] += 1

    def _publish(self, client: aiomqtt.Client, topic: str, payload: bytes, qos: int) -> None:
        """Publish without waiting in line: aiomqtt's publish waits for its confirmation
        but not for a disconnect, so awaiting it here would hide a dead broker from the
        message loop for up to ``timeout``. Tasks start in order, so messages stay in order."""
        task = asyncio.create_task(client.publish(topic, payload, qos=qos))
        self._pending.add(task)
        task.add_done_callback(self._published)

    def _published(self, task: asyncio.Task[None]) -> None:
        self._pending.discard(task)
        if not task.cancelled() and task.exception() is not None:
            self.counts["publish_errors"] += 1

    async def _watch(self, stop: Callable[[], bool], end: float | None) -> None:
        while not stop() and (end is None or time.monotonic() < end):
            await asyncio.sleep(STOP_POLL_S)
        self.ended = self.ended or "stopped"

    async def run(self, stop: Callable[[], bool] = lambda: False,
                  duration: float | None = None) -> str:
        """Serve until the rig closes, ``stop()`` is true or ``duration`` s passed; why."""
        end = None if duration is None else time.monotonic() + duration
        watch = asyncio.create_task(self._watch(stop, end))
        delay = self.s.reconnect_min
        while not self.ended:
            try:
                async with self._client() as client:
                    delay = self.s.reconnect_min
                    serve = asyncio.create_task(self._serve(client))
                    await asyncio.wait({serve, watch}, return_when=asyncio.FIRST_COMPLETED)
                    serve.cancel()
                    for task in list(self._pending):
                        task.cancel()
                    with contextlib.suppress(asyncio.CancelledError):
                        await serve  # re-raises the error that ended a dropped connection
                    if self.ended:  # a clean end: say 'offline' ourselves (no will)
                        await client.publish(self.s.topic("controller/status"),
                                             self._status("offline"), qos=self.s.qos["status"],
                                             retain=True)
            except (aiomqtt.MqttError, OSError) as exc:
                if self.on_waiting is not None:   # once: a controller waits for its
                    self.on_waiting(f"{self.s.host}:{self.s.port} ({exc})")  # broker,
                    self.on_waiting = None                # it does not give up
                with contextlib.suppress(asyncio.TimeoutError):
                    await asyncio.wait_for(asyncio.shield(watch), timeout=delay)
                delay = min(self.s.reconnect_max, delay * 2)
        watch.cancel()
        return self.ended


def serve_reference(controller: Law, settings: MqttSettings, n_outputs: int, *,
                    stop: Callable[[], bool], on_ready: Callable[[str], None] | None = None,
                    on_waiting: Callable[[str], None] | None = None) -> str:
    """Run a plantrig.io ReferenceController over MQTT; why it ended. Its counts
    (controller.counts) take the peer's: answered is the law's own count."""
    peer = MqttControllerPeer(settings, n_outputs, controller.command_for, on_ready=on_ready,
                              on_rig_status=controller.on_rig_status, on_waiting=on_waiting)
    reason = asyncio.run(peer.run(stop))
    c, mine = controller.counts, peer.counts
    c.rx_bad += mine["bad"]
    c.duplicates += mine["duplicates"]
    c.out_of_order += mine["out_of_order"]
    c.tx_dropped += mine["publish_errors"]
    c.connects += mine["connects"]
    return reason
