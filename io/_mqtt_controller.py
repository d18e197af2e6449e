"""The controller's end of the MQTT link, for the reference controller and benchmarks.

It subscribes to ``<prefix>/<rig_id>/sensors``, checks each message as untrusted (the
same decoder as the rig's end), hands the values to a compute function and publishes
the command on ``.../commands`` with the sensor tick echoed. Like the rig's end it uses
a fresh aiomqtt Client for every connection attempt, with exponential backoff, so it
rides through a broker restart.
"""

from __future__ import annotations

import asyncio
import contextlib
import time
from collections.abc import Callable, Sequence

import aiomqtt

from plantrig.io._frames import Kind, SeqTracker
from plantrig.io._mqtt_config import MqttSettings
from plantrig.io._mqtt_payload import Codec, PayloadError
from plantrig.io._mqtt_worker import TCP_NODELAY, tls_context

Compute = Callable[[int, tuple[float, ...]], Sequence[float] | None]


class MqttControllerPeer:
    """Answer every valid sensor message with ``compute(tick, values)`` as a command."""

    def __init__(self, settings: MqttSettings, n_outputs: int, compute: Compute, *,
                 client_id: str | None = None) -> None:
        self.s = settings
        self.n_outputs = n_outputs
        self.compute = compute
        self.client_id = client_id or f"{settings.client_id}-controller"
        self.codec = Codec(settings.payload, settings.encoding, settings.scale,
                           settings.max_payload)
        self.seq = 0
        self.tracker = SeqTracker()
        self.counts: dict[str, int] = {"sensors_in": 0, "sensors_refused": 0,
                                       "commands_out": 0, "connects": 0}

    def _client(self) -> aiomqtt.Client:
        s = self.s
        return aiomqtt.Client(s.host, s.port, identifier=self.client_id, username=s.username,
                              password=s.resolved_password() if s.username else None,
                              keepalive=s.keepalive, protocol=aiomqtt.ProtocolVersion.V5,
                              tls_context=tls_context(s), socket_options=(TCP_NODELAY,))

    async def _serve(self, client: aiomqtt.Client) -> None:
        s = self.s
        topic_out, qos_out = s.topic("commands"), s.qos["commands"]
        await client.subscribe(s.topic("sensors"), qos=s.qos["sensors"])
        self.tracker.reset()
        async for message in client.messages:
            self.counts["sensors_in"] += 1
            payload = message.payload
            try:
                if not isinstance(payload, bytes | bytearray):
                    raise PayloadError("schema", "payload is not bytes")
                seq, tick, values = self.codec.decode(Kind.SENSOR, bytes(payload),
                                                      self.n_outputs)
                if not self.tracker.check(seq):
                    raise PayloadError("duplicate", f"seq {seq}")
            except PayloadError:
                self.counts["sensors_refused"] += 1
                continue
            command = self.compute(tick, values)
            if command is None:
                continue
            await client.publish(topic_out, self.codec.command(self.seq, tick, command),
                                 qos=qos_out)
            self.seq = (self.seq + 1) % 65536
            self.counts["commands_out"] += 1

    async def run(self, stop: asyncio.Event | None = None,
                  duration: float | None = None) -> dict[str, int]:
        """Serve until ``stop`` is set or ``duration`` seconds have passed."""
        stop = stop or asyncio.Event()
        end = None if duration is None else time.monotonic() + duration
        delay = self.s.reconnect_min
        while not stop.is_set() and (end is None or time.monotonic() < end):
            left = None if end is None else max(0.0, end - time.monotonic())
            try:
                async with self._client() as client:
                    self.counts["connects"] += 1
                    delay = self.s.reconnect_min
                    serve = asyncio.create_task(self._serve(client))
                    halt = asyncio.create_task(stop.wait())
                    await asyncio.wait({serve, halt}, timeout=left,
                                                 return_when=asyncio.FIRST_COMPLETED)
                    for task in (serve, halt):
                        task.cancel()
                    with contextlib.suppress(asyncio.CancelledError):
                        await serve  # re-raises the error that ended a dropped connection
            except (aiomqtt.MqttError, OSError):
                with contextlib.suppress(asyncio.TimeoutError):
                    await asyncio.wait_for(stop.wait(), timeout=delay)
                delay = min(self.s.reconnect_max, delay * 2)
        return dict(self.counts)
