"""MqttSettings: what the MQTT link and its worker process need, as plain data.

The [link] keys of kind = "mqtt" are checked with the rest of the rig file
(sim/config/_mqtt_settings.py documents them); ``mqtt_settings`` turns the checked
LinkSettings into MqttSettings, which cross to the worker process as a dict.
"""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from plantrig.io._endpoint import parse_endpoint
from plantrig.sim import DEFAULT_QOS, TlsSettings

if TYPE_CHECKING:
    from plantrig.sim import LinkSettings

@dataclass(frozen=True)
class MqttSettings:
    """Everything the MQTT link needs, checked; plain data, so it crosses to the worker."""

    rig_id: str
    host: str = "127.0.0.1"
    port: int = 1883
    prefix: str = "plantrig"
    client_id: str = ""
    payload: str = "json"
    encoding: str = "float32"
    scale: float = 1.0
    username: str | None = None
    password: str | None = None
    password_env: str | None = None
    keepalive: int = 10
    reconnect_min: float = 0.1
    reconnect_max: float = 5.0
    open_timeout: float = 5.0
    timeout: float = 2.0
    watchdog_timeout: float = 0.1
    heartbeat_period: float = 0.1
    out_of_range: str = "reject"
    events_per_kind: int = 20
    lockstep: bool = False
    send_queue: int = 8
    receive_queue: int = 8
    max_payload: int = 4096
    worker: str = "process"
    qos: dict[str, int] = field(default_factory=lambda: dict(DEFAULT_QOS))
    tls: TlsSettings | None = None

    def topic(self, name: str) -> str:
        """``<prefix>/<rig_id>/<name>``, e.g. plantrig/conveyor/commands."""
        return f"{self.prefix}/{self.rig_id}/{name}"

    def resolved_password(self) -> str | None:
        """The password, read from the environment when password_env names a variable."""
        if self.password_env:
            return os.environ.get(self.password_env)
        return self.password

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> MqttSettings:
        d = dict(d)
        if d.get("tls") is not None:
            d["tls"] = TlsSettings(**d["tls"])
        return cls(**d)


def mqtt_settings(link: LinkSettings, endpoint: Any = None) -> MqttSettings:
    """MqttSettings from a checked [link]; ``endpoint`` overrides where to connect.

    ``endpoint`` may be a port number or "host:port" (``plantrig run --port``).
    """
    o = dict(link.options)
    if isinstance(endpoint, int) and not isinstance(endpoint, bool):
        o["port"] = endpoint
    elif isinstance(endpoint, str) and endpoint:
        host, o["port"] = parse_endpoint(endpoint)
        if host:
            o["host"] = host
    if not o["client_id"]:
        o["client_id"] = f"plantrig-{o['rig_id']}-{os.getpid()}"
    return MqttSettings(**o, encoding=link.encoding, scale=link.scale,
                        watchdog_timeout=link.watchdog_timeout,
                        heartbeat_period=link.heartbeat_period, out_of_range=link.out_of_range,
                        events_per_kind=link.events_per_kind, lockstep=link.lockstep)
