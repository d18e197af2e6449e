"""The MQTT link against a real mosquitto on loopback, the reference controller in its
own process (`plantrig controller`), and test clients publishing what a broken or
hostile controller might.

The closed loop over the broker is checked against the same rig run fast with the law
built in (plantrig.sim.simulate), as the serial link's tests do: JSON carries the
shortest repr that round-trips a float64 (Python's json, like repr), so a JSON loop must
equal the fast run exactly; binary payloads carry float32, so a binary loop must equal,
bit for bit, the fast run whose sensor and actuator values are rounded to float32
(numpy's round-to-nearest-even, the IEEE 754 default, as struct's '<f' packing is).
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import select
import socket
import struct
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import aiomqtt
import numpy as np
import pytest
from hil_helpers import Float32, builtin_twin, rig_issues
from rig_text import rig_text

from plantrig._hil import wait_ready
from plantrig.io import (
    Kind,
    LocalBroker,
    MqttLink,
    build_link,
    cobs_decode,
    crc16,
    encode_frame,
    mqtt_settings,
)
from plantrig.io._mqtt_payload import Codec, PayloadError
from plantrig.sim import Event, Rig, RunData, load_rig, silent_ticks_allowed, simulate

CONFIGS = Path(__file__).parents[1] / "configs"
MQTT = rig_text(CONFIGS / "conveyor_mqtt.toml")
VECTORS = json.loads((Path(__file__).parents[1] / "docs" / "protocol_vectors.json").read_text())
STATE_COLUMNS = ["u:voltage", "y:belt_speed", "y:motor_current", "x:current",
                 "x:motor_speed", "x:belt_speed"]


def mqtt_rig(tmp_path: Path, broker: LocalBroker, *, duration: float = 1.0,
             mode: str = "realtime", payload: str = "json", watchdog: float = 0.1,
             extra: str = "") -> Rig:
    """conveyor_mqtt.toml pointed at ``broker``, with quick reconnects and the changes."""
    src = (MQTT.replace("duration = 3.0", f"duration = {duration}")
           .replace('mode = "realtime"', f'mode = "{mode}"')
           .replace("port = 1883", f"port = {broker.port}")
           .replace('payload = "json"', f'payload = "{payload}"')
           .replace("watchdog_timeout = 0.1", f"watchdog_timeout = {watchdog}")
           .replace("reconnect_min = 0.1\nreconnect_max = 2.0",
                    "reconnect_min = 0.05\nreconnect_max = 0.2\n" + extra))
    path = tmp_path / "rig.toml"
    path.write_text(src)
    return load_rig(path)


@contextlib.contextmanager
def reference_controller(rig: Rig) -> Iterator[subprocess.Popen[str]]:
    """`plantrig controller RIG` in its own process, connected before the run starts."""
    proc = subprocess.Popen([sys.executable, "-m", "plantrig", "controller", str(rig.path),
                             "--no-realtime"], stdout=subprocess.PIPE, text=True)
    try:
        assert wait_ready(proc, 30.0), "the reference controller did not start"
        yield proc
    finally:
        try:  # it ends by itself when the rig announces a clean close
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        assert proc.stdout is not None
        proc.stdout.close()


def assert_columns_equal(a: RunData, b: RunData, names: list[str], end: int | None = None,
                         ) -> None:
    for name in names:
        diff = np.flatnonzero(a[name][:end] != b[name][:end])
        assert diff.size == 0, f"{name} differs first at tick {diff[0]}: " \
                               f"{a[name][diff[0]]!r} vs {b[name][diff[0]]!r}"


def kinds(events: list[Event]) -> list[str]:
    return [e.kind for e in events]


# ---- closed loop ------------------------------------------------------------------------

def test_lockstep_json_loop_equals_fast_builtin_exactly(tmp_path: Path,
                                                        mosquitto_broker: LocalBroker) -> None:
    rig = mqtt_rig(tmp_path, mosquitto_broker, mode="fast", extra="lockstep = true")
    with reference_controller(rig):
        wire = simulate(rig, link=build_link(rig))
    plain = simulate(builtin_twin(rig))
    h = wire.outcome.link_health
    assert wire.outcome.ended == "completed" and wire.rows.shape[0] == rig.n_ticks
    assert h["commands_used"] == rig.n_ticks and h["latency_ticks_max"] == 1
    assert h["link_lost"] == 0
    # the loop really moved: the belt follows the 0.8 m/s step at 0.2 s
    assert abs(wire["y:belt_speed"][-1] - 0.8) < 0.02
    assert_columns_equal(wire, plain, STATE_COLUMNS + ["cmd:voltage"])


def test_lockstep_binary_loop_equals_float32_fast_builtin(tmp_path: Path,
                                                          mosquitto_broker: LocalBroker) -> None:
    rig = mqtt_rig(tmp_path, mosquitto_broker, mode="fast", payload="binary",
                   extra="lockstep = true")
    with reference_controller(rig):
        wire = simulate(rig, link=build_link(rig))
    twin = builtin_twin(rig)
    rounded = simulate(twin, actuator_chain=Float32(), sensor_chain=Float32())
    plain = simulate(twin)
    assert wire.outcome.link_health["commands_used"] == rig.n_ticks
    assert_columns_equal(wire, rounded, STATE_COLUMNS)
    # float32 keeps 24 bits (IEEE 754 binary32): the rounded run stays close to the plain one
    assert np.max(np.abs(wire["y:belt_speed"] - plain["y:belt_speed"])) < 2e-5


def taken(link: MqttLink, n: int) -> None:
    """Wait until the loop's side holds ``n`` valid commands (health() reads them in)."""
    end = time.monotonic() + 5.0
    while link.health().get("commands_in", 0) < n:
        assert time.monotonic() < end, f"the worker passed {link.health()} commands"
        time.sleep(0.01)


