"""The rig file's [link] table: check every key, then build the link it describes.

The rig loader keeps [link] as plain data (sim knows nothing of links); this module owns
it. Mistakes come back as RigIssue, one per mistake with its key path and a did-you-mean,
so the command line reports them exactly like the rest of the rig file. Keys shared by
every kind of link are checked here; each kind (serial, and MQTT when its module
registers) checks its own keys and builds its own link through LINK_KINDS.

Reference (all keys but ``kind`` optional)::

    [link]
    kind = "serial"             # which link; see LINK_KINDS
    protocol = "binary"         # "binary" (COBS + CRC-16 frames) or "text" (ASCII lines)
    encoding = "float32"        # binary values: "float32", or "int16" with scale
    scale = 0.001               # int16 only: value = raw * scale, both directions
    checksum = true             # text only: lines carry and require *HH
    watchdog_timeout = 0.1      # s without a valid command before link_lost
    out_of_range = "reject"     # a command beyond an input's min/max: "reject" or "clamp"
    events_per_kind = 20        # itemised events per kind before counting only
    heartbeat_period = 0.1      # s: the controller's heartbeat when it has nothing to send
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

import difflib
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from plantrig.io._modbus_config import MODBUS_KEYS, check_modbus_keys
from plantrig.io._mqtt_config import MQTT_KEYS, check_mqtt_keys
from plantrig.sim import (
    ControllerLink,
    ControllerSpec,
    Rig,
    RigFileError,
    RigIssue,
    check_controller_table,
    describe_value,
)

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


class Issues:
    """Collects RigIssues for one rig file while a table is checked."""

    def __init__(self, file: str) -> None:
        self.file = file
        self.items: list[RigIssue] = []

    def add(self, key: str, message: str) -> None:
        self.items.append(RigIssue(self.file, key, message))

    def unknown(self, table: dict[str, Any], known: frozenset[str] | set[str],
                path: str) -> None:
        for key in table:
            if key not in known:
                close = difflib.get_close_matches(key, sorted(known), n=1, cutoff=0.6)
                hint = f"; did you mean '{close[0]}'?" if close else (
                    f"; known keys: {', '.join(sorted(known))}")
                self.add(f"{path}.{key}", f"unknown key{hint}")

    def value(self, table: dict[str, Any], key: str, path: str, default: Any,
              check: Callable[[Any], str | None]) -> Any:
        """``table[key]`` (or ``default``) if ``check`` finds nothing wrong, else default."""
        if key not in table:
            return default
        problem = check(table[key])
        if problem:
            self.add(f"{path}.{key}", problem)
            return default
        return table[key]


def one_of(options: tuple[Any, ...]) -> Callable[[Any], str | None]:
    def check(v: Any) -> str | None:
        if v in options and not isinstance(v, bool):
            return None
        close = difflib.get_close_matches(str(v), [str(o) for o in options], n=1)
        hint = f"; did you mean '{close[0]}'?" if close else ""
        listed = ", ".join(str(o) for o in options)
        return f"expected one of {listed}, found {describe_value(v)}{hint}"
    return check


def positive_number(v: Any) -> str | None:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v) or v <= 0:
        return f"expected a positive number, found {describe_value(v)}"
    return None


def positive_int(v: Any) -> str | None:
    if isinstance(v, bool) or not isinstance(v, int) or v <= 0:
        return f"expected a positive whole number, found {describe_value(v)}"
    return None


def boolean(v: Any) -> str | None:
    return None if isinstance(v, bool) else f"expected true or false, found {describe_value(v)}"


def text(v: Any) -> str | None:
    if isinstance(v, str) and v:
        return None
    return f"expected a non-empty string, found {describe_value(v)}"


def _check_serial(rig: Rig, table: dict[str, Any], issues: Issues) -> dict[str, Any]:
    """The serial link's own keys: port and line settings."""
    out = {key: issues.value(table, key, "link", default, check) for key, default, check in (
        ("baud", SERIAL_DEFAULTS["baud"], positive_int),
        ("parity", "none", one_of(PARITIES)),
        ("stop_bits", 1, one_of((1, 1.5, 2))),
        ("byte_size", 8, one_of((5, 6, 7, 8))),
    )}
    if "port" not in table:
        issues.add("link.port", "missing (expected a device path such as /dev/ttyUSB0 or a "
                                "pyserial URL; `plantrig run --port` overrides it)")
        out["port"] = ""
    else:
        out["port"] = issues.value(table, "port", "link", "", text)
    if table.get("protocol", "binary") == "binary" and out["byte_size"] != 8:
        issues.add("link.byte_size", f"binary frames need 8-bit bytes, found {out['byte_size']}")
    return out


def _build_serial(rig: Rig, settings: LinkSettings, port: Any) -> ControllerLink:
    from plantrig.io._serial_link import SerialLink  # pyserial only when a serial link is used
    return SerialLink(rig, settings, port=port)


