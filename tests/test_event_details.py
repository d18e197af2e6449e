"""Event details are kept whole: on the event tape, in events.jsonl and in run.h5.

The event ring once held each detail in a fixed 200-byte field and cut the rest without
a word. Details now live in a byte ring beside the event rows (sim/records/_tape.py, EventTape);
only a detail longer than a quarter of that ring is cut, and then with a marker that
says how long it was.
"""

from __future__ import annotations

import json
import queue
from pathlib import Path

import numpy as np
import pytest
from rig_text import rig_text

from plantrig.sim import Command, EventTape, load_rig, run_to_folder
from plantrig.sim.records._hdf5 import read_run_h5

CONFIGS = Path(__file__).parents[1] / "configs"
# multi-byte UTF-8 (2, 3 and 4 bytes) so a cut or a wrap inside a character would show
TEXT = "".join(f"{i:05d} é € 𝄞 " for i in range(2000))


def test_details_of_every_length_come_back_whole(tmp_path: Path) -> None:
    writer = EventTape(tmp_path / "run.events", capacity=64, heap_bytes=1 << 16)
    reader = EventTape(tmp_path / "run.events", create=False)
    try:
        lengths = [0, 1, 199, 200, 201, 5000, 10000]    # characters; 10000 is ~15 kB
        sent = [TEXT[:n] for n in lengths]
        assert len(sent[-1].encode()) <= writer.max_detail
        for k, detail in enumerate(sent):
            writer.append(k, k * 0.5, "phase", detail)
        got = reader.read_new()
        assert [g["detail"] for g in got] == sent
        assert [(g["tick"], g["time"], g["kind"]) for g in got] == [
            (k, k * 0.5, "phase") for k in range(len(sent))]
        # many more than the heap holds, read as they come: each wraps the heap in turn
        for k in range(100):
            detail = TEXT[k:k + 3000 + 17 * k]
            writer.append(k, 0.0, "long", detail)
            assert reader.read_new() == [{"tick": k, "time": 0.0, "kind": "long", "detail": detail}]
    finally:
        writer.close(unlink=True)
        reader.close()


def test_a_detail_beyond_a_quarter_of_the_heap_is_cut_with_a_marker(tmp_path: Path) -> None:
    tape = EventTape(tmp_path / "run.events", capacity=8, heap_bytes=1 << 14)
    try:
        huge = "z" * 10_000
        tape.append(1, 0.0, "model_error", huge)
        [event] = tape.read_new()
        detail = event["detail"]
        head, marker = detail.split(" [... cut: ")
        assert huge.startswith(head) and len(detail.encode()) <= tape.max_detail
        assert marker == f"10000 bytes in all, the event record keeps the first {len(head)}]"
    finally:
        tape.close(unlink=True)


def test_a_reader_left_behind_gets_a_marker_not_a_torn_detail(tmp_path: Path) -> None:
    writer = EventTape(tmp_path / "run.events", capacity=64, heap_bytes=1 << 12)
    reader = EventTape(tmp_path / "run.events", create=False)
    try:
        writer.append(0, 0.0, "first", "a" * 1000)
        for k in range(1, 6):               # 5000 more bytes: the heap (4096) laps "first"
            writer.append(k, 0.0, "next", "b" * 1000)
        got = reader.read_new()
        assert got[0]["detail"] == ("[detail of 1000 bytes overwritten before it was read: the "
                             "event heap is full of newer details]")
        assert [g["detail"] for g in got[2:]] == ["b" * 1000] * 4
    finally:
        writer.close(unlink=True)
        reader.close()


def test_name_and_window_come_back_as_the_event_records_them(tmp_path: Path) -> None:
    """The tape gives each event as Event.record() writes it into events.jsonl: source,
    name and window only where set; a name (multi-byte, long) comes back whole."""
    from plantrig.sim import Event

    writer = EventTape(tmp_path / "run.events", capacity=16, heap_bytes=1 << 14)
    reader = EventTape(tmp_path / "run.events", create=False)
    try:
        sent = [Event(3, 0.3, "fault_injected", "surge: disturbance on belt_load",
                      name="surge", window="disturbance"),
                Event(4, 0.4, "phase", TEXT[:300], name=TEXT[:300]),
                Event(5, 0.5, "link_lost", "no command for 0.2 s", "rehearsed"),
                Event(6, 0.6, "reset_refused", "nothing is latched")]
        for e in sent:
            writer.append(e.tick, e.time, e.kind, e.detail, e.source, e.name, e.window)
        assert reader.read_new() == [e.record() for e in sent]
        assert "name" not in sent[3].record() and "window" not in sent[1].record()
    finally:
        writer.close(unlink=True)
        reader.close()


def test_an_event_tape_of_another_layout_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "old.events"
    path.write_bytes(b"\0" * 4096)
    with pytest.raises(ValueError, match="not a plantrig event tape"):
        EventTape(path, create=False)


def test_a_5000_byte_detail_arrives_whole_in_events_jsonl_and_run_h5(tmp_path: Path) -> None:
    """End to end: the engine writes the event to the tape, the recorder process copies
    it to events.jsonl, the finish writes run.h5 from that."""
    src = rig_text(CONFIGS / "conveyor.toml").replace("duration = 3.0", "duration = 0.5")
    (tmp_path / "rig.toml").write_text(src)
    rig = load_rig(tmp_path / "rig.toml")
    detail = TEXT.encode()[:5000].decode("utf-8", "ignore")
    assert 4990 < len(detail.encode()) <= 5000
    commands: queue.Queue[Command] = queue.Queue()
    commands.put(Command("mark_phase", {"name": detail}))
    folder, _outcome, _summary = run_to_folder(rig, tmp_path / "runs", commands=commands)
    lines = [json.loads(line) for line in
             (folder / "events.jsonl").read_text(encoding="utf-8").splitlines()]
    phases = [e for e in lines if e["kind"] == "phase"]
    assert len(phases) == 1 and phases[0]["detail"] == phases[0]["name"] == detail
    record = read_run_h5(folder / "run.h5")
    h5_phases = [e for e in record["events"] if e["kind"] == "phase"]
    assert len(h5_phases) == 1 and h5_phases[0]["detail"] == h5_phases[0]["name"] == detail
    assert np.isfinite(record["rows"]).all()


def test_mqtt_worker_events_are_cut_only_with_a_marker() -> None:
    """The MQTT worker hands events to the loop as datagrams the loop reads into 64 KiB;
    a longer detail is cut at a character boundary and says so (it was cut at 2000
    bytes without a word), and untrusted values quoted in a detail say their length."""
    from plantrig.io import Kind
    from plantrig.io._mqtt_payload import Codec, PayloadError
    from plantrig.io._mqtt_worker import EVENT_RECORD_MAX, event_record

    assert event_record("bad_frame", TEXT[:2000]) == f"bad_frame\t{TEXT[:2000]}".encode()
    long = event_record("bad_frame", TEXT * 3)
    whole = len(f"bad_frame\t{TEXT * 3}".encode())
    assert len(long) <= EVENT_RECORD_MAX
    head, marker = long.decode().split(" [... cut: ")   # decodes: no character was split
    assert f"bad_frame\t{TEXT * 3}".startswith(head)
    assert marker == f"{whole} bytes in all, the link passes the first {len(head.encode())}]"
    with pytest.raises(PayloadError) as info:
        Codec("json").decode(Kind.COMMAND, b'{"seq": 1, "tick": 1, "values": "' + b"a" * 500
                             + b'"}', 1)
    assert info.value.detail.endswith("... (502 characters)")