def test_a_lockstep_timeout_holds_the_command_and_only_the_watchdog_loses_the_link(
        tmp_path: Path, mosquitto_broker: LocalBroker, monkeypatch: pytest.MonkeyPatch) -> None:
    """docs/protocol.md section 5, the lockstep rule, as on the serial and Modbus links:
    an answer that misses its tick's wait is a missed tick (the command held) and, when
    it comes, a late one; link_lost comes from the watchdog on plant ticks alone. Once
    a wait has run out, the ticks of that silence wait one tick each. The test plays
    the controller, answering exactly when it chooses, and notes every wait."""
    waits: list[float] = []
    real_select = select.select

    def noting_select(r: Any, w: Any, x: Any, timeout: float) -> Any:
        waits.append(timeout)
        return real_select(r, w, x, timeout)

    monkeypatch.setattr(select, "select", noting_select)
    rig = mqtt_rig(tmp_path, mosquitto_broker, mode="fast", watchdog=0.15,
                   extra="lockstep = true")
    assert rig.link is not None
    # 50 ms ticks: a 0.15 s timeout allows 3 silent ticks (each waits up to 0.15 s)
    link = MqttLink(mqtt_settings(rig.link), inputs=rig.inputs, outputs=rig.outputs,
                    tick=0.05, rig_name=rig.name)
    assert link.watchdog_ticks == silent_ticks_allowed(0.15, 0.05) == 3
    topic, out, y = "plantrig/conveyor/commands", np.zeros(1), np.zeros(2)

    def answer(seq: int, tick: int, value: float) -> None:
        asyncio.run(_publish(mosquitto_broker.host, mosquitto_broker.port, topic,
                             [(command(seq, tick, [value]), False)]))
        taken(link, seq)

    link.open()
    try:
        link.send(-1, -0.05, y)
        answer(1, -1, 1.0)
        assert link.receive(0, 0.0, out) and out.tolist() == [1.0]
        link.send(0, 0.0, y)
        # tick 0's answer does not come within the wait: tick 1 goes on without it
        assert not link.receive(1, 0.05, out) and out.tolist() == [1.0]
        assert "link_lost" not in kinds(link.drain_events()) and not link.lost
        answer(2, 0, 2.0)                 # the late answer, used at tick 2
        link.send(1, 0.05, y)
        assert link.receive(2, 0.1, out) and out.tolist() == [2.0]
        assert link.counts["late"] == 1 and link.counts["link_lost"] == 0
        # silence from here: lost at the first tick whose silence exceeds 3 ticks
        lost_at, longest = [], []
        for k in range(3, 8):
            link.send(k - 1, (k - 1) * 0.05, y)
            waits.clear()
            assert not link.receive(k, k * 0.05, out)
            longest.append(max(waits, default=0.0))
            lost_at += [e.tick for e in link.drain_events() if e.kind == "link_lost"]
        assert lost_at == [2 + 3 + 1]
        # tick 3 waits the whole timeout; ticks 4 to 6 a tick at most; none once lost
        assert longest[0] > 0.05 and max(longest[1:4]) <= 0.05 and longest[4] == 0.0
        answer(3, 6, 3.0)
        assert link.receive(8, 0.4, out)  # no wait once lost; the answer restores the link
        assert "link_restored" in kinds(link.drain_events())
        h = link.health()
    finally:
        link.close()
    assert h["missed_ticks"] == 6 and h["late"] == 2      # ticks 1, 3..7; answers 0 and 6
    assert h["link_lost"] == 1 and h["link_restored"] == 1


