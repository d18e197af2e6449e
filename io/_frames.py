"""Binary frames between the rig and a controller: encoder, decoder, deframer, seq rules.

Layout before COBS, little-endian (full spec with tables: docs/protocol.md)::

    offset  size  field
    0       1     version    PROTOCOL_VERSION
    1       1     kind       Kind
    2       2     seq        u16, +1 per frame sent, wraps
    4       4     tick       u32, wraps
    8       1     encoding   Encoding
    9       1     count      channels, 0..MAX_CHANNELS
    10      n     values     count x float32, or count x int16 (value = raw * scale)
    10+n    2     crc        CRC-16/CCITT-FALSE of bytes 0 .. 9+n

The frame is COBS-encoded and followed by one 0x00. The per-link int16 scale is not on
the wire: both ends know it from the rig file. Frames from a controller are untrusted, so
the decoder checks every field and reports what was wrong as FrameError.reason.
"""

from __future__ import annotations

import struct
from collections.abc import Sequence
from dataclasses import dataclass
from enum import IntEnum
from math import isfinite
from typing import ClassVar

from plantrig.io._cobs import CobsError, cobs_decode, stuff_short
from plantrig.io._crc import crc16

PROTOCOL_VERSION = 1
MAX_CHANNELS = 32
HEADER_SIZE = 10
CRC_SIZE = 2
MAX_RAW_SIZE = HEADER_SIZE + 4 * MAX_CHANNELS + CRC_SIZE
# COBS adds one byte per started run of 254 bytes
MAX_ENCODED_SIZE = MAX_RAW_SIZE + (MAX_RAW_SIZE + 253) // 254
FRAME_DELIMITER = b"\x00"
SEQ_MODULUS = 1 << 16
TICK_MODULUS = 1 << 32
STATUS_MIN_CHANNELS = 2

REASONS = frozenset(
    {
        "cobs",  # not a valid COBS packet
        "crc",  # check value does not match (CRC-16, or a text line's XOR checksum)
        "truncated",  # shorter than its header or than its channel count implies
        "length",  # longer than its channel count implies
        "oversize",  # longer than the largest legal frame or line
        "version",  # protocol version other than PROTOCOL_VERSION
        "kind",  # unknown message kind
        "encoding",  # unknown value encoding
        "encoding_mismatch",  # values in the other encoding than the link's (1.4)
        "channels",  # too many channels, or a count the kind does not allow
        "non_finite",  # NaN or infinity among the values
        "range",  # a value does not fit the encoding (encoder only)
        "syntax",  # a text line that does not parse
    }
)


class Kind(IntEnum):
    """Message kind; the direction is part of the meaning."""

    SENSOR = 1  # rig -> controller: simulated sensor values
    COMMAND = 2  # controller -> rig: actuator command
    HEARTBEAT = 3  # either way: no values, proves the sender alive
    STATUS = 4  # either way: float32 [state, detail, rx_ok, rx_bad, ...]


class Encoding(IntEnum):
    """How the values are carried."""

    F32 = 0  # IEEE 754 binary32
    I16 = 1  # signed 16-bit counts; value = raw * scale, scale from the rig file


class FrameError(ValueError):
    """A frame or line that must not be used; ``reason`` is one of REASONS."""

    def __init__(self, reason: str, detail: str = "") -> None:
        if reason not in REASONS:
            raise ValueError(f"unknown FrameError reason {reason!r}")
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason
        self.detail = detail


@dataclass(frozen=True, slots=True)
class Frame:
    """One decoded frame; ``values`` are engineering values, always finite."""

    version: int
    kind: Kind
    seq: int
    tick: int
    values: tuple[float, ...]


_HEADER = struct.Struct("<BBHIBB")
_CRC = struct.Struct("<H")
_F32 = tuple(struct.Struct(f"<{n}f") for n in range(MAX_CHANNELS + 1))
_I16 = tuple(struct.Struct(f"<{n}h") for n in range(MAX_CHANNELS + 1))
# header and values in one pack, at offset 1 of a buffer that COBS then encodes in place
_F32_BODY = tuple(struct.Struct(f"<BBHIBB{n}f") for n in range(MAX_CHANNELS + 1))
_I16_BODY = tuple(struct.Struct(f"<BBHIBB{n}h") for n in range(MAX_CHANNELS + 1))
_KINDS = {int(k): k for k in Kind}
# plain ints on the hot path: comparing against IntEnum members costs an attribute lookup
_F32_CODE, _I16_CODE = int(Encoding.F32), int(Encoding.I16)
_HEARTBEAT, _STATUS = int(Kind.HEARTBEAT), int(Kind.STATUS)
_VALUE_KINDS = frozenset({int(Kind.SENSOR), int(Kind.COMMAND)})
_ENCODING_NAMES = {_F32_CODE: "float32", _I16_CODE: "int16"}
_I16_MIN, _I16_MAX = -(1 << 15), (1 << 15) - 1


def _check_scale(scale: float) -> None:
    # raw * scale must stay finite for every int16 raw
    if not (scale > 0.0 and isfinite(scale * 32768.0)):
        raise ValueError(f"int16 scale must be a finite positive number, got {scale!r}")


