"""Consistent Overhead Byte Stuffing (S. Cheshire and M. Baker, "Consistent Overhead Byte
Stuffing", IEEE/ACM Transactions on Networking 7(2), 1999).

COBS removes every 0x00 from a packet at a cost of at most one byte per 254, so 0x00 can
delimit frames on a byte stream and a receiver can resynchronise at the next 0x00 after
any garbage. Each block is a code byte n (1..255) followed by n-1 data bytes; a code below
0xFF stands for its data followed by one zero, except at the very end of the packet.
"""

from __future__ import annotations


class CobsError(ValueError):
    """The bytes are not a valid COBS encoding (a zero inside, or a block runs past the end)."""


_CODE = tuple(bytes((n + 1,)) for n in range(254))


def cobs_encode(data: bytes | bytearray | memoryview) -> bytes:
    """COBS-encode ``data``; the result holds no 0x00 and is not yet delimited."""
    blocks = []
    segments = bytes(data).split(b"\x00")
    for seg in segments:
        while len(seg) >= 254:
            blocks.append(b"\xff" + seg[:254])
            seg = seg[254:]
        blocks.append(_CODE[len(seg)] + seg)
    if segments[-1] and len(segments[-1]) % 254 == 0:
        # a final 0xFF block implies no zero, so the empty block after it is not sent
        blocks.pop()
    return b"".join(blocks)


def cobs_decode(data: bytes | bytearray | memoryview) -> bytes:
    """Decode one COBS packet given without its 0x00 delimiter; raise CobsError if invalid."""
    data = bytes(data)
    n = len(data)
    if n == 0:
        raise CobsError("empty COBS packet")
    if 0 in data:
        raise CobsError(f"zero byte at offset {data.index(0)} inside a COBS packet")
    out = bytearray()
    i = 0
    while i < n:
        code = data[i]
        end = i + code
        if end > n:
            raise CobsError(f"block at offset {i} needs {code - 1} bytes, {n - i - 1} left")
        out += data[i + 1 : end]
        i = end
        if code < 0xFF and i < n:
            out.append(0)
    return bytes(out)
