"""The wire format a link uses, as the [link] table chose it: binary frames or text lines.

Both ends of a link (the rig's SerialLink and the reference controller) talk through a
WireFormat, so the choice of protocol, value encoding, int16 scale and text checksum is
made in one place. Frames are cut from the byte stream by the format's splitter and
decoded into plantrig.io Frames; errors are FrameError with the codec's reasons.
"""

from __future__ import annotations

from collections.abc import Sequence

from plantrig.io._frames import (
    Encoding,
    Frame,
    FrameError,
    FrameSplitter,
    Kind,
    decode_frame,
    encode_frame,
)
from plantrig.io._textline import LineSplitter, decode_line, encode_line

I16_MAX = (1 << 15) - 1
# enum members as module names: Kind.X is an attribute lookup on the enum class each time
_STATUS, _HEARTBEAT, _F32 = Kind.STATUS, Kind.HEARTBEAT, Encoding.F32
_VALUE_KINDS = frozenset({int(Kind.SENSOR), int(Kind.COMMAND)})


class WireFormat:
    """Encode and decode one link's frames.

    ``protocol`` is "binary" (COBS/CRC frames) or "text" (ASCII lines); ``encoding`` is
    "float32" or "int16" (binary only; value = raw * ``scale``); ``checksum`` asks text
    lines to carry and require the XOR checksum.
    """

    def __init__(self, protocol: str = "binary", encoding: str = "float32",
                 scale: float = 1.0, checksum: bool = True) -> None:
        if protocol not in ("binary", "text"):
            raise ValueError(f"protocol must be 'binary' or 'text', not {protocol!r}")
        if encoding not in ("float32", "int16"):
            raise ValueError(f"encoding must be 'float32' or 'int16', not {encoding!r}")
        self.protocol = protocol
        self.text = protocol == "text"
        self.encoding = Encoding.I16 if encoding == "int16" else Encoding.F32
        self.scale = float(scale)
        self.checksum = checksum
        # the largest magnitude an int16 value can carry (sensor values are clipped to it)
        self.limit = I16_MAX * self.scale if self.encoding == Encoding.I16 else float("inf")

    def splitter(self) -> FrameSplitter:
        """A fresh splitter for this format's delimiter and size limit."""
        return LineSplitter() if self.text else FrameSplitter()

    def encode(self, kind: Kind, seq: int, tick: int, values: Sequence[float] = ()) -> bytes:
        """One frame or line ready for the wire; raises FrameError for unsendable values.

        Text lines carry values only for SENSOR and COMMAND; a text heartbeat is a line
        with no values and a text STATUS is not sent (the caller checks ``can_status``).
        """
        if self.text:
            if kind == _STATUS:
                raise FrameError("kind", "text lines carry no status")
            return encode_line(seq, tick, values if kind != _HEARTBEAT else (),
                               checksum=self.checksum)
        encoding = self.encoding if kind in _VALUE_KINDS else _F32
        return encode_frame(kind, seq, tick, values, encoding=encoding, scale=self.scale)

    @property
    def can_status(self) -> bool:
        return not self.text

    def decode(self, piece: bytes, values_kind: Kind) -> Frame:
        """Decode one piece from the splitter. ``values_kind`` is what a text line with
        values means in this direction (COMMAND at the rig, SENSOR at the controller)."""
        if self.text:
            return decode_line(piece, kind=values_kind, require_checksum=self.checksum)
        return decode_frame(piece, scale=self.scale, link_encoding=self.encoding)