def _check_shape(kind: int, encoding: int, count: int) -> None:
    """The rules that tie kind, encoding and count together (same order as the decoder)."""
    if count > MAX_CHANNELS:
        raise FrameError("channels", f"{count} channels, at most {MAX_CHANNELS}")
    if kind == _HEARTBEAT and count != 0:
        raise FrameError("channels", f"heartbeat carries no values, got {count}")
    if kind == _STATUS and (encoding != _F32_CODE or count < STATUS_MIN_CHANNELS):
        raise FrameError("channels", f"status needs >= {STATUS_MIN_CHANNELS} float32 values")


def _first_non_finite(values: Sequence[float]) -> str:
    for i, v in enumerate(values):
        if not isfinite(v):
            return f"value {i} is {v!r}"
    return ""


def encode_frame(
    kind: Kind | int,
    seq: int,
    tick: int,
    values: Sequence[float] = (),
    *,
    encoding: Encoding | int = Encoding.F32,
    scale: float = 1.0,
) -> bytes:
    """Encode one frame ready for the wire (COBS + delimiter).

    ``seq`` and ``tick`` are taken modulo 2**16 and 2**32 (both wrap by definition).
    Raises FrameError with reason "kind", "encoding", "channels", "non_finite" or "range".
    """
    if kind not in _KINDS:
        raise FrameError("kind", f"unknown kind {kind!r}")
    count = len(values)
    if encoding == _F32_CODE:
        _check_shape(kind, encoding, count)
        if count and not isfinite(sum(values)):
            detail = _first_non_finite(values)
            if detail:
                raise FrameError("non_finite", detail)
        body = _F32_BODY[count]
        buf = bytearray(body.size + 4)  # 0x00 for COBS, header and values, CRC, delimiter
        try:
            body.pack_into(buf, 1, PROTOCOL_VERSION, kind, seq & 0xFFFF, tick & 0xFFFFFFFF,
                           encoding, count, *values)
        except OverflowError:
            raise FrameError("range", "value beyond the float32 range") from None
    elif encoding == _I16_CODE:
        _check_shape(kind, encoding, count)
        _check_scale(scale)
        detail = _first_non_finite(values)
        if detail:
            raise FrameError("non_finite", detail)
        raws = [round(float(v) / scale) for v in values]  # round half to even
        for i, r in enumerate(raws):
            if not _I16_MIN <= r <= _I16_MAX:
                raise FrameError("range", f"value {i} is {r} counts, outside int16")
        body = _I16_BODY[count]
        buf = bytearray(body.size + 4)
        body.pack_into(buf, 1, PROTOCOL_VERSION, kind, seq & 0xFFFF, tick & 0xFFFFFFFF,
                       encoding, count, *raws)
    else:
        raise FrameError("encoding", f"unknown encoding {encoding!r}")
    end = body.size + 1
    _CRC.pack_into(buf, end, crc16(buf[1:end]))
    stuff_short(buf)  # MAX_RAW_SIZE < 254: a frame is always short enough
    return bytes(buf)


def decode_frame(buf: bytes | bytearray, *, scale: float = 1.0,
                 link_encoding: Encoding | int | None = None) -> Frame:
    """Decode one COBS frame (its trailing 0x00 optional); raise FrameError if unusable.

    ``scale`` converts int16 counts to engineering values and is ignored for float32.
    ``link_encoding`` is the encoding the link was set up with: a SENSOR or COMMAND frame
    in the other one is refused ("encoding_mismatch"), since int16 counts read as
    engineering values (or floats read as counts) are wrong by the scale. Every link
    passes it; None (any encoding) is for tools that only inspect frames.
    """
    n = len(buf)
    if n and buf[-1] == 0:
        buf = buf[:-1]
        n -= 1
    if n == 0:
        raise FrameError("truncated", "empty frame")
    if n > MAX_ENCODED_SIZE:
        raise FrameError("oversize", f"{n} encoded bytes, at most {MAX_ENCODED_SIZE}")
    try:
        raw = cobs_decode(buf)
    except CobsError as exc:
        raise FrameError("cobs", str(exc)) from None
    size = len(raw)
    if size < HEADER_SIZE + CRC_SIZE:
        raise FrameError("truncated", f"{size} bytes, header and CRC need {HEADER_SIZE + 2}")
    end = size - CRC_SIZE
    (sent,) = _CRC.unpack_from(raw, end)
    got = crc16(raw[:end])
    if got != sent:
        raise FrameError("crc", f"frame says 0x{sent:04X}, bytes give 0x{got:04X}")
    version, kind_code, seq, tick, encoding, count = _HEADER.unpack_from(raw)
    if version != PROTOCOL_VERSION:
        raise FrameError("version", f"version {version}, expected {PROTOCOL_VERSION}")
    kind = _KINDS.get(kind_code)
    if kind is None:
        raise FrameError("kind", f"unknown kind {kind_code}")
    if encoding == _F32_CODE:
        width = 4
    elif encoding == _I16_CODE:
        width = 2
    else:
        raise FrameError("encoding", f"unknown encoding {encoding}")
    if count > MAX_CHANNELS:
        raise FrameError("channels", f"{count} channels, at most {MAX_CHANNELS}")
    payload = end - HEADER_SIZE
    if payload != count * width:
        reason = "truncated" if payload < count * width else "length"
        raise FrameError(reason, f"{payload} payload bytes for {count} x {width}")
    _check_shape(kind, encoding, count)
    if link_encoding is not None and encoding != link_encoding and kind_code in _VALUE_KINDS:
        raise FrameError("encoding_mismatch", f"{kind.name} frame carries "
                         f"{_ENCODING_NAMES[encoding]}, the link is set up for "
                         f"{_ENCODING_NAMES.get(int(link_encoding), '?')}")
    if width == 4:
        values = _F32[count].unpack_from(raw, HEADER_SIZE)
        # at most 32 float32 values cannot overflow a float64 sum: finite sum <=> all finite
        if count and not isfinite(sum(values)):
            raise FrameError("non_finite", _first_non_finite(values))
    else:
        _check_scale(scale)
        values = tuple(r * scale for r in _I16[count].unpack_from(raw, HEADER_SIZE))
    return Frame(version, kind, seq, tick, values)


