"""Cost of one 4-channel frame, encode + decode, against peers timed in the same run.

Peers: a bare struct pack/unpack of the same fields (the floor of any binary codec in
Python) and json.dumps/loads of the same fields (a common text alternative).
Run: .venv/bin/python bench/bench_frames.py
"""

from __future__ import annotations

import json
import struct
import timeit

from plantrig.io import Encoding, Kind, decode_frame, decode_line, encode_frame, encode_line

VALUES = [1.25, -0.5, 1000.0, 3.0e-3]
N = 20000
BARE = struct.Struct("<BBHIBB4f")


def frame_f32() -> None:
    decode_frame(encode_frame(Kind.SENSOR, 1, 2, VALUES))


def frame_i16() -> None:
    decode_frame(
        encode_frame(Kind.SENSOR, 1, 2, VALUES, encoding=Encoding.I16, scale=0.05), scale=0.05
    )


def text_line() -> None:
    decode_line(encode_line(1, 2, VALUES))


def bare_struct() -> None:
    BARE.unpack(BARE.pack(1, 1, 1, 2, 0, 4, *VALUES))


def json_peer() -> None:
    json.loads(json.dumps({"kind": 1, "seq": 1, "tick": 2, "values": VALUES}))


def per_call_us(fn: object) -> float:
    return min(timeit.repeat(fn, number=N, repeat=5)) / N * 1e6  # type: ignore[arg-type]


def main() -> None:
    rows = {
        name: per_call_us(fn)
        for name, fn in [
            ("binary frame, float32", frame_f32),
            ("binary frame, int16", frame_i16),
            ("text line", text_line),
            ("peer: bare struct pack+unpack", bare_struct),
            ("peer: json dumps+loads", json_peer),
        ]
    }
    base = rows["peer: json dumps+loads"]
    print(f"encode+decode, 4 channels, best of 5 x {N}")
    for name, us in rows.items():
        print(f"  {name:32s} {us:7.2f} us   {us / base:5.2f} x json")


if __name__ == "__main__":
    main()
