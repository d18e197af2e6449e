"""The [link] keys of kind = "mqtt", checked with the rig file's Checker.

sim/config/_link_settings.py checks the keys every link shares (watchdog_timeout,
heartbeat_period, encoding, scale, out_of_range, events_per_kind, controller) and hands
the rest to ``check_mqtt_keys``; plantrig.io turns the result into the MQTT link.

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
                       replaced by a marker in every record, sim/records/_secrets.py) [none]
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

import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from plantrig.sim.config._checker import (
    Checker,
    boolean,
    describe_value,
    is_number,
    one_of,
    string,
    whole_number,
)
from plantrig.sim.records._secrets import SECRET_MARK

if TYPE_CHECKING:
    from plantrig.sim.config._link_settings import LinkContext

TOPIC_NAMES = ("sensors", "commands", "heartbeat", "status")
DEFAULT_QOS = {"sensors": 0, "commands": 0, "heartbeat": 0, "status": 1}
PAYLOADS = ("json", "binary")
WORKERS = ("process", "thread")
TLS_KEYS = frozenset({"ca_file", "cert_file", "key_file", "insecure"})
MQTT_KEYS = frozenset({"host", "port", "prefix", "rig_id", "client_id", "payload", "username",
                       "password", "password_env", "keepalive", "reconnect_min",
                       "reconnect_max", "open_timeout", "timeout", "send_queue",
                       "receive_queue", "max_payload", "worker", "qos", "tls"})
SERIAL_ONLY = ("protocol", "status_period")


@dataclass(frozen=True)
class TlsSettings:
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    insecure: bool = False


def seconds(value: Any) -> str | None:
    if is_number(value) and math.isfinite(value) and value > 0:
        return None
    return f"expected a positive number of seconds, found {describe_value(value)}"


def _topic_level_problem(value: str, what: str) -> str | None:
    if not value:
        return f"expected a non-empty {what}, found an empty string"
    if any(ch in value for ch in "+#\x00"):
        return f"expected a {what} without MQTT wildcards (+, #) or NUL, found {value!r}"
    if value.startswith("$"):
        return f"expected a {what} not starting with '$' (kept for the broker), found {value!r}"
    return None


def check_mqtt_keys(c: Checker, table: dict[str, Any], rig: LinkContext) -> dict[str, Any]:
    """Check the MQTT keys of [link]; their values for LinkSettings.options."""
    for key in SERIAL_ONLY:
        if key in table:
            c.add(f"link.{key}", "applies to serial links only; an MQTT link's messages are "
                                 "set by link.payload (\"json\" or \"binary\")")
    payload = c.value(table, "payload", "link", "json", one_of(PAYLOADS))
    if payload == "json":
        for key in ("encoding", "scale"):
            if key in table:
                c.add(f"link.{key}", "applies to payload = \"binary\" only (JSON carries "
                                     "numbers)")
    host = c.value(table, "host", "link", "127.0.0.1", string)
    if not host.strip():
        c.add("link.host", "expected a host name or address, found an empty string")
    prefix = c.value(table, "prefix", "link", "plantrig", string)
    for i, level in enumerate(prefix.split("/")):
        problem = _topic_level_problem(level, "topic level")
        if problem:
            c.add("link.prefix", f"level {i + 1}: {problem}")
            break
    rig_id = c.value(table, "rig_id", "link", rig.name, string)
    problem = _topic_level_problem(rig_id, "single topic level")
    if problem is None and "/" in rig_id:
        problem = f"expected a single topic level (no '/'), found {rig_id!r}"
    if problem:
        c.add("link.rig_id", problem + ("" if "rig_id" in table else
                                        " (taken from rig.name; set link.rig_id)"))

    def whole(key: str, default: int, lo: int, hi: int) -> int:
        return int(c.value(table, key, "link", default, whole_number(lo, hi)))

    def optional_text(key: str) -> str | None:
        value: str | None = c.value(table, key, "link", None, string)
        return value

    out: dict[str, Any] = {
        "host": host, "prefix": prefix, "rig_id": rig_id, "payload": payload,
        "client_id": c.value(table, "client_id", "link", "", string),
        "worker": c.value(table, "worker", "link", "process", one_of(WORKERS)),
        "username": optional_text("username"),
        "password": optional_text("password"),
        "password_env": optional_text("password_env"),
        "keepalive": whole("keepalive", 10, 1, 3600),
        "send_queue": whole("send_queue", 8, 1, 100_000),
        "receive_queue": whole("receive_queue", 8, 1, 100_000),
        "max_payload": whole("max_payload", 4096, 64, 1_000_000),
    }
    for key, default in (("reconnect_min", 0.1), ("reconnect_max", 5.0),
                         ("open_timeout", 5.0), ("timeout", 2.0)):
        out[key] = float(c.value(table, key, "link", default, seconds))
    _check_credentials(c, out)
    if out["reconnect_max"] < out["reconnect_min"]:
        c.add("link.reconnect_max", f"expected at least reconnect_min "
                                    f"({out['reconnect_min']:g} s), found "
                                    f"{out['reconnect_max']:g}")
    out["qos"] = _check_qos(c, table)
    out["tls"] = _check_tls(c, table, Path(rig.path).parent)
    out["port"] = whole("port", 8883 if out["tls"] is not None else 1883, 1, 65535)
    return out


def _check_credentials(c: Checker, out: dict[str, Any]) -> None:
    if out["password"] == SECRET_MARK:
        c.add("link.password", "this is a run folder's copy: the password given inline was "
                               "not recorded; set password_env to the name of an "
                               "environment variable holding it")
    if out["password"] is not None and out["password_env"] is not None:
        c.add("link.password_env", "expected either password or password_env, found both")
    env = out["password_env"]
    if env is not None and env not in os.environ:
        c.add("link.password_env", f"expected the environment variable {env!r} to be set, "
                                   "found it unset")
    if (out["password"] is not None or env is not None) and out["username"] is None:
        c.add("link.username", "missing (a password needs a username)")


def _check_qos(c: Checker, table: dict[str, Any]) -> dict[str, int]:
    qos = dict(DEFAULT_QOS)
    if "qos" not in table:
        return qos
    q = table["qos"]
    if not isinstance(q, dict):
        c.add("link.qos", f"expected a table like {{ sensors = 0, commands = 1 }}, "
                          f"found {describe_value(q)}")
        return qos
    c.no_unknown(q, TOPIC_NAMES, "link.qos")
    return {name: int(c.value(q, name, "link.qos", DEFAULT_QOS[name], whole_number(0, 2)))
            for name in TOPIC_NAMES}


def _check_tls(c: Checker, table: dict[str, Any], base: Path) -> TlsSettings | None:
    if "tls" not in table:
        return None
    t = table["tls"]
    if not isinstance(t, dict):
        c.add("link.tls", f"expected a table ([link.tls]), found {describe_value(t)}")
        return None
    c.no_unknown(t, TLS_KEYS, "link.tls")
    files: dict[str, str | None] = {}
    for key in ("ca_file", "cert_file", "key_file"):
        given = c.value(t, key, "link.tls", None, string)
        files[key] = None
        if given is not None:
            p = Path(given) if Path(given).is_absolute() else base / given
            if not p.is_file():
                c.add(f"link.tls.{key}", f"expected a readable file, found none at {p}")
            files[key] = str(p)
    if (files["key_file"] is None) != (files["cert_file"] is None):
        missing = "cert_file" if files["cert_file"] is None else "key_file"
        c.add(f"link.tls.{missing}", "missing (a client certificate needs both cert_file "
                                     "and key_file)")
    insecure = c.value(t, "insecure", "link.tls", False, boolean)
    return TlsSettings(files["ca_file"], files["cert_file"], files["key_file"], insecure)
