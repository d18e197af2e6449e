"""CRC-16/CCITT-FALSE (also catalogued as CRC-16/IBM-3740), the frame check of plantrig.

Parameters: width 16, poly 0x1021, init 0xFFFF, no input or output reflection, xorout 0;
check value 0x29B1 over b"123456789". The same parameters are what the firmware in
firmware/plantrig_frame.c computes, so the table below is spelled out the same way.
"""

from __future__ import annotations

CRC16_POLY = 0x1021
CRC16_INIT = 0xFFFF


def _make_table() -> tuple[int, ...]:
    # table[i] is the CRC register after shifting the byte i through it MSB first
    table = []
    for i in range(256):
        crc = i << 8
        for _ in range(8):
            crc = ((crc << 1) ^ CRC16_POLY) if crc & 0x8000 else (crc << 1)
        table.append(crc & 0xFFFF)
    return tuple(table)


_TABLE = _make_table()


def crc16(data: bytes | bytearray | memoryview, crc: int = CRC16_INIT) -> int:
    """CRC-16/CCITT-FALSE of ``data``; pass a previous result as ``crc`` to continue."""
    table = _TABLE
    for byte in data:
        crc = ((crc << 8) & 0xFFFF) ^ table[(crc >> 8) ^ byte]
    return crc
