"""The C99 firmware codec, compiled with the system cc, byte for byte against plantrig.io."""

from __future__ import annotations

import json
import random
import struct
import subprocess
from pathlib import Path

import pytest

from plantrig.io import (
    MAX_CHANNELS,
    Encoding,
    FrameError,
    FrameSplitter,
    Kind,
    cobs_decode,
    cobs_encode,
    crc16,
    decode_frame,
    encode_frame,
)

ROOT = Path(__file__).parents[1]
FIRMWARE = ROOT / "firmware"
VECTORS = json.loads((ROOT / "docs" / "protocol_vectors.json").read_text())
CFLAGS = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O2"]
SCALES = [1.0, 0.01, 0.125, 3.0]


@pytest.fixture(scope="module")
def cli(tmp_path_factory: pytest.TempPathFactory) -> Path:
    exe = tmp_path_factory.mktemp("firmware") / "vectors_cli"
    sources = [str(FIRMWARE / "vectors_cli.c"), str(FIRMWARE / "plantrig_frame.c")]
    done = subprocess.run(["cc", *CFLAGS, "-o", str(exe), *sources], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    return exe


def run(exe: Path, commands: list[str]) -> list[str]:
    done = subprocess.run(
        [str(exe)],
        input="\n".join(commands) + "\n",
        capture_output=True,
        text=True,
        check=True,
        timeout=60,
    )
    answers = [line.rstrip() for line in done.stdout.splitlines()]
    assert len(answers) == len(commands)
    return answers


def f32_bits(v: float) -> str:
    return struct.pack("<f", v)[::-1].hex()


def bits_f32(h: str) -> float:
    return struct.unpack("<f", bytes.fromhex(h)[::-1])[0]


def encode_command(kind: int, seq: int, tick: int, enc: int, values: list) -> str:
    vals = [f32_bits(v) if enc == Encoding.F32 else str(v) for v in values]
    return " ".join(["E", str(kind), str(seq), str(tick), str(enc), str(len(values)), *vals])


def python_answer(wire: bytes) -> str:
    """What the C CLI should answer to `D <wire>`, worked out by the Python codec (scale 1)."""
    try:
        f = decode_frame(wire)
    except FrameError as exc:
        return f"ERR {exc.reason}"
    enc = cobs_decode(wire.rstrip(b"\x00"))[8]  # Frame does not keep the encoding byte
    vals = [f32_bits(v) if enc == Encoding.F32 else str(int(v)) for v in f.values]
    return " ".join(
        map(str, ["OK", f.version, int(f.kind), f.seq, f.tick, int(enc), len(f.values), *vals])
    )


def test_compiles_clean_and_crc_check_value(cli: Path) -> None:
    # CRC RevEng catalogue check value of CRC-16/IBM-3740 (CCITT-FALSE), cited from memory
    assert run(cli, ["C " + b"123456789".hex()]) == ["OK 29b1"]


def test_cobs_published_examples(cli: Path) -> None:
    vecs = VECTORS["cobs"]
    enc = run(cli, ["B " + v["decoded"] for v in vecs])
    dec = run(cli, ["U " + v["encoded"] for v in vecs])
    assert enc == ["OK " + v["encoded"] for v in vecs]
    assert dec == [f"OK {v['decoded']}".rstrip() for v in vecs]


def test_pinned_frame_vectors(cli: Path) -> None:
    cmds, wires = [], []
    for v in VECTORS["frames"]:
        enc = Encoding.F32 if v["encoding"] == "f32" else Encoding.I16
        vals = v["values"] if enc == Encoding.F32 else v["raw"]
        cmds.append(encode_command(v["kind"], v["seq"], v["tick"], enc, vals))
        wires.append(v["wire"])
    assert run(cli, cmds) == ["OK " + w for w in wires]
    answers = run(cli, ["D " + w for w in wires])
    assert answers == [python_answer(bytes.fromhex(w)) for w in wires]


def test_bad_frame_vectors_same_reason(cli: Path) -> None:
    bad = VECTORS["bad_frames"]
    links = {"f32": Encoding.F32, "i16": Encoding.I16}
    commands = [f"L {int(links[v['link_encoding']])} {v['wire']}" if "link_encoding" in v
                else "D " + v["wire"] for v in bad]
    assert run(cli, commands) == ["ERR " + v["reason"] for v in bad]
    # pr_decode (no link encoding) takes the mismatched ones as the good frames they are
    mismatched = [v["wire"] for v in bad if "link_encoding" in v]
    assert mismatched and all(a.startswith("OK ") for a in run(cli, ["D " + w for w in mismatched]))


def random_frames(rng: random.Random, n: int) -> list[tuple[int, int, int, int, list]]:
    frames = []
    for _ in range(n):
        kind = rng.choice([Kind.SENSOR, Kind.COMMAND, Kind.HEARTBEAT, Kind.STATUS])
        enc = Encoding.F32 if kind == Kind.STATUS else rng.choice(list(Encoding))
        count = {Kind.HEARTBEAT: 0, Kind.STATUS: rng.randint(2, MAX_CHANNELS)}.get(
            kind, rng.randint(0, MAX_CHANNELS)
        )
        if enc == Encoding.F32:
            # any finite binary32, subnormals and -0.0 included: exponent field not all ones
            vals = [
                struct.unpack("<f", struct.pack("<I", rng.getrandbits(32) & 0xFF7FFFFF))[0]
                for _ in range(count)
            ]
        else:
            vals = [rng.randint(-(2**15), 2**15 - 1) for _ in range(count)]
        frames.append((kind, rng.getrandbits(16), rng.getrandbits(32), enc, vals))
    return frames


def test_c_encodes_python_decodes(cli: Path) -> None:
    rng = random.Random(20240611)
    frames = random_frames(rng, 600)
    answers = run(cli, [encode_command(*f) for f in frames])
    for (kind, seq, tick, enc, vals), answer in zip(frames, answers, strict=True):
        status, wire_hex = answer.split()
        wire = bytes.fromhex(wire_hex)
        scale = rng.choice(SCALES)
        assert status == "OK"
        got = decode_frame(wire, scale=scale)
        want = vals if enc == Encoding.F32 else [r * scale for r in vals]
        assert (got.kind, got.seq, got.tick, got.values) == (kind, seq, tick, tuple(want))
        py_vals = vals if enc == Encoding.F32 else [r * scale for r in vals]
        assert encode_frame(kind, seq, tick, py_vals, encoding=enc, scale=scale) == wire


def test_python_encodes_c_decodes(cli: Path) -> None:
    rng = random.Random(77)
    frames = random_frames(rng, 600)
    wires = [encode_frame(k, s, t, v, encoding=e) for k, s, t, e, v in frames]
    answers = run(cli, ["D " + w.hex() for w in wires])
    for (kind, seq, tick, enc, vals), answer in zip(frames, answers, strict=True):
        fields = answer.split()
        assert fields[:7] == [
            "OK",
            "1",
            str(int(kind)),
            str(seq),
            str(tick),
            str(int(enc)),
            str(len(vals)),
        ]
        got = [bits_f32(h) if enc == Encoding.F32 else int(h) for h in fields[7:]]
        assert got == vals


def test_corrupted_frames_same_verdict(cli: Path) -> None:
    rng = random.Random(5)
    wires = []
    for kind, seq, tick, enc, vals in random_frames(rng, 600):
        wire = bytearray(encode_frame(kind, seq, tick, vals, encoding=enc))
        for _ in range(rng.randint(1, 3)):
            wire[rng.randrange(len(wire))] = rng.choice([0, 1, 0x7F, 0xFF, rng.getrandbits(8)])
        wires.append(bytes(wire[: rng.randint(0, len(wire))] if rng.random() < 0.2 else wire))
    answers = run(cli, ["D " + w.hex() for w in wires])
    assert answers == [python_answer(w) for w in wires]


def test_valid_crc_arbitrary_fields_same_verdict(cli: Path) -> None:
    # past the CRC: version, kind, encoding, count, length and NaN/infinity checks
    rng = random.Random(9)
    specials = [0x7FC00000, 0x7F800001, 0x7F800000, 0xFF800000]
    wires = []
    for _ in range(600):
        version, kind = rng.choice([1, 1, 1, 1, 2, 0]), rng.choice([1, 2, 3, 4, 0, 5])
        enc, count = rng.choice([0, 0, 1, 2]), rng.randint(0, MAX_CHANNELS + 1)
        words = [
            rng.choice(specials) if rng.random() < 0.05 else rng.getrandbits(32)
            for _ in range(count)
        ]
        payload = struct.pack(f"<{count}I", *words)[: count * (2 if enc == 1 else 4)]
        payload = payload[: len(payload) - rng.choice([0, 0, 0, 0, 1, 2])]
        payload += b"\x01" * rng.choice([0, 0, 0, 0, 1])
        body = (
            struct.pack(
                "<BBHIBB", version, kind, rng.getrandbits(16), rng.getrandbits(32), enc, count
            )
            + payload
        )
        wires.append(cobs_encode(body + struct.pack("<H", crc16(body))) + b"\x00")
    answers = run(cli, ["D " + w.hex() for w in wires])
    assert answers == [python_answer(w) for w in wires]
    verdicts = {a.split()[1] if a.startswith("ERR") else "OK" for a in answers}
    assert verdicts == {
        "OK",
        "version",
        "kind",
        "encoding",
        "channels",
        "truncated",
        "length",
        "non_finite",
        "oversize",
    }


def test_deframer_matches_splitter(cli: Path) -> None:
    rng = random.Random(11)
    parts = []
    for kind, seq, tick, enc, vals in random_frames(rng, 300):
        parts.append(encode_frame(kind, seq, tick, vals, encoding=enc))
        roll = rng.random()
        if roll < 0.1:
            parts.append(bytes(rng.getrandbits(8) for _ in range(rng.randint(1, 30))))
        elif roll < 0.15:
            parts.append(b"\x01" * rng.randint(140, 400))  # a run over the cap
        elif roll < 0.2:
            parts.append(b"\x00" * rng.randint(1, 3))
    stream = b"".join(parts)
    chunks, i = [], 0
    while i < len(stream):
        n = rng.choice([1, 2, 5, 17, 64, 300])
        chunks.append(stream[i : i + n])
        i += n
    splitter = FrameSplitter()
    expected = []
    for chunk in chunks:
        frames = splitter.feed(chunk)
        expected.append(" ".join(["S", *(f.hex() for f in frames), f"#{splitter.oversize}"]))
    assert run(cli, ["S " + c.hex() for c in chunks]) == expected
    assert splitter.oversize > 0


def test_codec_needs_only_memcpy_and_memset(tmp_path: Path) -> None:
    # stricter warnings and a freestanding build: what a small target's compiler would see
    obj = tmp_path / "plantrig_frame.o"
    flags = [*CFLAGS, "-Wconversion", "-Wsign-conversion", "-Wshadow", "-ffreestanding"]
    done = subprocess.run(
        ["cc", *flags, "-c", str(FIRMWARE / "plantrig_frame.c"), "-o", str(obj)],
        capture_output=True,
        text=True,
    )
    assert done.returncode == 0, done.stderr
    undefined = subprocess.run(
        ["nm", "-u", str(obj)], capture_output=True, text=True, check=True
    ).stdout.split()
    assert set(undefined) - {"U"} <= {"memcpy", "memset"}
