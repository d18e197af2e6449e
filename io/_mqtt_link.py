"""MqttLink: the tick loop's side of a controller reached through an MQTT broker.

Every method the loop calls is non-blocking: values go to the worker (plantrig.io.
_mqtt_worker, its own process by default) through a non-blocking socket and commands
come back the same way, already checked. The loop's side of that, the watchdog on plant
ticks included (no valid command for ``watchdog_timeout`` gives one ``link_lost``
event, the next valid command one ``link_restored``; in lockstep an answer that misses
its tick's wait is a missed tick, never a loss by itself, as on every link), is
plantrig.io._worker_link's, shared with the Modbus link; this module starts the MQTT
worker and lays out its records.

Why a process and not a thread: docs/platform.md measured that a busy Python thread in
the loop's process delays every wake-up by about one GIL switch interval; the worker
parses JSON and runs paho's packet handling for every message. bench/bench_mqtt.py
measures both placements (``worker = "thread"`` is kept for that comparison and for
platforms where spawning is costly).
"""

from __future__ import annotations

import json
import sys
import threading
from collections.abc import Sequence
from typing import Any

from plantrig.io._mqtt_config import MqttSettings, mqtt_settings
from plantrig.io._mqtt_worker import (
    ChannelSpec,
    command_struct,
    sensor_struct,
    setup_record,
    worker_main,
)
from plantrig.io._rig_state import RigState
from plantrig.io._worker_link import WorkerLink
from plantrig.sim import Event, Rig, Signal, Vector

# the worker process: `python -m` imports plantrig.io's light __init__ and the worker
# module with what it needs (aiomqtt), never the simulator
WORKER_COMMAND = [sys.executable, "-m", "plantrig.io._mqtt_worker"]
READY_EVENTS = {"link_connected", "link_auth_failed", "link_connect_failed"}


class MqttLink(WorkerLink):
    """A ControllerLink over MQTT (see plantrig.io._mqtt_payload for the topics).

    latency_ms_* in the health: from publishing a sensor message to receiving its
    answer, in the worker (broker and controller included, the loop's tick excluded).
    """

    GONE_TEXT = "the MQTT worker ended"
    CLOSE_WAIT_S = 3.0
    REAP_WAIT_S = 1.0

    def __init__(self, settings: MqttSettings, *, inputs: Sequence[Signal],
                 outputs: Sequence[Signal], tick: float, rig_name: str,
                 interlocks: Sequence[str] = ()) -> None:
        super().__init__(tick=tick, n_inputs=len(inputs), n_outputs=len(outputs),
                         watchdog_timeout=settings.watchdog_timeout,
                         lockstep=settings.lockstep, rig_state=RigState(interlocks),
                         sensor=sensor_struct(len(outputs)),
                         command=command_struct(len(inputs)))
        self.settings = settings
        self.spec = ChannelSpec(rig_name, tick, tuple(s.name for s in inputs),
                                tuple(s.name for s in outputs),
                                tuple(float(s.min) for s in inputs),
                                tuple(float(s.max) for s in inputs))

    @classmethod
    def from_rig(cls, rig: Rig, settings: MqttSettings) -> MqttLink:
        return cls(settings, inputs=rig.inputs, outputs=rig.outputs, tick=rig.tick,
                   rig_name=rig.name, interlocks=[i.name for i in rig.interlocks])

    def open(self) -> None:
        """Start the worker and wait up to open_timeout for its first connection result."""
        if self._sock is not None:
            return
        _, theirs = self._socket_pair()
        if self.settings.worker == "thread":
            self._worker = threading.Thread(target=worker_main, daemon=True,
                                            args=(self.settings, self.spec, theirs),
                                            name=f"mqtt-{self.settings.rig_id}")
            self._worker.start()
        else:
            self._start_process(WORKER_COMMAND, setup_record(self.settings, self.spec))
        if self._await_events(READY_EVENTS, self.settings.open_timeout):
            return
        if not self._gone:
            self._events.append(Event(-1, 0.0, "link_not_connected",
                                      f"no connection to {self.settings.host}:"
                                      f"{self.settings.port} within {self.settings.open_timeout}"
                                      " s; the run starts and the link keeps trying"))

    def describe(self) -> dict[str, Any]:
        """The broker and topics this link really uses (recorded with the run)."""
        s = self.settings
        used = {"kind": "mqtt", "broker": f"{s.host}:{s.port}", "tls": s.tls is not None,
                "topics": s.topic("#"), "payload": s.payload, "encoding": s.encoding}
        return {**used, "client_id": s.client_id} if s.client_id else used

    # ---- the records of the MQTT worker ---------------------------------------------
    def _pack_sensor(self, tick: int, t: float, values: Vector) -> None:
        self._sensor.pack_into(self._out, 0, b"S", tick, t, *values)

    def _state_record(self) -> bytes:
        # the worker publishes it in the retained status document at once, and in every
        # status document after (reconnects included)
        return b"T" + json.dumps(self.rig_state.document()).encode()

    def _take_command(self, buf: bytearray, tick: int) -> None:
        _, _seq, echo, *values = self._command.unpack_from(buf)
        self._newest[:] = values
        self.last_echo_tick = echo


def build_mqtt_link(rig: Rig, link: Any, endpoint: Any = None) -> MqttLink:
    """An MqttLink from a rig's checked [link] settings (plantrig.io._link_config builds it)."""
    return MqttLink.from_rig(rig, mqtt_settings(link, endpoint))