class Observed:
    """Wraps a link to note, per tick, what the loop sent and which sensor tick the
    command in use answers (MqttLink.last_echo_tick); every call goes through."""

    def __init__(self, link: MqttLink, rig: Rig, on_open: Any = None) -> None:
        self.link = link
        self.on_open = on_open
        self.sent: dict[int, np.ndarray] = {}
        self.echo = np.full(rig.n_ticks, -99, dtype=np.int64)
        self.calls = {"receive": 0, "send": 0}

    def open(self) -> None:
        self.link.open()
        if self.on_open is not None:
            self.on_open()

    def receive(self, tick: int, t: float, out: np.ndarray) -> bool:
        fresh = self.link.receive(tick, t, out)
        self.calls["receive"] += 1
        self.echo[tick] = self.link.last_echo_tick
        return fresh

    def send(self, tick: int, t: float, values: np.ndarray) -> None:
        self.link.send(tick, t, values)
        self.calls["send"] += 1
        self.sent[tick] = values.copy()

    def drain_events(self) -> list[Event]:
        return self.link.drain_events()

    def health(self) -> dict[str, float]:
        return self.link.health()

    def close(self) -> None:
        self.link.close()


def law_answers(rig: Rig, sent: dict[int, np.ndarray]) -> dict[int, float]:
    """The built-in law's answer to every sensor message, in order, as the reference
    controller computes it: values of tick j -> command for tick j + 1 at t_(j+1)."""
    from plantrig.sim import build_controller
    twin = builtin_twin(rig)
    law = build_controller(twin)
    assert law is not None
    r, u = np.zeros(len(rig.references)), np.array([s.safe for s in rig.inputs])
    answers = {}
    for j in sorted(sent):
        t = (j + 1) * rig.tick
        for i, ref in enumerate(rig.references):
            r[i] = ref.waveform.value(t)
        law.compute(t, sent[j], r, u)
        answers[j] = float(u[0])
    return answers


def test_realtime_loop_uses_exactly_the_laws_answers(tmp_path: Path,
                                                     mosquitto_broker: LocalBroker) -> None:
    """At 500 Hz an answer can miss its tick (scheduling, a loaded machine); the rig then
    holds the last command. Whatever the timing, every command used must be the law's
    exact answer to the sensor tick it echoes, and the run must equal the fast run up to
    the first tick without a fresh command. The replay needs every sensor message to
    reach the controller, so the worker may hold them all (send_queue) instead of
    dropping the oldest as it would on a bench that must not fall behind."""
    rig = mqtt_rig(tmp_path, mosquitto_broker, extra="send_queue = 100000")
    link = Observed(build_link(rig), rig)  # type: ignore[arg-type]
    with reference_controller(rig):
        wire = simulate(rig, realtime=True, link=link)  # type: ignore[arg-type]
    h = wire.outcome.link_health
    assert wire.rows.shape[0] == rig.n_ticks
    # how many ticks were answered in time depends on the load; the outcome follows it
    held = all(r.passed is not False for r in wire.outcome.rules)
    assert wire.outcome.ended == ("completed" if held else "fault")
    assert link.calls == {"receive": rig.n_ticks, "send": rig.n_ticks + 1}
    assert h["missed_ticks"] == rig.n_ticks - 1 - int(wire["fresh"][1:].sum())
    assert h.get("dropped_out", 0) == 0 and h.get("dropped_offline", 0) == 0
    answers = law_answers(rig, link.sent)
    cmd, fresh = wire["cmd:voltage"], wire["fresh"]
    for k in range(rig.n_ticks):
        if fresh[k]:
            assert -1 <= link.echo[k] < k and cmd[k] == answers[int(link.echo[k])], k
        else:
            assert cmd[k] == (cmd[k - 1] if k else 0.0), k
    assert fresh.sum() > rig.n_ticks // 10  # the loop ran on the controller's answers
    stale = np.flatnonzero(fresh == 0)
    end = int(stale[0]) if stale.size else rig.n_ticks
    assert_columns_equal(wire, simulate(builtin_twin(rig)), STATE_COLUMNS, end)


