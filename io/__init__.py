"""Controller links and frame codecs (signal conditioning is numeric: plantrig.sim).

Names load on first use (PEP 562, plantrig._lazy): `import plantrig.io` costs
almost nothing, so `plantrig check` needs neither pyserial nor aiomqtt nor pymodbus,
and a link's worker process (`python -m plantrig.io._mqtt_worker`) imports only what it
uses.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from plantrig._lazy import lazy_names

# the module (under plantrig.io) each public name lives in
_HOME: dict[str, str] = {
    **dict.fromkeys(["BrokerError", "LocalBroker"], "_broker"),
    **dict.fromkeys(["CobsError", "cobs_decode", "cobs_encode"], "_cobs"),
    **dict.fromkeys(["crc16"], "_crc"),
    **dict.fromkeys(
        [
            "MAX_CHANNELS",
            "MAX_ENCODED_SIZE",
            "PROTOCOL_VERSION",
            "REASONS",
            "Encoding",
            "Frame",
            "FrameError",
            "FrameSplitter",
            "Kind",
            "SeqTracker",
            "decode_frame",
            "encode_frame",
        ],
        "_frames",
    ),
    **dict.fromkeys(["build_link"], "_link_config"),
    **dict.fromkeys(["modbus_setup"], "_modbus_config"),
    **dict.fromkeys(["run_modbus_controller"], "_modbus_controller"),
    **dict.fromkeys(["ModbusLink"], "_modbus_link"),
    **dict.fromkeys(["MqttSettings", "mqtt_settings"], "_mqtt_config"),
    **dict.fromkeys(["MqttControllerPeer", "serve_reference"], "_mqtt_controller"),
    **dict.fromkeys(["MqttLink"], "_mqtt_link"),
    **dict.fromkeys(["FdPort", "PtyPair", "open_pty_pair"], "_pty"),
    **dict.fromkeys(
        [
            "TRANSPORTS",
            "ReferenceController",
            "SerialTransport",
            "Transport",
            "end_lines",
            "prefer_realtime",
            "run_controller",
        ],
        "_refcontroller",
    ),
    **dict.fromkeys(["BytePort", "LinkError", "SerialLink", "open_serial_port"], "_serial_link"),
    **dict.fromkeys(
        [
            "MAX_LINE_LENGTH",
            "LineSplitter",
            "decode_line",
            "encode_line",
            "xor_checksum",
        ],
        "_textline",
    ),
    **dict.fromkeys(["WireFormat"], "_wire"),
}

__all__ = [
    "MAX_CHANNELS",
    "MAX_ENCODED_SIZE",
    "MAX_LINE_LENGTH",
    "PROTOCOL_VERSION",
    "REASONS",
    "CobsError",
    "Encoding",
    "Frame",
    "FrameError",
    "FrameSplitter",
    "Kind",
    "LineSplitter",
    "SeqTracker",
    "cobs_decode",
    "cobs_encode",
    "crc16",
    "decode_frame",
    "decode_line",
    "encode_frame",
    "encode_line",
    "xor_checksum",
    # links
    "TRANSPORTS",
    "BytePort",
    "FdPort",
    "LinkError",
    "PtyPair",
    "ReferenceController",
    "SerialLink",
    "SerialTransport",
    "Transport",
    "WireFormat",
    "build_link",
    "end_lines",
    "open_pty_pair",
    "open_serial_port",
    "prefer_realtime",
    "run_controller",
    # MQTT
    "BrokerError",
    "LocalBroker",
    "MqttControllerPeer",
    "MqttLink",
    "MqttSettings",
    "mqtt_settings",
    "serve_reference",
    # Modbus
    "ModbusLink",
    "modbus_setup",
    "run_modbus_controller",
]

__getattr__, __dir__ = lazy_names(__name__, _HOME, __all__)

if TYPE_CHECKING:  # type checkers and editors see every name where it lives
    from plantrig.io._broker import BrokerError, LocalBroker
    from plantrig.io._cobs import CobsError, cobs_decode, cobs_encode
    from plantrig.io._crc import crc16
    from plantrig.io._frames import (
        MAX_CHANNELS,
        MAX_ENCODED_SIZE,
        PROTOCOL_VERSION,
        REASONS,
        Encoding,
        Frame,
        FrameError,
        FrameSplitter,
        Kind,
        SeqTracker,
        decode_frame,
        encode_frame,
    )
    from plantrig.io._link_config import build_link
    from plantrig.io._modbus_config import modbus_setup
    from plantrig.io._modbus_controller import run_modbus_controller
    from plantrig.io._modbus_link import ModbusLink
    from plantrig.io._mqtt_config import MqttSettings, mqtt_settings
    from plantrig.io._mqtt_controller import MqttControllerPeer, serve_reference
    from plantrig.io._mqtt_link import MqttLink
    from plantrig.io._pty import FdPort, PtyPair, open_pty_pair
    from plantrig.io._refcontroller import (
        TRANSPORTS,
        ReferenceController,
        SerialTransport,
        Transport,
        end_lines,
        prefer_realtime,
        run_controller,
    )
    from plantrig.io._serial_link import BytePort, LinkError, SerialLink, open_serial_port
    from plantrig.io._textline import (
        MAX_LINE_LENGTH,
        LineSplitter,
        decode_line,
        encode_line,
        xor_checksum,
    )
    from plantrig.io._wire import WireFormat
