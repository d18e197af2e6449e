"""The rig file's [link] table as typed settings: the keys every link shares, and
the serial link's own.

[link] is part of the rig model: `load_rig` checks it in the same pass as every other
section, with the same Checker, so one `plantrig check` reports every mistake. Each kind
of link has its keys and their check here (MQTT in sim/config/_mqtt_settings.py, Modbus in
sim/config/_modbus_settings.py); plantrig.io builds the link from the checked LinkSettings.

Reference (all keys but ``kind`` optional)::

    [link]
    kind = "serial"             # serial, mqtt or modbus
    protocol = "binary"         # "binary" (COBS + CRC-16 frames) or "text" (ASCII lines)
    encoding = "float32"        # binary values: "float32", or "int16" with scale
    scale = 0.001               # int16 only: value = raw * scale, both directions
    checksum = true             # text only: lines carry and require *HH
    watchdog_timeout = 0.1      # s without a valid command before link_lost
    out_of_range = "reject"     # a command beyond an input's min/max: "reject" or "clamp"
    events_per_kind = 20        # itemised events per kind before counting only
    heartbeat_period = 0.1      # s: either end's heartbeat when it has nothing to send
    status_period = 1.0         # s: the controller's status frames (binary only)
    lockstep = false            # fast runs only: each tick waits (up to watchdog_timeout)
                                # for the answer to the previous tick's sensor frame
    # serial only
    port = "/dev/ttyUSB0"       # a device path or a pyserial URL (loop://, socket://...)
    baud = 115200
    parity = "none"             # none, even, odd, mark, space
    stop_bits = 1               # 1, 1.5, 2
    byte_size = 8               # 5..8 (binary needs 8)

    [link.controller]           # the law `plantrig controller` runs (same keys as
    kind = "pid"                # [controller]); the rig itself ignores it
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from plantrig.sim.config._checker import (
    Checker,
    boolean,
    one_of,
    positive_int,
    positive_number,
    text,
)
from plantrig.sim.config._modbus_settings import MODBUS_KEYS, check_modbus_keys
from plantrig.sim.config._mqtt_settings import MQTT_KEYS, check_mqtt_keys

if TYPE_CHECKING:
    from plantrig.sim.config._rigfile import ControllerSpec, Signal

COMMON_DEFAULTS: dict[str, Any] = {
    "protocol": "binary", "encoding": "float32", "scale": 1.0, "checksum": True,
    "watchdog_timeout": 0.1, "out_of_range": "reject", "events_per_kind": 20,
    "heartbeat_period": 0.1, "status_period": 1.0, "lockstep": False,
}
COMMON_KEYS = frozenset({"kind", "controller", *COMMON_DEFAULTS})
SERIAL_DEFAULTS: dict[str, Any] = {"baud": 115200, "parity": "none", "stop_bits": 1,
                                   "byte_size": 8}
PARITIES = ("none", "even", "odd", "mark", "space")


@dataclass(frozen=True)
class LinkSettings:
    """A checked [link] table. ``options`` holds the kind's own checked keys."""

    kind: str
    protocol: str = "binary"
    encoding: str = "float32"
    scale: float = 1.0
    checksum: bool = True
    watchdog_timeout: float = 0.1
    out_of_range: str = "reject"
    events_per_kind: int = 20
    heartbeat_period: float = 0.1
    status_period: float = 1.0
    lockstep: bool = False
    controller: ControllerSpec | None = None
    options: dict[str, Any] = field(default_factory=dict)

    @property
    def where(self) -> str:
        """Where the link connects, as the rig file says (a port, a host), for messages."""
        return str(self.options.get("port") or self.options.get("host") or "")


@dataclass(frozen=True)
class LinkContext:
    """What the [link] checks need of the rest of the rig (checked before it)."""

    path: Path
    name: str
    mode: str
    tick: float
    controller_kind: str
    inputs: tuple[Signal, ...]
    outputs: tuple[Signal, ...]
    check_law: Callable[[Any, str], ControllerSpec | None]   # a [link.controller] table


def _check_serial(c: Checker, table: dict[str, Any], rig: LinkContext) -> dict[str, Any]:
    """The serial link's own keys: port and line settings."""
    out = {key: c.value(table, key, "link", default, check) for key, default, check in (
        ("baud", SERIAL_DEFAULTS["baud"], positive_int),
        ("parity", "none", one_of(PARITIES)),
        ("stop_bits", 1, one_of((1, 1.5, 2))),
        ("byte_size", 8, one_of((5, 6, 7, 8))),
    )}
    if "port" not in table:
        c.add("link.port", "missing (expected a device path such as /dev/ttyUSB0 or a "
                           "pyserial URL; `plantrig run --port` overrides it)")
        out["port"] = ""
    else:
        out["port"] = c.value(table, "port", "link", "", text)
    if table.get("protocol", "binary") == "binary" and out["byte_size"] != 8:
        c.add("link.byte_size", f"binary frames need 8-bit bytes, found {out['byte_size']}")
    return out