def test_broker_restart_mid_run_keeps_the_tick(tmp_path: Path,
                                               mosquitto_broker: LocalBroker) -> None:
    """The broker crashes 0.6 s after the link connected and is back at 1.1 s: link_lost,
    a reconnect on both ends, link_restored; the loop recorded every tick and every link
    call returned."""
    rig = mqtt_rig(tmp_path, mosquitto_broker, duration=2.4, watchdog=0.05)
    crash = threading.Timer(0.6, lambda: mosquitto_broker.stop(kill=True))
    back = threading.Timer(1.1, mosquitto_broker.start)

    def start_timers() -> None:  # counted from the link's first connection
        crash.start()
        back.start()

    link = Observed(build_link(rig), rig, on_open=start_timers)  # type: ignore[arg-type]
    with reference_controller(rig):
        try:
            wire = simulate(rig, realtime=True, link=link)  # type: ignore[arg-type]
        finally:
            crash.cancel()
            if back.is_alive():
                back.join()
    events, h = wire.outcome.events, wire.outcome.link_health
    assert wire.rows.shape[0] == rig.n_ticks           # every tick ran, but a lost link is a fault
    assert wire.outcome.ended == "fault" and "'link kept' not met" in wire.outcome.reason
    assert np.array_equal(wire.t, np.arange(rig.n_ticks) * rig.tick)
    assert link.calls == {"receive": rig.n_ticks, "send": rig.n_ticks + 1}  # + the prime
    order = kinds(events)
    for kind in ("link_disconnected", "link_lost", "link_reconnected", "link_restored"):
        assert kind in order, f"no {kind} in {order}"
    # the outage's own events (a loaded machine may add a short silence elsewhere)
    gone = order.index("link_disconnected")
    lost = next(e for e in events[gone:] if e.kind == "link_lost")
    reconnected = next(e for e in events[gone:] if e.kind == "link_reconnected")
    restored = next(e for e in events[gone:] if e.kind == "link_restored"
                    and e.tick >= reconnected.tick)
    assert events[gone].tick <= lost.tick < reconnected.tick <= restored.tick < rig.n_ticks
    assert h["reconnects"] >= 1 and h["disconnects"] >= 1 and h["dropped_offline"] > 0
    assert wire["fresh"][restored.tick] == 1
    # the one watchdog rule (sim/engine/_watchdog.py): lost at the first tick whose silence
    # exceeds the timeout, the same tick as on serial and in a rehearsal
    last_fresh = int(np.flatnonzero(wire["fresh"][:lost.tick] == 1)[-1])
    assert lost.tick - last_fresh == silent_ticks_allowed(
        rig.link.watchdog_timeout, rig.tick) + 1
    u = wire["u:voltage"]  # on_link_silence = "hold": the last good command is held
    assert np.isfinite(u).all() and np.all(u[lost.tick:restored.tick] == u[lost.tick])


# ---- status, last will, reconnect ----------------------------------------------------

async def _first_message(host: str, port: int, topic: str,
                         timeout: float = 3.0) -> tuple[dict[str, Any], bool]:
    async with aiomqtt.Client(host, port) as client:
        await client.subscribe(topic, qos=1)
        async with asyncio.timeout(timeout):
            async for message in client.messages:
                return json.loads(message.payload), message.retain  # type: ignore[arg-type]
    raise AssertionError("unreachable")


def retained(broker: LocalBroker, topic: str) -> dict[str, Any]:
    host, port = broker
    doc, was_retained = asyncio.run(_first_message(str(host), int(port), topic))
    assert was_retained, f"{topic}: the message was not retained"
    return doc


def drain_until(link: MqttLink, kind: str, timeout: float = 5.0) -> list[Event]:
    """Call receive() like the loop does (every 2 ms) until an event ``kind`` appears."""
    seen: list[Event] = []
    out = np.zeros(1)
    end = time.monotonic() + timeout
    k = 0
    while time.monotonic() < end:
        link.receive(k, k * 0.002, out)
        seen += link.drain_events()
        if any(e.kind == kind for e in seen):
            return seen
        k += 1
        time.sleep(0.002)
    raise AssertionError(f"no {kind} event within {timeout} s; saw {kinds(seen)}")


