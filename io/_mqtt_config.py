"""The [link] keys of kind = "mqtt", checked one message per mistake, and MqttSettings.

plantrig.io._link_config checks the keys every link shares (watchdog_timeout,
heartbeat_period, encoding, scale, out_of_range, events_per_kind, controller) and hands
the rest to ``check_mqtt_keys`` through its LINK_KINDS dispatch. This module imports
nothing heavy at load time: the worker process reads MqttSettings from it.

MQTT keys (all optional; defaults in brackets)::

    host               broker host name or address ["127.0.0.1"]
    port               broker TCP port 1..65535 [1883, or 8883 with [link.tls]]
    prefix             first topic level(s) of every topic ["plantrig"]
    rig_id             the topic level naming this rig [rig.name]
    client_id          MQTT client identifier ["plantrig-<rig_id>-<pid>"]
    payload            "json" or "binary" (the frame of docs/protocol.md without COBS;
                       encoding and scale apply to it) ["json"]
    username           broker user name [none]
    password           broker password (prefer password_env: an inline password is
                       replaced by a marker in every record, sim/_secrets.py) [none]
    password_env       name of an environment variable holding the password [none]
    keepalive          seconds between MQTT pings, 1..3600 [10]
    reconnect_min      first reconnect delay, s [0.1]
    reconnect_max      largest reconnect delay, s [5.0]; doubling, +-20 % jitter
    open_timeout       how long opening waits for the first connection, s [5.0]
    timeout            longest wait for the broker (CONNACK, SUBACK, PUBACK, a clean
                       DISCONNECT) before the connection is given up and retried, s [2.0]
    send_queue         sensor messages held for a slow broker (drop-oldest) [8]
    receive_queue      commands held for the worker (drop-oldest) [8]
    max_payload        largest command payload accepted, bytes 64..1000000 [4096]
    worker             "process" or "thread": where the asyncio client runs ["process"]
    [link.qos]         sensors, commands, heartbeat, status: 0, 1 or 2 [0, 0, 0, 1]
    [link.tls]         ca_file, cert_file, key_file (relative to the rig file),
                       insecure = true skips certificate and host name checks [false]
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from plantrig.io._link_config import Issues, LinkSettings
    from plantrig.sim import Rig

TOPIC_NAMES = ("sensors", "commands", "heartbeat", "status")
DEFAULT_QOS = {"sensors": 0, "commands": 0, "heartbeat": 0, "status": 1}
PAYLOADS = ("json", "binary")
WORKERS = ("process", "thread")
TLS_KEYS = frozenset({"ca_file", "cert_file", "key_file", "insecure"})
MQTT_KEYS = frozenset({"host", "port", "prefix", "rig_id", "client_id", "payload", "username",
                       "password", "password_env", "keepalive", "reconnect_min",
                       "reconnect_max", "open_timeout", "timeout", "send_queue",
                       "receive_queue",
                       "max_payload", "worker", "qos", "tls"})
SERIAL_ONLY = ("protocol", "status_period")


@dataclass(frozen=True)
class TlsSettings:
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    insecure: bool = False


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


def _found(v: Any) -> str:
    # plantrig.sim.describe_value's wording; a copy, because this module is imported by
    # the MQTT worker process, which must boot without the simulator (scipy) behind it
    if isinstance(v, bool):
        return f"boolean {str(v).lower()}"
    if isinstance(v, dict):
        return "a table"
    if isinstance(v, list):
        return f"a list of {len(v)}"
    if isinstance(v, str):
        return f"string {v!r}"
    return f"{type(v).__name__} {v!r}"


def _topic_level_problem(value: str, what: str) -> str | None:
    if not value:
        return f"expected a non-empty {what}, found an empty string"
    if any(ch in value for ch in "+#\x00"):
        return f"expected a {what} without MQTT wildcards (+, #) or NUL, found {value!r}"
    if value.startswith("$"):
        return f"expected a {what} not starting with '$' (kept for the broker), found {value!r}"
    return None


class _Keys:
    """Typed reads of one table with key paths under ``path`` (one issue per mistake)."""

    def __init__(self, issues: Issues, table: dict[str, Any], path: str) -> None:
        self.issues, self.t, self.path = issues, table, path

    def add(self, key: str, message: str) -> None:
        self.issues.add(f"{self.path}.{key}", message)

    def string(self, key: str, default: str | None) -> str | None:
        v = self.t.get(key, default)
        if key in self.t and not isinstance(v, str):
            self.add(key, f"expected a string, found {_found(v)}")
            return default
        return v

    def integer(self, key: str, default: int, lo: int, hi: int) -> int:
        v = self.t.get(key, default)
        if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
            self.add(key, f"expected a whole number {lo}..{hi}, found {_found(v)}")
            return default
        return v

    def seconds(self, key: str, default: float) -> float:
        v = self.t.get(key, default)
        if isinstance(v, bool) or not isinstance(v, int | float) or not (
                math.isfinite(v) and v > 0):
            self.add(key, f"expected a positive number of seconds, found {_found(v)}")
            return default
        return float(v)

    def choice(self, key: str, options: tuple[str, ...]) -> str:
        v = self.t.get(key, options[0])
        if v in options:
            return str(v)
        close = difflib.get_close_matches(str(v), options, n=1)
        hint = f"; did you mean '{close[0]}'?" if close else ""
        self.add(key, f"expected one of {', '.join(options)}, found {_found(v)}{hint}")
        return options[0]


def check_mqtt_keys(rig: Rig, table: dict[str, Any], issues: Issues) -> dict[str, Any]:
    """Check the MQTT keys of ``table`` (rig.link); their values for LinkSettings.options."""
    k = _Keys(issues, table, "link")
    for key in SERIAL_ONLY:
        if key in table:
            k.add(key, "applies to serial links only; an MQTT link's messages are set by "
                       "link.payload (\"json\" or \"binary\")")
    payload = k.choice("payload", PAYLOADS)
    if payload == "json":
        for key in ("encoding", "scale"):
            if key in table:
                k.add(key, "applies to payload = \"binary\" only (JSON carries numbers)")
    host = k.string("host", "127.0.0.1") or ""
    if not host.strip():
        k.add("host", "expected a host name or address, found an empty string")
    prefix = k.string("prefix", "plantrig") or ""
    for i, level in enumerate(prefix.split("/")):
        problem = _topic_level_problem(level, "topic level")
        if problem:
            k.add("prefix", f"level {i + 1}: {problem}")
            break
    rig_id = k.string("rig_id", rig.name) or ""
    problem = _topic_level_problem(rig_id, "single topic level")
    if problem is None and "/" in rig_id:
        problem = f"expected a single topic level (no '/'), found {rig_id!r}"
    if problem:
        k.add("rig_id", problem + ("" if "rig_id" in table else
                                   " (taken from rig.name; set link.rig_id)"))
    out: dict[str, Any] = {
        "host": host, "prefix": prefix, "rig_id": rig_id, "payload": payload,
        "client_id": k.string("client_id", "") or "",
        "worker": k.choice("worker", WORKERS),
        "username": k.string("username", None),
        "password": k.string("password", None),
        "password_env": k.string("password_env", None),
        "keepalive": k.integer("keepalive", 10, 1, 3600),
        "reconnect_min": k.seconds("reconnect_min", 0.1),
        "reconnect_max": k.seconds("reconnect_max", 5.0),
        "open_timeout": k.seconds("open_timeout", 5.0),
        "timeout": k.seconds("timeout", 2.0),
        "send_queue": k.integer("send_queue", 8, 1, 100_000),
        "receive_queue": k.integer("receive_queue", 8, 1, 100_000),
        "max_payload": k.integer("max_payload", 4096, 64, 1_000_000),
    }
    from plantrig.sim import SECRET_MARK
    if out["password"] == SECRET_MARK:
        k.add("password", "this is a run folder's copy: the password given inline was not "
                          "recorded; set password_env to the name of an environment "
                          "variable holding it")
    if out["password"] is not None and out["password_env"] is not None:
        k.add("password_env", "expected either password or password_env, found both")
    env = out["password_env"]
    if env is not None and env not in os.environ:
        k.add("password_env", f"expected the environment variable {env!r} to be set, "
                              "found it unset")
    if (out["password"] is not None or env is not None) and out["username"] is None:
        k.add("username", "missing (a password needs a username)")
    if out["reconnect_max"] < out["reconnect_min"]:
        k.add("reconnect_max", f"expected at least reconnect_min ({out['reconnect_min']:g} s), "
                               f"found {out['reconnect_max']:g}")
    out["qos"] = _check_qos(issues, table)
    out["tls"] = _check_tls(issues, table, Path(rig.path).parent)
    out["port"] = k.integer("port", 8883 if out["tls"] is not None else 1883, 1, 65535)
    return out


def _check_qos(issues: Issues, table: dict[str, Any]) -> dict[str, int]:
    qos = dict(DEFAULT_QOS)
    if "qos" not in table:
        return qos
    q = table["qos"]
    if not isinstance(q, dict):
        issues.add("link.qos", f"expected a table like {{ sensors = 0, commands = 1 }}, "
                               f"found {_found(q)}")
        return qos
    issues.unknown(q, set(TOPIC_NAMES), "link.qos")
    k = _Keys(issues, q, "link.qos")
    return {name: k.integer(name, DEFAULT_QOS[name], 0, 2) for name in TOPIC_NAMES}


def _check_tls(issues: Issues, table: dict[str, Any], base: Path) -> TlsSettings | None:
    if "tls" not in table:
        return None
    t = table["tls"]
    if not isinstance(t, dict):
        issues.add("link.tls", f"expected a table ([link.tls]), found {_found(t)}")
        return None
    issues.unknown(t, TLS_KEYS, "link.tls")
    k = _Keys(issues, t, "link.tls")
    files: dict[str, str | None] = {}
    for key in ("ca_file", "cert_file", "key_file"):
        given = k.string(key, None)
        files[key] = None
        if given is not None:
            p = Path(given) if Path(given).is_absolute() else base / given
            if not p.is_file():
                k.add(key, f"expected a readable file, found none at {p}")
            files[key] = str(p)
    if (files["key_file"] is None) != (files["cert_file"] is None):
        k.add("cert_file" if files["cert_file"] is None else "key_file",
              "missing (a client certificate needs both cert_file and key_file)")
    insecure = t.get("insecure", False)
    if not isinstance(insecure, bool):
        k.add("insecure", f"expected true or false, found {_found(insecure)}")
        insecure = False
    return TlsSettings(files["ca_file"], files["cert_file"], files["key_file"], insecure)


def mqtt_settings(link: LinkSettings, endpoint: Any = None) -> MqttSettings:
    """MqttSettings from a checked [link]; ``endpoint`` overrides where to connect.

    ``endpoint`` may be a port number or "host:port" (``plantrig run --port``).
    """
    o = dict(link.options)
    if isinstance(endpoint, int) and not isinstance(endpoint, bool):
        o["port"] = endpoint
    elif isinstance(endpoint, str) and endpoint:
        host, _, port = endpoint.rpartition(":")
        if not port.isdigit() or not 0 < int(port) < 65536:
            raise ValueError(f"expected host:port or a port number, found {endpoint!r}")
        o["port"] = int(port)
        if host:
            o["host"] = host
    if not o["client_id"]:
        o["client_id"] = f"plantrig-{o['rig_id']}-{os.getpid()}"
    return MqttSettings(**o, encoding=link.encoding, scale=link.scale,
                        watchdog_timeout=link.watchdog_timeout,
                        heartbeat_period=link.heartbeat_period, out_of_range=link.out_of_range,
                        events_per_kind=link.events_per_kind, lockstep=link.lockstep)