KindCheck = Callable[[Checker, dict[str, Any], LinkContext], dict[str, Any]]

# each kind of link: its own keys, and the check returning their values (-> options)
LINK_KINDS: dict[str, tuple[frozenset[str], KindCheck]] = {
    "serial": (frozenset({"port", *SERIAL_DEFAULTS}), _check_serial),
    "mqtt": (MQTT_KEYS, check_mqtt_keys),
    "modbus": (MODBUS_KEYS, check_modbus_keys),
}


def check_link(c: Checker, table: dict[str, Any], rig: LinkContext) -> LinkSettings | None:
    """The checked settings of a [link] table (None after recording its mistakes)."""
    before = len(c.issues)
    kind = table.get("kind")
    if kind is None:
        c.add("link.kind", f"missing (expected one of {', '.join(LINK_KINDS)})")
        return None
    problem = one_of(tuple(LINK_KINDS))(kind)
    if problem:
        c.add("link.kind", problem)
        return None
    keys, check_kind = LINK_KINDS[kind]
    c.no_unknown(table, COMMON_KEYS | keys, "link")
    common = {key: c.value(table, key, "link", default, check) for key, default, check in (
        ("protocol", "binary", one_of(("binary", "text"))),
        ("encoding", "float32", one_of(("float32", "int16"))),
        ("scale", 1.0, positive_number),
        ("checksum", True, boolean),
        ("watchdog_timeout", COMMON_DEFAULTS["watchdog_timeout"], positive_number),
        ("out_of_range", "reject", one_of(("reject", "clamp"))),
        ("events_per_kind", COMMON_DEFAULTS["events_per_kind"], positive_int),
        ("heartbeat_period", COMMON_DEFAULTS["heartbeat_period"], positive_number),
        ("status_period", COMMON_DEFAULTS["status_period"], positive_number),
        ("lockstep", False, boolean),
    )}
    _check_combinations(c, table, common, rig)
    controller = None
    if "controller" in table:
        controller = rig.check_law(table["controller"], "link.controller")
    options = check_kind(c, table, rig)
    if len(c.issues) > before:
        return None
    return LinkSettings(kind=kind, controller=controller, options=options, **common)


def _check_combinations(c: Checker, table: dict[str, Any], common: dict[str, Any],
                        rig: LinkContext) -> None:
    """Keys that are fine alone but not together, or not with this rig."""
    if not common["lockstep"] and rig.mode == "fast" and rig.controller_kind == "external":
        c.add("link.lockstep", "a fast run with the controller on the link needs "
                               "lockstep = true (else ticks outrun the answers)")
    if common["lockstep"] and rig.mode == "realtime":
        c.add("link.lockstep", "waits for each answer, which would stall a real-time "
                               "loop; use it with rig.mode = \"fast\" only")
    if common["protocol"] == "text" and "encoding" in table:
        c.add("link.encoding", "text lines carry decimal numbers; encoding applies to "
                               "protocol = \"binary\" only")
    if "checksum" in table and common["protocol"] != "text":
        c.add("link.checksum", "binary frames always carry a CRC-16; checksum applies to "
                               "protocol = \"text\" only")
    if common["encoding"] == "int16" and "scale" not in table:
        c.add("link.scale", "missing: encoding \"int16\" needs the value of one count")
    if "scale" in table and common["encoding"] != "int16":
        c.add("link.scale", "applies to encoding = \"int16\" only")
    if rig.tick and common["watchdog_timeout"] < rig.tick:
        c.add("link.watchdog_timeout", f"expected at least one tick ({rig.tick:g} s), "
                                       f"found {common['watchdog_timeout']:g}")
    if common["encoding"] == "int16":
        limit = 32767 * common["scale"]
        for group in ("inputs", "outputs"):
            for s in getattr(rig, group):
                if max(abs(s.min), abs(s.max)) > limit and math.isfinite(s.max - s.min):
                    c.add("link.scale", f"plant.{group} {s.name!r} spans [{s.min:g}, "
                                        f"{s.max:g}] but int16 at scale "
                                        f"{common['scale']:g} reaches only +-{limit:g}")