def test_retained_status_republished_on_reconnect_and_last_will(
        tmp_path: Path, mosquitto_broker: LocalBroker) -> None:
    rig = mqtt_rig(tmp_path, mosquitto_broker)
    topic = "plantrig/conveyor/status"
    link = build_link(rig)
    assert isinstance(link, MqttLink)
    link.open()
    try:
        assert "link_connected" in kinds(link.drain_events())
        online = retained(mosquitto_broker, topic)
        assert online["state"] == "online" and online["connects"] == 1
        assert online["inputs"] == ["voltage"] and online["tick_s"] == rig.tick
        assert online["topics"]["commands"] == "plantrig/conveyor/commands"
        # a broker without persistence forgets retained messages on restart
        mosquitto_broker.restart()
        drain_until(link, "link_reconnected")
        again = retained(mosquitto_broker, topic)
        assert again["state"] == "online" and again["connects"] == 2
        # the worker dies without a word: the broker publishes the retained last will
        link._worker.kill()
        deadline = time.monotonic() + 5.0
        while (will := retained(mosquitto_broker, topic))["state"] != "offline":
            assert time.monotonic() < deadline, "no last will"
            time.sleep(0.05)
        assert will["reason"] == "connection lost (last will)"
        assert will["session"] == online["session"]
    finally:
        link.close()


def test_clean_close_and_an_abandoned_link_say_offline(tmp_path: Path,
                                                       mosquitto_broker: LocalBroker) -> None:
    rig = mqtt_rig(tmp_path, mosquitto_broker, extra='worker = "thread"')
    link = build_link(rig)
    link.open()
    link.close()
    link.close()  # safe twice
    doc = retained(mosquitto_broker, "plantrig/conveyor/status")
    assert doc["state"] == "offline" and doc["reason"] == "link closed"
    # a rig process that dies leaves its end of the socket pair closed, not a close record
    link = build_link(rig)
    assert isinstance(link, MqttLink)
    link.open()
    assert link._sock is not None and isinstance(link._worker, threading.Thread)
    link._sock.close()
    link._worker.join(5)
    doc = retained(mosquitto_broker, "plantrig/conveyor/status")
    assert doc["state"] == "offline"
    assert doc["reason"] == "rig process ended without closing the link"


# ---- untrusted commands ------------------------------------------------------------------

async def _publish(host: str, port: int, topic: str, items: list[tuple[bytes, bool]]) -> None:
    async with aiomqtt.Client(host, port) as client:
        for payload, retain in items:
            await client.publish(topic, payload, qos=1, retain=retain)


def command(seq: int, tick: int, values: list[Any]) -> bytes:
    return json.dumps({"seq": seq, "tick": tick, "values": values}).encode()


def feed_commands(broker: LocalBroker, link: MqttLink, items: list[tuple[bytes, bool]],
                  already: int = 0) -> tuple[list[np.ndarray], list[Event], dict[str, float]]:
    """Publish ``items`` on the commands topic; run receive() until the worker has
    looked at all of them (and ``already`` more); what reached the loop, the events
    and the health."""
    asyncio.run(_publish(broker.host, broker.port, "plantrig/conveyor/commands", items))
    used: list[np.ndarray] = []
    events: list[Event] = []
    out = np.full(1, -99.0)
    end = time.monotonic() + 5.0
    k = 0
    while time.monotonic() < end:
        if link.receive(k, k * 0.002, out):
            used.append(out.copy())
        events += link.drain_events()
        h = link.health()
        if h.get("frames_in", 0) >= len(items) + already and k > 60:
            return used, events, h
        k += 1
        time.sleep(0.002)
    raise AssertionError(f"the worker saw {link.health().get('frames_in')} of {len(items)}")


def opened(rig: Rig) -> MqttLink:
    link = build_link(rig)
    assert isinstance(link, MqttLink)
    link.open()
    link.send(-1, -rig.tick, np.zeros(2))  # the prime: commands may echo tick -1
    return link


