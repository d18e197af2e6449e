"""Controller links, frame codecs and signal conditioning."""

from plantrig.io._cobs import CobsError, cobs_decode, cobs_encode
from plantrig.io._conditioning import (
    ActuatorChain,
    ActuatorChannel,
    ChainSpecError,
    SensorChain,
    SensorChannel,
    build_actuator_chain,
    build_sensor_chain,
    counts_to_eng,
    eng_to_counts,
)
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
from plantrig.io._textline import (
    MAX_LINE_LENGTH,
    LineSplitter,
    decode_line,
    encode_line,
    xor_checksum,
)

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
    "ActuatorChain",
    "ActuatorChannel",
    "ChainSpecError",
    "SensorChain",
    "SensorChannel",
    "build_actuator_chain",
    "build_sensor_chain",
    "counts_to_eng",
    "eng_to_counts",
]
