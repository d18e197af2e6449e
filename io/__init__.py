"""Controller links and frame codecs (signal conditioning is numeric: plantrig.sim)."""

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
from plantrig.io._link_config import (
    LINK_KINDS,
    Issues,
    LinkKind,
    LinkSettings,
    build_link,
    check_link_table,
    parse_link_table,
)
from plantrig.io._mqtt_config import MqttSettings, TlsSettings
from plantrig.io._pty import FdPort, PtyPair, open_pty_pair
from plantrig.io._refcontroller import (
    TRANSPORTS,
    ReferenceController,
    SerialTransport,
    Transport,
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
    # signal conditioning
    # links
    "LINK_KINDS",
    "TRANSPORTS",
    "BytePort",
    "FdPort",
    "Issues",
    "LinkError",
    "LinkKind",
    "LinkSettings",
    "PtyPair",
    "ReferenceController",
    "SerialLink",
    "SerialTransport",
    "Transport",
    "WireFormat",
    "build_link",
    "check_link_table",
    "open_pty_pair",
    "open_serial_port",
    "parse_link_table",
    "run_controller",
    # MQTT (MqttLink and MqttControllerPeer load aiomqtt on first use)
    "BrokerError",
    "LocalBroker",
    "MqttControllerPeer",
    "MqttLink",
    "MqttSettings",
    "TlsSettings",
]

_LAZY = {"MqttLink": "plantrig.io._mqtt_link", "MqttControllerPeer": "plantrig.io._mqtt_controller"}


def __getattr__(name: str) -> object:
    """Load the MQTT link's names when first used, so `plantrig check` needs no aiomqtt."""
    if name in _LAZY:
        import importlib
        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'plantrig.io' has no attribute {name!r}")
