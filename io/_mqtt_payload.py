"""MQTT payloads for the rig's topics: JSON or compact binary, and their untrusted decoding.

Topics under ``<prefix>/<rig_id>/`` (docs/mqtt_link.md has the full spec)::

    sensors    rig -> controller   {"seq": 17, "tick": 342, "t": 0.684, "values": [0.41, 2.0]}
    commands   controller -> rig   {"seq": 9, "tick": 342, "values": [11.5]}
    heartbeat  rig -> anyone       {"seq": 3, "tick": 500, "uptime": 1.5}
    status     rig, retained       {"state": "online", ...}; last will {"state": "offline"}

``seq`` counts the messages of one topic from one sender, modulo 2**16. ``tick`` is the
rig's tick (-1 for the values before tick 0); a command's ``tick`` echoes the sensor tick
it was computed from, which gives the rig its latency estimate.
Binary payloads are the frame of docs/protocol.md (plantrig.io._frames, values in the
link's encoding) without COBS and delimiter: MQTT keeps message boundaries, the CRC still
catches a broken bridge or firmware bug, and a frame in the other encoding is refused
(encoding_mismatch). Status is always JSON (people read it).
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence

from plantrig.io._cobs import cobs_decode, cobs_encode
from plantrig.io._frames import REASONS as FRAME_REASONS
from plantrig.io._frames import Encoding, FrameError, Kind, decode_frame, encode_frame

SEQ_MODULUS = 1 << 16
TICK_MODULUS = 1 << 32

# why a received payload was refused; the binary ones come from the frame decoder
REASONS = frozenset({
    "json",          # not UTF-8 JSON, or not a JSON object
    "schema",        # a field missing or of the wrong type
    "count",         # not one value per channel (rejected_count, as on the serial link)
    "non_finite",    # NaN or infinity among the values
    "range",         # a value outside the signal's min..max
    "oversize",      # longer than max_payload
    "echo",          # echoes a tick the rig has not sent yet
    "empty",         # an empty message (what clears a retained one): ignored, counted
    "duplicate",     # sequence number seen last already
    "out_of_order",  # sequence number older than the newest seen (replay, reordering)
    "retained",      # a retained command: stale by definition, never used
}) | FRAME_REASONS


class PayloadError(ValueError):
    """A payload that must not be used; ``reason`` is one of REASONS."""

    def __init__(self, reason: str, detail: str = "", *, rejected: bool = False) -> None:
        if reason not in REASONS:
            raise ValueError(f"unknown PayloadError reason {reason!r}")
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason
        self.detail = detail
        self.rejected = rejected   # well-formed but not for this topic: rejected_<reason>


def quoted(value: object, limit: int = 80) -> str:
    """repr of an untrusted value for an event detail: at most ``limit`` characters of
    it, and a marker with its full length when it is longer."""
    text = repr(value)
    if len(text) <= limit:
        return text
    return f"{text[:limit]}... ({len(text)} characters)"


def _reject_constant(name: str) -> float:
    raise PayloadError("non_finite", f"JSON constant {name}")


class Codec:
    """Encodes and checks the payloads of one link: JSON, or binary frames.

    ``encoding`` ("float32" or "int16") and ``scale`` apply to binary payloads, as on
    the serial link; ``max_payload`` bounds what a receiver accepts.
    """

    def __init__(self, fmt: str = "json", encoding: str = "float32", scale: float = 1.0,
                 max_payload: int = 4096) -> None:
        if fmt not in ("json", "binary"):
            raise ValueError(f"payload must be 'json' or 'binary', got {fmt!r}")
        self.fmt = fmt
        self.encoding = Encoding.I16 if encoding == "int16" else Encoding.F32
        self.scale = scale
        self.max_payload = max_payload

    def _frame(self, kind: Kind, seq: int, tick: int, values: Sequence[float]) -> bytes:
        return cobs_decode(encode_frame(kind, seq, tick, values, encoding=self.encoding,
                                        scale=self.scale)[:-1])

    def _json(self, doc: dict[str, object]) -> bytes:
        return json.dumps(doc, separators=(",", ":"), allow_nan=False).encode()

    def sensors(self, seq: int, tick: int, t: float, values: Sequence[float]) -> bytes:
        """One sensor message; ValueError for values the payload cannot carry."""
        if self.fmt == "binary":
            return self._frame(Kind.SENSOR, seq, tick, values)
        return self._json({"seq": seq % SEQ_MODULUS, "tick": tick, "t": t,
                           "values": list(values)})

    def command(self, seq: int, tick: int, values: Sequence[float]) -> bytes:
        """One command message (the controller's side); ``tick`` is the sensor tick echoed."""
        if self.fmt == "binary":
            return self._frame(Kind.COMMAND, seq, tick, values)
        return self._json({"seq": seq % SEQ_MODULUS, "tick": tick, "values": list(values)})

    def heartbeat(self, seq: int, tick: int, uptime: float) -> bytes:
        if self.fmt == "binary":
            return self._frame(Kind.HEARTBEAT, seq, tick, ())
        return self._json({"seq": seq % SEQ_MODULUS, "tick": tick, "uptime": round(uptime, 6)})

    def decode(self, kind: Kind, payload: bytes, channels: int,
               ) -> tuple[int, int, tuple[float, ...]]:
        """Check an untrusted sensor or command payload; (seq, tick, values) or PayloadError.

        Checks size, syntax, kind, channel count and finiteness. The tick comes back
        modulo 2**32 (binary) or as sent (JSON, -1 for the values before tick 0); range,
        sequence and tick rules need the receiver's state and are the caller's.
        """
        if len(payload) > self.max_payload:
            raise PayloadError("oversize", f"{len(payload)} bytes, at most {self.max_payload}")
        if self.fmt == "binary":
            seq, tick, values = self._decode_binary(kind, payload)
        else:
            seq, tick, values = _decode_json(payload)
        if len(values) != channels:
            raise PayloadError("count", f"{len(values)} values, expected {channels}",
                               rejected=True)
        return seq, tick, values

    def _decode_binary(self, kind: Kind, payload: bytes) -> tuple[int, int, tuple[float, ...]]:
        try:
            frame = decode_frame(cobs_encode(payload), scale=self.scale,
                                 link_encoding=self.encoding)
        except FrameError as exc:
            raise PayloadError(exc.reason, exc.detail) from None
        if frame.kind != kind:
            raise PayloadError("kind", f"{frame.kind.name} frame on the {kind.name} topic",
                               rejected=True)
        return frame.seq, frame.tick, frame.values


def _decode_json(payload: bytes) -> tuple[int, int, tuple[float, ...]]:
    try:
        doc = json.loads(payload, parse_constant=_reject_constant)
    except PayloadError:
        raise
    except (UnicodeDecodeError, ValueError) as exc:
        raise PayloadError("json", str(exc)) from None
    except RecursionError:
        raise PayloadError("json", "nested too deeply") from None
    if not isinstance(doc, dict):
        raise PayloadError("json", f"expected a JSON object, found {type(doc).__name__}")
    seq, tick, raw = doc.get("seq"), doc.get("tick"), doc.get("values")
    if not isinstance(seq, int) or isinstance(seq, bool) or seq < 0:
        raise PayloadError("schema", f"seq must be a whole number >= 0, found {quoted(seq)}")
    if not isinstance(tick, int) or isinstance(tick, bool) or tick < -1:
        raise PayloadError("schema", f"tick must be a whole number >= -1, found {quoted(tick)}")
    if not isinstance(raw, list):
        raise PayloadError("schema", f"values must be a list, found {quoted(raw)}")
    if not all(isinstance(v, int | float) and not isinstance(v, bool) for v in raw):
        raise PayloadError("schema", "values must all be numbers")
    try:
        values = tuple(float(v) for v in raw)
    except OverflowError:
        raise PayloadError("non_finite", "an integer too large for a float") from None
    for i, v in enumerate(values):
        if not math.isfinite(v):  # 1e999 parses to inf
            raise PayloadError("non_finite", f"value {i} is {v!r}")
    return seq % SEQ_MODULUS, tick, values


def check_range(values: Sequence[float], lo: Sequence[float], hi: Sequence[float],
                names: Sequence[str]) -> None:
    """Raise PayloadError("range") for the first value outside its signal's min..max."""
    for i, v in enumerate(values):
        if not lo[i] <= v <= hi[i]:
            raise PayloadError("range", f"{names[i]} = {v!r}, allowed {lo[i]!r}..{hi[i]!r}")