@dataclass(frozen=True)
class LinkKind:
    """One kind of link: the keys of its own, how to check them, how to build it.

    ``check(rig, table, issues)`` returns the checked values of its keys (they land in
    LinkSettings.options); ``build(rig, settings, port)`` makes the link, ``port`` being
    an override of where to connect (None: what the rig file says).
    """

    keys: frozenset[str]
    check: Callable[[Rig, dict[str, Any], Issues], dict[str, Any]]
    build: Callable[[Rig, LinkSettings, Any], ControllerLink]


def _build_mqtt(rig: Rig, settings: LinkSettings, port: Any) -> ControllerLink:
    from plantrig.io._mqtt_link import build_mqtt_link  # aiomqtt only when MQTT is used
    return build_mqtt_link(rig, settings, port)


def _build_modbus(rig: Rig, settings: LinkSettings, port: Any) -> ControllerLink:
    from plantrig.io._modbus_link import ModbusLink  # pymodbus only when Modbus is used
    return ModbusLink(rig, settings, port)


# The dispatch on [link].kind; MQTT's keys and checks live in plantrig.io._mqtt_config,
# Modbus's in plantrig.io._modbus_config.
LINK_KINDS: dict[str, LinkKind] = {
    "serial": LinkKind(frozenset({"port", *SERIAL_DEFAULTS}), _check_serial, _build_serial),
    "mqtt": LinkKind(MQTT_KEYS, check_mqtt_keys, _build_mqtt),
    "modbus": LinkKind(MODBUS_KEYS, check_modbus_keys, _build_modbus),
}


def parse_link_table(rig: Rig) -> tuple[LinkSettings | None, list[RigIssue]]:
    """Check ``rig.link``; the settings (None if any mistake) and every mistake found."""
    issues = Issues(str(rig.path))
    table = rig.link
    if table is None:
        return None, []
    kind = table.get("kind")
    if kind is None:
        issues.add("link.kind", f"missing (expected one of {', '.join(LINK_KINDS)})")
        return None, issues.items
    problem = one_of(tuple(LINK_KINDS))(kind)
    if problem:
        issues.add("link.kind", problem)
        return None, issues.items
    spec = LINK_KINDS[kind]
    issues.unknown(table, COMMON_KEYS | spec.keys, "link")
    common = {key: issues.value(table, key, "link", default, check) for key, default, check in (
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
    if not common["lockstep"] and rig.mode == "fast" and rig.controller.kind == "external":
        issues.add("link.lockstep", "a fast run with the controller on the link needs "
                                    "lockstep = true (else ticks outrun the answers)")
    if common["lockstep"] and rig.mode == "realtime":
        issues.add("link.lockstep", "waits for each answer, which would stall a real-time "
                                    "loop; use it with rig.mode = \"fast\" only")
    if common["protocol"] == "text" and "encoding" in table:
        issues.add("link.encoding", "text lines carry decimal numbers; encoding applies to "
                                    "protocol = \"binary\" only")
    if "checksum" in table and common["protocol"] != "text":
        issues.add("link.checksum", "binary frames always carry a CRC-16; checksum applies to "
                                    "protocol = \"text\" only")
    if common["encoding"] == "int16" and "scale" not in table:
        issues.add("link.scale", "missing: encoding \"int16\" needs the value of one count")
    if "scale" in table and common["encoding"] != "int16":
        issues.add("link.scale", "applies to encoding = \"int16\" only")
    if common["watchdog_timeout"] < rig.tick:
        issues.add("link.watchdog_timeout", f"expected at least one tick ({rig.tick:g} s), "
                                            f"found {common['watchdog_timeout']:g}")
    if common["encoding"] == "int16":
        limit = 32767 * common["scale"]
        for group in ("inputs", "outputs"):
            for s in getattr(rig, group):
                if max(abs(s.min), abs(s.max)) > limit and math.isfinite(s.max - s.min):
                    issues.add("link.scale", f"plant.{group} {s.name!r} spans "
                                             f"[{s.min:g}, {s.max:g}] but int16 at scale "
                                             f"{common['scale']:g} reaches only +-{limit:g}")
    controller = None
    if "controller" in table:
        controller, law_issues = check_controller_table(rig, table["controller"],
                                                        "link.controller")
        issues.items.extend(law_issues)
    options = spec.check(rig, table, issues)
    if issues.items:
        return None, issues.items
    return LinkSettings(kind=kind, controller=controller, options=options, **common), []


def check_link_table(rig: Rig) -> list[RigIssue]:
    """Every mistake in ``rig``'s [link] table (empty when it is fine or absent)."""
    return parse_link_table(rig)[1]


def build_link(rig: Rig, *, port: Any = None) -> ControllerLink:
    """The link ``rig``'s [link] table describes; raises RigFileError for its mistakes.

    ``port`` overrides where to connect: for serial a device path, a pyserial URL, or an
    open byte port such as plantrig.io.FdPort (a pty master in the demo and the tests).
    """
    settings, issues = parse_link_table(rig)
    if issues:
        raise RigFileError(issues)
    if settings is None:
        raise RigFileError([RigIssue(str(rig.path), "link", "missing table: the rig's "
                                     "controller is on a link, so it needs [link]")])
    return LINK_KINDS[settings.kind].build(rig, settings, port)