class FrameSplitter:
    """Cuts a byte stream into frames at each delimiter, whatever the chunking.

    Yields the bytes between delimiters (without the delimiter); empty runs are skipped
    unless KEEP_EMPTY (text lines: an empty line is a message, and the decoder says
    ``truncated``). A run longer than MAX_LENGTH is dropped whole and counted in
    ``oversize``, and the buffer never holds more than MAX_LENGTH bytes, so a noisy line
    cannot grow memory.
    """

    DELIMITER: ClassVar[bytes] = FRAME_DELIMITER
    MAX_LENGTH: ClassVar[int] = MAX_ENCODED_SIZE
    KEEP_EMPTY: ClassVar[bool] = False

    def __init__(self) -> None:
        self._buf = bytearray()
        self._skipping = False
        self.oversize = 0
        self.dropped_bytes = 0

    @property
    def pending(self) -> int:
        """Bytes held of a frame not yet complete (never more than MAX_LENGTH)."""
        return len(self._buf)

    def reset(self) -> None:
        """Forget a partial frame (after a reconnect); counters are kept."""
        self.dropped_bytes += len(self._buf)
        self._buf.clear()
        self._skipping = False

    def feed(self, data: bytes | bytearray | memoryview) -> list[bytes]:
        """Add received bytes; return the frames they complete, oldest first."""
        parts = bytes(data).split(self.DELIMITER)  # in C; the last part is still open
        rest = parts.pop()
        cap, buf = self.MAX_LENGTH, self._buf
        frames: list[bytes] = []
        if parts:
            if self._skipping:   # the tail of an oversize run: not a run of its own
                self.dropped_bytes += len(parts[0])
                del parts[0]
                self._skipping = False
            elif buf:
                buf += parts[0]
                parts[0] = bytes(buf)
                buf.clear()
            keep_empty = self.KEEP_EMPTY
            for piece in parts:
                if len(piece) > cap:
                    self.oversize += 1
                    self.dropped_bytes += len(piece)
                elif piece or keep_empty:
                    frames.append(piece)
        if self._skipping:
            self.dropped_bytes += len(rest)
        elif len(buf) + len(rest) > cap:
            self.oversize += 1
            self.dropped_bytes += len(buf) + len(rest)
            buf.clear()
            self._skipping = True
        else:
            buf += rest
        return frames


class SeqTracker:
    """Sorts received sequence numbers into new, duplicate and out-of-order frames.

    With d = (seq - last) mod 2**16: d == 0 is a duplicate, 0 < d < 2**15 is new (d - 1
    frames were lost), d >= 2**15 is out of order (older than the newest seen). Only new
    frames are to be used. RESYNC_AFTER out-of-order frames in a row mean the sender
    restarted its count: the last of them is accepted and counted in ``resyncs``.
    """

    RESYNC_AFTER: ClassVar[int] = 3

    def __init__(self) -> None:
        self.last: int | None = None
        self._behind = 0
        self.accepted = 0
        self.duplicates = 0
        self.out_of_order = 0
        self.lost = 0
        self.resyncs = 0

    def reset(self) -> None:
        """Forget the last sequence number (link lost or reopened); counters are kept."""
        self.last = None
        self._behind = 0

    def check(self, seq: int) -> bool:
        """Count ``seq``; True if its frame is new and should be used."""
        last = self.last
        if last is not None:
            d = (seq - last) % SEQ_MODULUS
            if d == 0:
                self.duplicates += 1
                return False
            if d < SEQ_MODULUS // 2:
                self.lost += d - 1
            else:
                self._behind += 1
                if self._behind < self.RESYNC_AFTER:
                    self.out_of_order += 1
                    return False
                self.resyncs += 1
        self.last = seq % SEQ_MODULUS
        self._behind = 0
        self.accepted += 1
        return True
