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
    if len(data) < 254:
        # no run can reach 254 bytes, so no 0xFF block: one code byte per zero, in place
        buf = bytearray(1)
        buf += data
        buf.append(0)
        stuff_short(buf)
        del buf[-1]
        return bytes(buf)
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


def stuff_short(buf: bytearray) -> None:
    """COBS-encode in place a packet framed as 0x00 + packet + 0x00 (packet < 254 bytes).

    Every zero but the last becomes the distance to the next zero, so ``buf`` ends up as
    the encoded packet followed by its delimiter; the frame encoder packs straight into it.
    """
    if len(buf) > 255:
        raise ValueError(f"stuff_short takes packets under 254 bytes, got {len(buf) - 2}")
    i = 0
    for n in map(len, buf[1:-1].split(b"\x00")):  # split runs in C, the loop only stores
        n += 1
        buf[i] = n
        i += n


def cobs_decode(data: bytes | bytearray | memoryview) -> bytes:
    """Decode one COBS packet given without its 0x00 delimiter; raise CobsError if invalid."""
    data = bytes(data)
    n = len(data)
    if n == 0:
        raise CobsError("empty COBS packet")
    if 0 in data:
        raise CobsError(f"zero byte at offset {data.index(0)} inside a COBS packet")
    # fast path: a code below 0xFF always stands for its data and one zero (the last
    # block's zero is the delimiter), so the zeros go back where the codes sit
    out = bytearray(data)
    i = 0
    while i < n:
        code = out[i]
        if code == 0xFF:
            return _decode_blocks(data, n)
        if i + code > n:
            raise CobsError(f"block at offset {i} needs {code - 1} bytes, {n - i - 1} left")
        out[i] = 0
        i += code
    del out[0]
    return bytes(out)


def _decode_blocks(data: bytes, n: int) -> bytes:
    """Block by block, for packets with 0xFF blocks (data runs of 254 bytes or more)."""
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
