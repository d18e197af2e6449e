"""CRC-16/CCITT-FALSE and COBS against published check values and examples."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from plantrig.io import CobsError, cobs_decode, cobs_encode, crc16

VECTORS = json.loads((Path(__file__).parents[1] / "docs" / "protocol_vectors.json").read_text())
FUZZ = settings(max_examples=500, derandomize=True, database=None, deadline=None)


def test_crc16_check_value() -> None:
    # CRC RevEng catalogue, CRC-16/IBM-3740 (alias CRC-16/CCITT-FALSE): check = 0x29B1
    # over the ASCII digits "123456789" (cited from memory; binascii agrees below)
    assert crc16(b"123456789") == 0x29B1
    spec = VECTORS["crc16"]
    assert crc16(spec["check_ascii"].encode("ascii")) == int(spec["check"], 16)
    assert (int(spec["poly"], 16), int(spec["init"], 16)) == (0x1021, 0xFFFF)


def test_crc16_of_nothing_is_init() -> None:
    assert crc16(b"") == 0xFFFF


@FUZZ
@given(st.binary(max_size=300), st.binary(max_size=300))
def test_crc16_matches_a_bitwise_reading_of_the_parameters(a: bytes, b: bytes) -> None:
    # the catalogue's parametrisation (width 16, poly 0x1021, init 0xFFFF, refin/refout
    # false, xorout 0) computed bit by bit, MSB first, independent of binascii
    def bitwise(data: bytes) -> int:
        crc = 0xFFFF
        for byte in data:
            crc ^= byte << 8
            for _ in range(8):
                crc = ((crc << 1) ^ 0x1021) & 0xFFFF if crc & 0x8000 else (crc << 1) & 0xFFFF
        return crc

    assert crc16(a + b) == bitwise(a + b)
    assert crc16(b, crc16(a)) == crc16(a + b)


@pytest.mark.parametrize("vec", VECTORS["cobs"], ids=lambda v: v["decoded"][:12] or "empty")
def test_cobs_published_examples(vec: dict[str, str]) -> None:
    decoded, encoded = bytes.fromhex(vec["decoded"]), bytes.fromhex(vec["encoded"])
    assert cobs_encode(decoded) == encoded
    assert cobs_decode(encoded) == decoded


def test_cobs_examples_named_in_the_brief_are_in_the_vectors() -> None:
    # Cheshire and Baker's scheme; examples as commonly published (from memory)
    pairs = {(v["decoded"], v["encoded"]) for v in VECTORS["cobs"]}
    assert ("00", "0101") in pairs
    assert ("0000", "010101") in pairs
    assert ("11220033", "0311220233") in pairs
    assert ("11223344", "0511223344") in pairs
    assert (bytes(range(1, 255)).hex(), "ff" + bytes(range(1, 255)).hex()) in pairs


@FUZZ
@given(st.binary(max_size=1200) | st.lists(st.sampled_from([0, 1, 255]), max_size=800).map(bytes))
def test_cobs_round_trip(data: bytes) -> None:
    enc = cobs_encode(data)
    assert 0 not in enc
    # overhead: one code byte per started block of 254 (Cheshire and Baker, worst case)
    assert len(data) + 1 <= len(enc) <= len(data) + len(data) // 254 + 1
    assert cobs_decode(enc) == data


@pytest.mark.parametrize(
    "bad, why",
    [(b"", "empty"), (b"\x03\x11\x00\x22", "zero"), (b"\x05\x11\x22", "needs"), (b"\xff", "needs")],
)
def test_cobs_decode_errors(bad: bytes, why: str) -> None:
    with pytest.raises(CobsError, match=why) as info:
        cobs_decode(bad)
    assert isinstance(info.value, ValueError)


@FUZZ
@given(st.binary(max_size=400))
def test_cobs_decode_raises_only_cobs_error(data: bytes) -> None:
    try:
        out = cobs_decode(data)
    except CobsError:
        return
    # a block of code n yields at most n bytes, the last block n - 1
    assert 0 not in data and len(out) <= len(data) - 1