def test_bad_json_commands_are_counted_evented_and_never_used(
        tmp_path: Path, mosquitto_broker: LocalBroker) -> None:
    rig = mqtt_rig(tmp_path, mosquitto_broker, extra="max_payload = 256")
    # a retained command left on the broker reaches a new subscriber as stale news
    stale = [(command(1, -1, [2.0]), True)]
    asyncio.run(_publish(mosquitto_broker.host, mosquitto_broker.port,
                         "plantrig/conveyor/commands", stale))
    link = opened(rig)
    items = [
        (b"{not json", False),                                   # bad_json
        (b"[1, 2, 3]", False),                                   # bad_json (not an object)
        (b'{"seq": 1, "values": [1.0]}', False),                 # bad_schema (no tick)
        (command(1, -1, [1.0, 2.0]), False),                     # rejected_count
        (b'{"seq": 1, "tick": -1, "values": [NaN]}', False),     # bad_non_finite
        (b'{"seq": 1, "tick": -1, "values": [1e999]}', False),   # bad_non_finite (inf)
        (command(1, -1, [1.0]) + b" " * 300, False),             # bad_oversize
        (command(1, -1, [100.0]), False),                        # rejected_range (24 V max)
        (command(1, 7, [1.0]), False),                           # rejected_echo (not sent yet)
        (b"", False),                                            # empty (clears a retained one)
        (command(5, -1, [3.0]), False),                          # valid
        (command(5, -1, [4.0]), False),                          # duplicate seq
        (command(4, -1, [5.0]), False),                          # out of order (replay)
    ]
    try:
        used, events, h = feed_commands(mosquitto_broker, link, items, already=1)
    finally:
        link.close()
    assert [u.tolist() for u in used] == [[3.0]]  # only the one valid command
    for key in ("bad_schema", "rejected_count", "bad_oversize", "rejected_range",
                "rejected_echo", "rejected_retained", "duplicates", "out_of_order",
                "empty_messages"):
        assert h[key] == 1, f"{key} = {h.get(key)}"
    assert h["bad_json"] == 2 and h["bad_non_finite"] == 2 and h["commands_in"] == 1
    assert "bad_empty" not in h and "bad_schema" in h  # an empty message is no bad frame
    k = kinds(events)
    assert k.count("bad_frame") == 6 and k.count("rejected_command") == 4
    assert k.count("duplicate_frame") == 1 and k.count("out_of_order_frame") == 1
    details = " ".join(e.detail for e in events)
    assert "voltage = 100.0, allowed -24.0..24.0" in details and "echoes tick 7" in details


def test_bad_binary_commands(tmp_path: Path, mosquitto_broker: LocalBroker) -> None:
    rig = mqtt_rig(tmp_path, mosquitto_broker, payload="binary")
    link = opened(rig)
    good = cobs_decode(encode_frame(Kind.COMMAND, 3, -1, [1.5])[:-1])
    flipped = bytearray(good)
    flipped[-3] ^= 0x40
    header = struct.pack("<BBHIBB", 1, Kind.COMMAND, 2, 0xFFFFFFFF, 0, 1)
    body = header + struct.pack("<f", float("nan"))
    nan = body + struct.pack("<H", crc16(body))
    sensor = cobs_decode(encode_frame(Kind.SENSOR, 2, -1, [1.0])[:-1])
    items = [(bytes(flipped), False), (nan, False), (sensor, False), (b"\x01", False),
             (good, False)]
    try:
        used, events, h = feed_commands(mosquitto_broker, link, items)
    finally:
        link.close()
    assert [u.tolist() for u in used] == [[1.5]]
    # a SENSOR frame from the controller is rejected_kind, as on the serial link
    assert h["bad_crc"] == 1 and h["bad_non_finite"] == 1 and h["rejected_kind"] == 1
    assert "bad_kind" not in h
    assert h["bad_truncated"] == 1 and h["commands_in"] == 1


def test_clamp_policy_and_event_flood_is_summarised(tmp_path: Path,
                                                    mosquitto_broker: LocalBroker) -> None:
    rig = mqtt_rig(tmp_path, mosquitto_broker,
                   extra='out_of_range = "clamp"\nevents_per_kind = 2')
    link = opened(rig)
    items = [(b"junk", False)] * 20 + [(command(1, -1, [99.0]), False)]
    try:
        used, events, h = feed_commands(mosquitto_broker, link, items)
    finally:
        link.close()
    assert [u.tolist() for u in used] == [[24.0]] and h["clamped"] == 1
    assert h["bad_json"] == 20
    k = kinds(events)
    assert k.count("bad_frame") == 2 and k.count("events_suppressed") == 1  # at 10x = 20


# ---- credentials ---------------------------------------------------------------------

