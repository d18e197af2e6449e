"""Build the link a rig's checked [link] settings describe.

The rig model checks [link] with the rest of the rig file (plantrig.sim's LinkSettings,
sim/config/_link_settings.py); this module only picks the link class for the kind and imports
its transport (pyserial, aiomqtt, pymodbus) when a rig uses it.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from plantrig.sim import ControllerLink, LinkSettings, Rig, RigFileError, RigIssue


def _build_serial(rig: Rig, settings: LinkSettings, port: Any) -> ControllerLink:
    from plantrig.io._serial_link import SerialLink  # pyserial only when a serial link is used
    return SerialLink(rig, settings, port=port)


def _build_mqtt(rig: Rig, settings: LinkSettings, port: Any) -> ControllerLink:
    from plantrig.io._mqtt_link import build_mqtt_link  # aiomqtt only when MQTT is used
    return build_mqtt_link(rig, settings, port)


def _build_modbus(rig: Rig, settings: LinkSettings, port: Any) -> ControllerLink:
    from plantrig.io._modbus_link import ModbusLink  # pymodbus only when Modbus is used
    return ModbusLink(rig, settings, port)


BUILDERS: dict[str, Callable[[Rig, LinkSettings, Any], ControllerLink]] = {
    "serial": _build_serial, "mqtt": _build_mqtt, "modbus": _build_modbus,
}


def build_link(rig: Rig, *, port: Any = None) -> ControllerLink:
    """The link ``rig``'s [link] table describes.

    ``port`` overrides where to connect: for serial a device path, a pyserial URL, or an
    open byte port such as plantrig.io.FdPort (a pty master in the demo and the tests).
    """
    if rig.link is None:
        raise RigFileError([RigIssue(str(rig.path), "link", "missing table: the rig's "
                                     "controller is on a link, so it needs [link]")])
    return BUILDERS[rig.link.kind](rig, rig.link, port)
