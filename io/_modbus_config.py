"""What the Modbus worker needs from a rig's checked [link] settings.

The [link] keys of kind = "modbus" and the register map are checked with the rest of
the rig file (sim/config/_modbus_settings.py; docs/modbus_link.md).
"""

from __future__ import annotations

from typing import Any

from plantrig.io._endpoint import parse_endpoint
from plantrig.sim import LinkSettings, Rig


def modbus_setup(rig: Rig, settings: LinkSettings, port: Any = None) -> dict[str, Any]:
    """What the worker needs: the checked options with ``port`` overriding where to
    listen (TCP: PORT or HOST:PORT; RTU: a device path)."""
    o = dict(settings.options)
    if port is not None:
        if o["transport"] == "tcp":
            host, o["port"] = parse_endpoint(str(port))
            if host:
                o["host"] = host
        else:
            o["serial_port"] = str(port)
    o["lo"] = [float(s.min) for s in rig.inputs]
    o["hi"] = [float(s.max) for s in rig.inputs]
    o["out_of_range"] = settings.out_of_range
    o["events_per_kind"] = settings.events_per_kind
    return o