def test_wrong_password_is_a_clear_event_and_the_right_one_connects(
        tmp_path: Path, make_broker: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    broker = make_broker(users={"rig": "s3cret-for-tests"})
    monkeypatch.setenv("PLANTRIG_TEST_MQTT_PASSWORD", "wrong")
    rig = mqtt_rig(tmp_path, broker, extra='username = "rig"\n'
                                           'password_env = "PLANTRIG_TEST_MQTT_PASSWORD"\n'
                                           'worker = "thread"\nopen_timeout = 3.0')
    link = build_link(rig)
    link.open()
    events = link.drain_events()
    h = link.health()
    link.close()
    refused = [e for e in events if e.kind == "link_auth_failed"]
    assert refused and "refused the credentials" in refused[0].detail
    # MQTT 5 CONNACK reason 0x86 bad user name or password, or 0x87 not authorized
    assert "code 134" in refused[0].detail or "code 135" in refused[0].detail
    assert h["auth_failures"] >= 1 and "link_connected" not in kinds(events)
    monkeypatch.setenv("PLANTRIG_TEST_MQTT_PASSWORD", "s3cret-for-tests")
    link = build_link(rig)
    link.open()
    assert "link_connected" in kinds(link.drain_events())
    link.close()


# ---- rig file -------------------------------------------------------------------------

def test_link_table_mistakes_one_message_each(tmp_path: Path) -> None:
    src = MQTT.replace('host = "127.0.0.1"', 'hots = "127.0.0.1"') \
              .replace("port = 1883", "port = 70000") \
              .replace('payload = "json"', 'payload = "jsno"\n'
                                           'password_env = "PLANTRIG_SURELY_UNSET_VAR"') \
              .replace('prefix = "plantrig"', 'prefix = "plant/#"') \
              .replace("sensors = 0", "sensors = 3\ncomands = 1")
    src = src.replace("[link.qos]", "[link.tls]\nca_file = \"no-such-ca.pem\"\n"
                                    "insecure = \"yes\"\n\n[link.qos]")
    os.environ.pop("PLANTRIG_SURELY_UNSET_VAR", None)
    path = tmp_path / "bad.toml"
    path.write_text(src)
    issues = rig_issues(path)
    by_key = {i.key: i.message for i in issues}
    assert len(by_key) == len(issues), "one message per mistake"
    assert "did you mean 'host'" in by_key["link.hots"]
    assert "1..65535" in by_key["link.port"] and "70000" in by_key["link.port"]
    assert "did you mean 'json'" in by_key["link.payload"]
    assert "wildcards" in by_key["link.prefix"]
    assert "0..2" in by_key["link.qos.sensors"]
    assert "did you mean 'commands'" in by_key["link.qos.comands"]
    assert "no-such-ca.pem" in by_key["link.tls.ca_file"]
    assert "true or false" in by_key["link.tls.insecure"]
    assert "'PLANTRIG_SURELY_UNSET_VAR' to be set" in by_key["link.password_env"]
    assert "needs a username" in by_key["link.username"]
    assert all(i.file == str(path) for i in issues)


def test_codec_binary_payload_is_the_protocol_frame_without_cobs() -> None:
    """docs/protocol_vectors.json pins the serial frames; an MQTT binary payload is the
    same bytes before COBS and the delimiter."""
    codec = Codec("binary")
    checked = 0
    for v in VECTORS["frames"]:
        if v["encoding"] != "f32" or v["kind"] not in (Kind.SENSOR, Kind.COMMAND):
            continue
        wire = bytes.fromhex(v["wire"])
        if v["kind"] == Kind.SENSOR:
            payload = codec.sensors(v["seq"], v["tick"], 0.0, v["values"])
        else:
            payload = codec.command(v["seq"], v["tick"], v["values"])
        assert payload == cobs_decode(wire[:-1]), v["name"]
        seq, tick, values = codec.decode(Kind(v["kind"]), payload, len(v["values"]))
        assert (seq, tick) == (v["seq"], v["tick"] % 2**32)
        assert values == pytest.approx(v["values"], rel=2**-24)
        checked += 1
    assert checked >= 2


def test_codec_json_round_trip_is_exact_and_rejects_non_finite() -> None:
    codec = Codec("json")
    values = [0.1, -2.5e-300, 1.7976931348623157e308]
    assert codec.decode(Kind.COMMAND, codec.command(9, 41, values), 3) == (9, 41, tuple(values))
    with pytest.raises(ValueError):  # never sends NaN either
        codec.sensors(0, 0, 0.0, [float("nan")])
    with pytest.raises(PayloadError) as err:
        codec.decode(Kind.COMMAND, b'{"seq": 0, "tick": 0, "values": [Infinity]}', 1)
    assert err.value.reason == "non_finite"


# ---- TLS ------------------------------------------------------------------------------

def make_ca(name: str) -> tuple[Any, Any]:
    """A self-signed CA (key, certificate), made with the cryptography package."""
    import datetime

    from cryptography import x509
    from cryptography.hazmat.primitives import hashes
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID
    key = ec.generate_private_key(ec.SECP256R1())
    subject = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, name)])
    now = datetime.datetime.now(datetime.UTC)
    cert = (x509.CertificateBuilder().subject_name(subject).issuer_name(subject)
            .public_key(key.public_key()).serial_number(x509.random_serial_number())
            .not_valid_before(now - datetime.timedelta(minutes=5))
            .not_valid_after(now + datetime.timedelta(days=1))
            .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
            .sign(key, hashes.SHA256()))
    return key, cert


