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


def cobs_encode(data: bytes | bytearray | memoryview) -> bytes:
    """COBS-encode ``data``; the result holds no 0x00 and is not yet delimited."""
    out = bytearray()
    segments = bytes(data).split(b"\x00")
    last = len(segments) - 1
    for i, seg in enumerate(segments):
        n = len(seg)
        pos = 0
        while n - pos >= 254:
            out.append(0xFF)
            out += seg[pos : pos + 254]
            pos += 254
        if i == last and pos == n and n > 0:
            # a final 0xFF block implies no zero, so no trailing empty block is needed
            break
        out.append(n - pos + 1)
        out += seg[pos:]
    return bytes(out)


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
