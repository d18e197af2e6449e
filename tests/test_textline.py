"""Text line mode: pinned lines, checksum, every reject reason, line splitter, fuzz."""

from __future__ import annotations

import json
import math
from functools import reduce
from operator import xor
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from plantrig.io import (
    MAX_CHANNELS,
    MAX_LINE_LENGTH,
    REASONS,
    Frame,
    FrameError,
    Kind,
    LineSplitter,
    decode_line,
    encode_line,
    xor_checksum,
)

VECTORS = json.loads((Path(__file__).parents[1] / "docs" / "protocol_vectors.json").read_text())
FUZZ = dict(derandomize=True, database=None, deadline=None)
KINDS = {"command": Kind.COMMAND, "heartbeat": Kind.HEARTBEAT}


def test_xor_checksum_known_sentence() -> None:
    # NMEA 0183 style XOR over the bytes between '$' and '*' (common practice); the widely
    # quoted sentence "GPGGA,123519,4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,"
    # carries *47 (from memory; the functools reduce below is an independent recount)
    body = b"GPGGA,123519,4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,"
    assert xor_checksum(body) == 0x47 == reduce(xor, body, 0)


@pytest.mark.parametrize("vec", VECTORS["text_lines"], ids=lambda v: v["name"])
def test_pinned_lines(vec: dict) -> None:
    frame = decode_line(vec["line"].encode("ascii"))
    assert frame == Frame(1, KINDS[vec["kind"]], vec["seq"], vec["tick"], tuple(vec["values"]))


@pytest.mark.parametrize("vec", VECTORS["bad_text_lines"], ids=lambda v: v["name"])
def test_rejects_with_reason(vec: dict) -> None:
    line = bytes.fromhex(vec["line_hex"]) if "line_hex" in vec else vec["line"].encode("ascii")
    with pytest.raises(FrameError) as info:
        decode_line(line, require_checksum=vec.get("require_checksum", False))
    assert info.value.reason == vec["reason"]


def test_line_checks_follow_the_documented_order() -> None:
    # docs/protocol.md 4.1: a line failing several checks gets the reason of the first
    cases = [
        (b"1,2,1." + b"0" * 1018 + b"\xb5*00\r\n", "oversize"),   # 1 before 3, 4
        (b"\r\n", "truncated"),                                      # 2
        (b"\xb5\n", "syntax"),                                       # 3 before 4 (required)
        (b"x,y,nan*00\n", "crc"),                                   # 4 before 5..8
        (b"1*31\n", "truncated"),                                    # 5 after 4
        (b"1,y," + b"0," * 40 + b"nan\n", "syntax"),                  # 6 before 7, 8
        (b"1,2," + b"nan," * 40 + b"0\n", "channels"),                # 7 before 8
    ]
    for line, reason in cases:
        with pytest.raises(FrameError) as info:
            decode_line(line, require_checksum=line == b"\xb5\n")
        assert info.value.reason == reason, line


def test_encoder_writes_checksum_and_wraps() -> None:
    line = encode_line(65537, 2**32 + 3, [1.5, -2e-05])
    assert line == b"1,3,1.5,-2e-05*%02X\n" % reduce(xor, b"1,3,1.5,-2e-05", 0)
    assert encode_line(1, 2, [0.5], checksum=False) == b"1,2,0.5\n"


def test_required_checksum_and_non_ascii() -> None:
    with pytest.raises(FrameError) as info:
        decode_line(b"1,2,0.5\n", require_checksum=True)
    assert info.value.reason == "crc"
    with pytest.raises(FrameError) as info:
        decode_line(b"1,2,0.5\xb5\n")
    assert info.value.reason == "syntax"
    assert decode_line(b"1,2,0.5\n", kind=Kind.SENSOR).kind == Kind.SENSOR
    with pytest.raises(ValueError, match="SENSOR or COMMAND"):
        decode_line(b"1,2\n", kind=Kind.STATUS)


@pytest.mark.parametrize(
    "values, reason",
    [
        ([math.nan], "non_finite"),
        ([1.0, -math.inf], "non_finite"),
        ([0.0] * (MAX_CHANNELS + 1), "channels"),
    ],
)
def test_encoder_refuses(values: list[float], reason: str) -> None:
    with pytest.raises(FrameError) as info:
        encode_line(1, 1, values)
    assert info.value.reason == reason


finite = st.floats(allow_nan=False, allow_infinity=False)


@settings(max_examples=300, **FUZZ)
@given(
    st.integers(0, 2**16 - 1),
    st.integers(0, 2**32 - 1),
    st.lists(finite, max_size=MAX_CHANNELS),
    st.booleans(),
)
def test_round_trip_exact(seq: int, tick: int, values: list[float], checksum: bool) -> None:
    line = encode_line(seq, tick, values, checksum=checksum)
    assert len(line) - 1 <= MAX_LINE_LENGTH  # the bound holds for the longest reprs
    frame = decode_line(line, require_checksum=checksum)
    assert (frame.seq, frame.tick, frame.values) == (seq, tick, tuple(values))


def test_line_splitter_bounds_lines() -> None:
    s = LineSplitter()
    assert s.feed(b"1,2,3\r\n4,") == [b"1,2,3\r"]
    assert s.feed(b"5\n\n") == [b"4,5", b""]   # an empty line is a message: truncated
    s.feed(b"9" * (MAX_LINE_LENGTH + 1))
    assert s.oversize == 1 and s.pending == 0
    assert s.feed(b"9\n7,8\n") == [b"7,8"]


# ---- fuzz: only FrameError escapes, no non-finite value is ever returned (2,000 examples)


def check_line(line: bytes) -> None:
    try:
        frame = decode_line(line)
    except FrameError as exc:
        assert exc.reason in REASONS
        return
    assert all(math.isfinite(v) for v in frame.values)
    assert 0 <= frame.seq < 2**16 and 0 <= frame.tick < 2**32


ALPHABET = b"0123456789,.*eE+-naifAF \r\n\x00\xff"


@settings(max_examples=1000, **FUZZ)
@given(st.lists(st.sampled_from(ALPHABET), max_size=80).map(bytes) | st.binary(max_size=80))
def test_fuzz_decode_line(line: bytes) -> None:
    check_line(line)


@settings(max_examples=1000, **FUZZ)
@given(
    st.lists(
        st.binary(max_size=40) | st.sampled_from([b"1,2,3.5*2B\n", b"\n", b"9" * 1100]), max_size=10
    )
)
def test_fuzz_line_splitter(chunks: list[bytes]) -> None:
    s = LineSplitter()
    for chunk in chunks:
        for line in s.feed(chunk):
            assert len(line) <= MAX_LINE_LENGTH and b"\n" not in line
            check_line(line)
        assert s.pending <= MAX_LINE_LENGTH