def write_pki(folder: Path) -> dict[str, Path]:
    """ca.pem, other-ca.pem and a server certificate for IP 127.0.0.1 signed by ca."""
    import datetime
    import ipaddress

    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID
    folder.mkdir()
    ca_key, ca = make_ca("plantrig test CA")
    _, other = make_ca("someone else's CA")
    key = ec.generate_private_key(ec.SECP256R1())
    now = datetime.datetime.now(datetime.UTC)
    cert = (x509.CertificateBuilder()
            .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "127.0.0.1")]))
            .issuer_name(ca.subject).public_key(key.public_key())
            .serial_number(x509.random_serial_number())
            .not_valid_before(now - datetime.timedelta(minutes=5))
            .not_valid_after(now + datetime.timedelta(days=1))
            .add_extension(x509.SubjectAlternativeName(
                [x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]), critical=False)
            .sign(ca_key, hashes.SHA256()))
    pem = serialization.Encoding.PEM
    files = {"ca": folder / "ca.pem", "other": folder / "other-ca.pem",
             "cert": folder / "server.pem", "key": folder / "server.key"}
    files["ca"].write_bytes(ca.public_bytes(pem))
    files["other"].write_bytes(other.public_bytes(pem))
    files["cert"].write_bytes(cert.public_bytes(pem))
    files["key"].write_bytes(key.private_bytes(pem, serialization.PrivateFormat.PKCS8,
                                               serialization.NoEncryption()))
    return files


def test_tls_verifies_the_broker_and_insecure_skips_it(tmp_path: Path, make_broker: Any) -> None:
    pki = write_pki(tmp_path / "pki")
    broker = make_broker(tls=(pki["ca"], pki["cert"], pki["key"]))

    def open_with(tls: str) -> list[Event]:
        rig = mqtt_rig(tmp_path, broker, extra=f'worker = "thread"\nopen_timeout = 3.0\n'
                                                f'\n[link.tls]\n{tls}\n')
        link = build_link(rig)
        link.open()
        events = link.drain_events()
        link.close()
        return events

    trusted = open_with(f'ca_file = "{pki["ca"]}"')
    assert "link_connected" in kinds(trusted)
    stranger = open_with(f'ca_file = "{pki["other"]}"')
    failed = [e for e in stranger if e.kind == "link_connect_failed"]
    assert failed and "certificate verify failed" in failed[0].detail
    insecure = open_with(f'ca_file = "{pki["other"]}"\ninsecure = true')
    assert "link_connected" in kinds(insecure)



def test_a_controller_without_its_broker_says_it_is_waiting() -> None:
    # it had waited for ever without a word; it still waits (a bench controller outlives
    # a broker restart), but says so once, and a signal still ends it cleanly
    with socket.socket() as unused:              # a loopback port nobody listens on
        unused.bind(("127.0.0.1", 0))
        port = unused.getsockname()[1]
    proc = subprocess.Popen([sys.executable, "-m", "plantrig", "controller",
                             str(CONFIGS / "conveyor_mqtt.toml"), "--port",
                             f"127.0.0.1:{port}", "--no-realtime"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    guard = threading.Timer(60, proc.kill)
    guard.start()
    try:
        assert proc.stderr is not None
        said = ""
        while "waiting for the MQTT broker" not in said:
            said = proc.stderr.readline()
            assert said, "the controller ended without saying it was waiting"
        assert f"127.0.0.1:{port}" in said and "Ctrl-C stops" in said
        proc.terminate()
        out, _ = proc.communicate(timeout=30)
    finally:
        guard.cancel()
    assert proc.returncode == 0 and "controller: stopped" in out
