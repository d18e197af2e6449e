"""Binary frames: pinned vectors, layout, every reject reason, deframer, sequence rules, fuzz."""

from __future__ import annotations

import binascii
import json
import math
import re
import struct
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from plantrig.io import (
    MAX_CHANNELS,
    MAX_ENCODED_SIZE,
    REASONS,
    Encoding,
    Frame,
    FrameError,
    FrameSplitter,
    Kind,
    SeqTracker,
    cobs_encode,
    crc16,
    decode_frame,
    encode_frame,
)

VECTORS = json.loads((Path(__file__).parents[1] / "docs" / "protocol_vectors.json").read_text())
# the decoder and splitter fuzz below totals 8,000 examples (2,000 more in test_textline.py)
FUZZ = dict(derandomize=True, database=None, deadline=None)
ENCODINGS = {"f32": Encoding.F32, "i16": Encoding.I16}


def build(
    version: int,
    kind: int,
    seq: int,
    tick: int,
    enc: int,
    count: int,
    payload: bytes,
    crc_xor: int = 0,
) -> bytes:
    """A frame laid out field by field after the table in docs/protocol.md."""
    body = struct.pack("<BBHIBB", version, kind, seq, tick, enc, count) + payload
    return cobs_encode(body + struct.pack("<H", crc16(body) ^ crc_xor)) + b"\x00"


@pytest.mark.parametrize("vec", VECTORS["frames"], ids=lambda v: v["name"])
def test_pinned_vectors(vec: dict) -> None:
    enc = ENCODINGS[vec["encoding"]]
    wire = bytes.fromhex(vec["wire"])
    assert (
        encode_frame(
            vec["kind"], vec["seq"], vec["tick"], vec["values"], encoding=enc, scale=vec["scale"]
        )
        == wire
    )
    frame = decode_frame(wire, scale=vec["scale"])
    expected = vec["values"] if enc == Encoding.F32 else [r * vec["scale"] for r in vec["raw"]]
    assert frame == Frame(1, Kind(vec["kind"]), vec["seq"], vec["tick"], tuple(expected))
    assert wire.endswith(b"\x00") and 0 not in wire[:-1]


def test_frames_quoted_in_the_spec_are_vectors() -> None:
    doc = (Path(__file__).parents[1] / "docs" / "protocol.md").read_text()
    quoted = set(re.findall(r"`([0-9a-f]{12,})`|^on the wire +([0-9a-f]+)$", doc, re.M))
    wires = {v["wire"] for v in VECTORS["frames"] + VECTORS["bad_frames"]}
    quoted_hex = {a or b for a, b in quoted}
    assert len(quoted_hex) >= 10 and quoted_hex <= wires


def test_layout_byte_by_byte() -> None:
    # sensor, seq 0x0201, tick 0x0A0B0C0D, two float32 values 1.0 and -2.0, per the spec table
    raw = bytes([1, 1, 0x01, 0x02, 0x0D, 0x0C, 0x0B, 0x0A, 0, 2])
    raw += bytes.fromhex("0000803f") + bytes.fromhex("000000c0")  # IEEE 754 binary32, LE
    raw += binascii.crc_hqx(raw, 0xFFFF).to_bytes(2, "little")  # outside CRC reference
    assert encode_frame(Kind.SENSOR, 0x0201, 0x0A0B0C0D, [1.0, -2.0]) == cobs_encode(raw) + b"\0"


@pytest.mark.parametrize("vec", VECTORS["bad_frames"], ids=lambda v: v["name"])
def test_rejects_with_reason(vec: dict) -> None:
    link = ENCODINGS.get(vec.get("link_encoding", ""))
    with pytest.raises(FrameError) as info:
        decode_frame(bytes.fromhex(vec["wire"]), link_encoding=link)
    assert info.value.reason == vec["reason"]


