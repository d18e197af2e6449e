"""A hostile controller for tests/test_serial_link.py, run as its own process.

It holds the master end of a pty (fd inherited, given as argv[1]); the rig's SerialLink
has the slave path. Each sensor frame stamped s gets a good command (0.5 V) answering s;
every PERIOD frames one bad item of the next kind follows it, in a fixed rotation, so each
kind arrives several times. The bad frames are built field by field with the codec's
primitives (the encoder itself refuses NaN, wrong sizes and the like).
"""

from __future__ import annotations

import math
import os
import select
import struct
import sys

from plantrig.io import FrameSplitter, Kind, cobs_encode, crc16, decode_frame, encode_frame

PERIOD = 20
KINDS = ("garbage", "crc", "truncated", "oversize", "count", "nan", "inf", "range",
         "duplicate", "older")


def raw_frame(seq: int, tick: int, values: list[float], crc_xor: int = 0) -> bytes:
    body = struct.pack("<BBHIBB", 1, Kind.COMMAND, seq & 0xFFFF, tick & 0xFFFFFFFF, 0,
                       len(values)) + struct.pack(f"<{len(values)}f", *values)
    return cobs_encode(body + struct.pack("<H", crc16(body) ^ crc_xor)) + b"\x00"


def main() -> None:
    fd = int(sys.argv[1])
    os.set_blocking(fd, False)
    print("injector: ready", flush=True)
    splitter = FrameSplitter()
    seq = 0
    sent: list[bytes] = []
    n = 0
    while True:
        ready, _, _ = select.select([fd], [], [], 2.0)
        if not ready:
            return
        try:
            data = os.read(fd, 4096)
        except BlockingIOError:
            continue
        except OSError:
            return          # the rig closed its end
        if not data:
            return
        for piece in splitter.feed(data):
            frame = decode_frame(piece)
            if frame.kind != Kind.SENSOR:
                continue
            good = encode_frame(Kind.COMMAND, seq, frame.tick, [0.5])
            seq += 1
            out = [good]
            sent.append(good)
            n += 1
            if n % PERIOD == 0:
                kind = KINDS[(n // PERIOD - 1) % len(KINDS)]
                s = frame.tick
                if kind == "garbage":
                    out.append(bytes((i * 37 + 11) % 255 + 1 for i in range(40)) + b"\x00")
                elif kind == "crc":
                    out.append(raw_frame(seq, s, [1.0], crc_xor=0x5A5A))
                elif kind == "truncated":
                    out.append(raw_frame(seq, s, [1.0])[:7] + b"\x00")
                elif kind == "oversize":
                    out.append(b"\x07" * 400 + b"\x00")
                elif kind == "count":
                    out.append(raw_frame(seq, s, [1.0, 2.0]))
                    seq += 1
                elif kind in ("nan", "inf"):
                    out.append(raw_frame(seq, s, [math.nan if kind == "nan" else math.inf]))
                    seq += 1
                elif kind == "range":
                    out.append(raw_frame(seq, s, [100.0]))
                    seq += 1
                elif kind == "duplicate":
                    out.append(good)               # the same frame again, same seq
                else:
                    out.append(sent[-6])           # a frame from five commands ago
            try:
                os.write(fd, b"".join(out))
            except BlockingIOError:
                pass        # the rig is not reading: these answers are lost
            except OSError:
                return


if __name__ == "__main__":
    main()
