"""Text line mode for simple boards: ``seq,tick,v1,v2,...[*HH]\\n`` in ASCII.

``HH`` is an optional 8-bit XOR of every byte before the ``*``, as two hex digits (the
same scheme as NMEA 0183 sentences; common practice, from memory). A line with no values
is a heartbeat. Numbers are plain decimals (``-1.25``, ``3e-4``); ``nan``, ``inf`` and
anything else that does not parse are refused. Errors use the FrameError reasons of the
binary mode, so a link counts both the same way. Spec: docs/protocol.md.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from math import isfinite
from typing import ClassVar

from plantrig.io._frames import (
    MAX_CHANNELS,
    PROTOCOL_VERSION,
    SEQ_MODULUS,
    TICK_MODULUS,
    Frame,
    FrameError,
    FrameSplitter,
    Kind,
)

LINE_TERMINATOR = b"\n"
# bytes before the terminator, a trailing '\r' included; 32 values of the longest float
# repr (24 chars) plus seq, tick, commas and checksum stay below it
MAX_LINE_LENGTH = 1024

_UINT = re.compile(r"[0-9]+", re.ASCII)
_NUMBER = re.compile(r"[-+]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][-+]?[0-9]+)?", re.ASCII)
_HEX2 = re.compile(r"[0-9A-Fa-f]{2}", re.ASCII)
_NON_FINITE_WORDS = frozenset({"nan", "inf", "infinity"})


def xor_checksum(data: bytes | bytearray) -> int:
    """8-bit XOR of all bytes of ``data``."""
    x = 0
    for byte in data:
        x ^= byte
    return x


def encode_line(
    seq: int, tick: int, values: Sequence[float] = (), *, checksum: bool = True
) -> bytes:
    """One ASCII line with its terminator; values written as the shortest exact decimal.

    Raises FrameError "channels" for more than MAX_CHANNELS values, "non_finite" for NaN
    or infinity.
    """
    if len(values) > MAX_CHANNELS:
        raise FrameError("channels", f"{len(values)} channels, at most {MAX_CHANNELS}")
    fields = [str(seq % SEQ_MODULUS), str(tick % TICK_MODULUS)]
    for i, v in enumerate(values):
        v = float(v)
        if not isfinite(v):
            raise FrameError("non_finite", f"value {i} is {v!r}")
        fields.append(repr(v))
    body = ",".join(fields).encode("ascii")
    if checksum:
        body += b"*%02X" % xor_checksum(body)
    return body + LINE_TERMINATOR


def decode_line(
    line: bytes | bytearray,
    *,
    kind: Kind = Kind.COMMAND,
    require_checksum: bool = False,
) -> Frame:
    """Decode one line (terminator optional) into a Frame of ``kind``, or HEARTBEAT if empty.

    ``kind`` is the direction's value kind (COMMAND from a controller, SENSOR from the
    rig), since a text line does not carry one. Raises FrameError if unusable.
    """
    if kind not in (Kind.SENSOR, Kind.COMMAND):
        raise ValueError(f"text lines carry SENSOR or COMMAND values, not {kind!r}")
    if line.endswith(LINE_TERMINATOR):
        line = line[:-1]
    if len(line) > MAX_LINE_LENGTH:
        raise FrameError("oversize", f"{len(line)} bytes, at most {MAX_LINE_LENGTH}")
    if line.endswith(b"\r"):
        line = line[:-1]
    if not line:
        raise FrameError("truncated", "empty line")
    # checks in the order of docs/protocol.md section 4.1
    if not line.isascii():
        raise FrameError("syntax", "non-ASCII byte")
    body, star, check = bytes(line).partition(b"*")   # the first '*' starts the checksum
    if star:
        text = check.decode("ascii")
        if not _HEX2.fullmatch(text):
            raise FrameError("syntax", f"checksum {text[:8]!r} is not two hex digits")
        got = xor_checksum(body)
        if got != int(text, 16):
            raise FrameError("crc", f"line says {text.upper()}, bytes give {got:02X}")
    elif require_checksum:
        raise FrameError("crc", "checksum missing")
    fields = body.decode("ascii").split(",")
    if len(fields) < 2:
        raise FrameError("truncated", "needs at least seq,tick")
    seq_text, tick_text, *value_texts = fields
    if not (_UINT.fullmatch(seq_text) and int(seq_text) < SEQ_MODULUS):
        raise FrameError("syntax", f"seq {seq_text!r} is not an integer 0..{SEQ_MODULUS - 1}")
    if not (_UINT.fullmatch(tick_text) and int(tick_text) < TICK_MODULUS):
        raise FrameError("syntax", f"tick {tick_text!r} is not an integer 0..{TICK_MODULUS - 1}")
    if len(value_texts) > MAX_CHANNELS:
        raise FrameError("channels", f"{len(value_texts)} channels, at most {MAX_CHANNELS}")
    values = []
    for i, text in enumerate(value_texts):
        if not _NUMBER.fullmatch(text):
            spelled = text.lower().lstrip("+-") in _NON_FINITE_WORDS
            reason = "non_finite" if spelled else "syntax"
            raise FrameError(reason, f"value {i} {text!r} is not a finite decimal number")
        v = float(text)
        if not isfinite(v):
            raise FrameError("non_finite", f"value {i} {text!r} overflows")
        values.append(v)
    return Frame(
        PROTOCOL_VERSION,
        kind if values else Kind.HEARTBEAT,
        int(seq_text),
        int(tick_text),
        tuple(values),
    )


class LineSplitter(FrameSplitter):
    """FrameSplitter for text lines: cut at '\\n', lines over MAX_LINE_LENGTH dropped,
    empty lines kept (decode_line refuses them as ``truncated``, docs/protocol.md 4.1)."""

    DELIMITER: ClassVar[bytes] = LINE_TERMINATOR
    MAX_LENGTH: ClassVar[int] = MAX_LINE_LENGTH
    KEEP_EMPTY: ClassVar[bool] = True