def test_encoding_mismatch_is_the_links_rule_not_the_frames() -> None:
    """An int16 command is a good frame; on a float32 link its counts would become
    engineering values (raw 12 read as 12 V at any scale), so the link refuses it."""
    wire = encode_frame(Kind.COMMAND, 7, 8, [0.12], encoding=Encoding.I16, scale=0.01)
    assert decode_frame(wire, scale=0.01, link_encoding=Encoding.I16).values == (0.12,)
    assert decode_frame(wire).values == (12.0,)       # what slipped through before
    with pytest.raises(FrameError) as info:
        decode_frame(wire, link_encoding=Encoding.F32)
    assert info.value.reason == "encoding_mismatch"
    assert str(info.value) == ("encoding_mismatch: COMMAND frame carries int16, the link is "
                               "set up for float32")
    # heartbeats carry no values and status is float32 by definition: either link takes them
    for link in Encoding:
        beat = encode_frame(Kind.HEARTBEAT, 1, 2, encoding=Encoding.I16)
        assert decode_frame(beat, link_encoding=link).kind == Kind.HEARTBEAT
        status = encode_frame(Kind.STATUS, 1, 2, [1.0, 0.0])
        assert decode_frame(status, link_encoding=link).values == (1.0, 0.0)
    # the check comes after the shape checks, before the float32 values are looked at
    nan = build(1, Kind.COMMAND, 1, 2, Encoding.F32, 1, struct.pack("<f", math.nan))
    with pytest.raises(FrameError) as info:
        decode_frame(nan, link_encoding=Encoding.I16)
    assert info.value.reason == "encoding_mismatch"


def test_every_decoder_reason_has_a_vector() -> None:
    covered = {v["reason"] for v in VECTORS["bad_frames"]}
    # "range" is the encoder's, "syntax" the text mode's
    assert covered == REASONS - {"range", "syntax"}


def test_frame_error_is_a_value_error_with_known_reasons() -> None:
    err = FrameError("crc", "detail")
    assert isinstance(err, ValueError) and err.reason == "crc" and "detail" in str(err)
    with pytest.raises(ValueError, match="unknown FrameError reason"):
        FrameError("gremlins")


@pytest.mark.parametrize(
    "kwargs, reason",
    [
        (dict(values=[1.0, math.nan]), "non_finite"),
        (dict(values=[math.inf]), "non_finite"),
        (dict(values=[-math.inf], encoding=Encoding.I16), "non_finite"),
        (dict(values=[1e39]), "range"),  # beyond float32 max 3.4028235e38
        (dict(values=[1e308, 1e308]), "range"),  # float64 sum overflows, values finite
        (dict(values=[32767.5], encoding=Encoding.I16), "range"),  # rounds to 32768
        (dict(values=[-3.3], encoding=Encoding.I16, scale=1e-4), "range"),
        (dict(values=[0.0] * 33), "channels"),
        (dict(kind=Kind.HEARTBEAT, values=[1.0]), "channels"),
        (dict(kind=Kind.STATUS, values=[1.0, 2.0], encoding=Encoding.I16), "channels"),
        (dict(kind=Kind.STATUS, values=[1.0]), "channels"),
        (dict(kind=9), "kind"),
        (dict(encoding=5), "encoding"),
    ],
)
def test_encoder_refuses(kwargs: dict, reason: str) -> None:
    args = dict(kind=Kind.SENSOR, seq=0, tick=0, values=[1.0]) | kwargs
    with pytest.raises(FrameError) as info:
        encode_frame(**args)
    assert info.value.reason == reason


@pytest.mark.parametrize("scale", [0.0, -1.0, math.nan, math.inf, 1e305])
def test_bad_scale_is_a_config_error(scale: float) -> None:
    with pytest.raises(ValueError, match="scale"):
        encode_frame(Kind.SENSOR, 0, 0, [1.0], encoding=Encoding.I16, scale=scale)
    wire = encode_frame(Kind.SENSOR, 0, 0, [1.0], encoding=Encoding.I16)
    with pytest.raises(ValueError, match="scale"):
        decode_frame(wire, scale=scale)


def test_seq_and_tick_wrap_and_numpy_values() -> None:
    a = encode_frame(Kind.SENSOR, 65536 + 5, 2**32 + 7, np.array([0.5, -1.25]))
    assert a == encode_frame(Kind.SENSOR, 5, 7, [0.5, -1.25])
    assert decode_frame(a[:-1]).seq == 5  # delimiter optional


def test_int16_rounds_half_to_even_and_scales() -> None:
    wire = encode_frame(Kind.COMMAND, 1, 1, [0.25, 0.75, -0.25], encoding=Encoding.I16, scale=0.5)
    assert decode_frame(wire, scale=0.5).values == (0.0, 1.0, 0.0)
    assert decode_frame(wire, scale=2.0).values == (0.0, 4.0, 0.0)


f32 = st.floats(width=32, allow_nan=False, allow_infinity=False)


@settings(max_examples=300, **FUZZ)
@given(
    st.sampled_from([Kind.SENSOR, Kind.COMMAND]),
    st.integers(0, 2**16 - 1),
    st.integers(0, 2**32 - 1),
    st.lists(f32, max_size=MAX_CHANNELS),
)
def test_float32_round_trip(kind: Kind, seq: int, tick: int, values: list[float]) -> None:
    wire = encode_frame(kind, seq, tick, values)
    assert len(wire) <= MAX_ENCODED_SIZE + 1
    assert decode_frame(wire) == Frame(1, kind, seq, tick, tuple(values))


@settings(max_examples=300, **FUZZ)
@given(
    st.lists(st.integers(-(2**15), 2**15 - 1), max_size=MAX_CHANNELS),
    st.sampled_from([1.0, 0.01, 0.125, 3.0, 1e-6]),
)
def test_int16_round_trip(raws: list[int], scale: float) -> None:
    wire = encode_frame(
        Kind.COMMAND, 3, 4, [r * scale for r in raws], encoding=Encoding.I16, scale=scale
    )
    assert decode_frame(wire, scale=scale).values == tuple(r * scale for r in raws)


# ---- the deframer


def test_splitter_any_chunking_same_frames() -> None:
    frames = [encode_frame(Kind.SENSOR, i, i, [float(i)] * (i % 5)) for i in range(20)]
    stream = b"".join(frames)
    for size in (1, 2, 3, 7, 64, len(stream)):
        s = FrameSplitter()
        got = [f for i in range(0, len(stream), size) for f in s.feed(stream[i : i + size])]
        assert got == [f[:-1] for f in frames]
        assert s.pending == 0 and s.oversize == 0


def test_splitter_garbage_then_resync() -> None:
    s = FrameSplitter()
    good = encode_frame(Kind.COMMAND, 9, 9, [1.0])
    # garbage glued to a frame costs that frame only; extra delimiters are harmless
    out = s.feed(b"\x13\x37garbage" + good + good + b"\x00\x00" + good)
    assert len(out) == 3 and [decode_frame(f).seq for f in out[1:]] == [9, 9]
    with pytest.raises(FrameError):
        decode_frame(out[0])


def test_splitter_caps_a_run_without_delimiter() -> None:
    s = FrameSplitter()
    for _ in range(1000):
        assert s.feed(b"\x01" * 997) == []
        assert s.pending <= FrameSplitter.MAX_LENGTH
    assert s.oversize == 1
    good = encode_frame(Kind.COMMAND, 1, 2, [3.0])
    assert s.feed(b"\x01\x00" + good) == [good[:-1]]  # the overlong run ends, the next is kept
    assert s.dropped_bytes == 997_000 + 1
    s.feed(b"\x01" * (MAX_ENCODED_SIZE + 1) + b"\x00")  # complete but overlong in one chunk
    assert s.oversize == 2


def test_splitter_keeps_longest_legal_frame_and_reset() -> None:
    s = FrameSplitter()
    assert s.feed(b"\x01" * MAX_ENCODED_SIZE + b"\x00") == [b"\x01" * MAX_ENCODED_SIZE]
    s.feed(b"\x05\x06")
    s.reset()
    assert s.pending == 0 and s.feed(b"\x07\x00") == [b"\x07"]


# ---- sequence numbers


def test_seq_tracker_rules() -> None:
    t = SeqTracker()
    got = [t.check(s) for s in [65534, 65535, 0, 0, 3, 2, 4]]
    # first accepted; wrap 65535 -> 0 is new; 0 again duplicate; 1, 2 lost; 2 is late
    assert got == [True, True, True, False, True, False, True]
    assert (t.accepted, t.duplicates, t.lost, t.out_of_order) == (5, 1, 2, 1)


def test_seq_tracker_resyncs_after_sender_restart() -> None:
    t = SeqTracker()
    for s in range(1000, 1010):
        t.check(s)
    assert [t.check(s) for s in range(0, 5)] == [False, False, True, True, True]
    assert (t.out_of_order, t.resyncs, t.lost) == (2, 1, 0)
    t.reset()
    assert t.check(40000) and t.lost == 0


# ---- fuzz: only FrameError escapes, no non-finite value is ever returned


def check_decode(buf: bytes) -> Frame | None:
    try:
        frame = decode_frame(buf, scale=0.01)
    except FrameError as exc:
        assert exc.reason in REASONS
        return None
    assert all(math.isfinite(v) for v in frame.values)
    assert frame.version == 1 and isinstance(frame.kind, Kind)
    assert len(frame.values) <= MAX_CHANNELS
    return frame


@settings(max_examples=2000, **FUZZ)
@given(st.binary(max_size=200))
def test_fuzz_random_bytes(buf: bytes) -> None:
    check_decode(buf)


NON_FINITE_F32 = [bytes.fromhex(h) for h in ("0000c07f", "0100807f", "0000807f", "000080ff")]
HEADS = st.tuples(
    st.sampled_from([1, 1, 1, 1, 1, 1, 2, 0]),  # version
    st.sampled_from([1, 2, 3, 4, 4, 0, 5]),  # kind
    st.sampled_from([0, 0, 1, 2]),  # encoding
    st.integers(0, MAX_CHANNELS + 1),  # count
    st.sampled_from([0, 0, 0, 0, 0, 1, 2, -1]),  # payload bytes short (> 0) or extra (< 0)
)


@settings(max_examples=3000, **FUZZ)
@given(
    HEADS,
    st.binary(min_size=132, max_size=132),
    st.sampled_from([None, None, *NON_FINITE_F32]),
    st.integers(0, 32),
)
def test_fuzz_valid_crc_arbitrary_fields(
    head: tuple[int, ...], pool: bytes, special: bytes | None, where: int
) -> None:
    # a correct CRC around arbitrary fields and payloads, with NaN and infinity planted
    version, kind, enc, count, cut = head
    size = count * (2 if enc == 1 else 4)
    payload = bytearray(pool[:size])
    if special and size >= 4:
        at = 4 * (where % (size // 4))
        payload[at : at + 4] = special
    payload = payload[: len(payload) - cut] if cut > 0 else payload + b"\x01" * -cut
    check_decode(build(version, kind, 1, 2, enc, count, bytes(payload)))


BASES = [bytes.fromhex(v["wire"]) for v in VECTORS["frames"]]


@settings(max_examples=2000, **FUZZ)
@given(
    st.sampled_from(BASES),
    st.lists(st.tuples(st.integers(0, 400), st.integers(0, 255)), min_size=1, max_size=4),
)
def test_fuzz_corrupted_frames(base: bytes, flips: list[tuple[int, int]]) -> None:
    wire = bytearray(base)
    for pos, byte in flips:
        wire[pos % len(wire)] = byte
    check_decode(bytes(wire))


@settings(max_examples=1000, **FUZZ)
@given(
    st.lists(
        st.binary(max_size=60)
        | st.sampled_from([encode_frame(Kind.COMMAND, 5, 6, [1.0, 2.0]), b"\x00", b"\x01" * 150]),
        max_size=12,
    )
)
def test_fuzz_splitter(chunks: list[bytes]) -> None:
    s = FrameSplitter()
    for chunk in chunks:
        for raw in s.feed(chunk):
            assert 0 < len(raw) <= MAX_ENCODED_SIZE and 0 not in raw
            check_decode(raw)
        assert s.pending <= MAX_ENCODED_SIZE
