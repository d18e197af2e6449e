"""The rig tells the controller its state (docs/protocol.md 1.2): STATUS frames on serial,
the status document on MQTT, the run-state registers on Modbus, each again after a
reconnect; heartbeats when it has nothing else to send; a controller that sends only
heartbeats is lost (only commands feed the rig's watchdog)."""

from __future__ import annotations

import asyncio
import json
import os
import subprocess
import time
from pathlib import Path

import aiomqtt
import numpy as np
from hil_helpers import controller_closing
from pymodbus.client import ModbusTcpClient
from rig_text import rig_text
from test_modbus_link import DEMO, free_port
from test_mqtt_link import _first_message, drain_until, mqtt_rig, retained

from plantrig._hil import controller_command, wait_ready
from plantrig.io import (
    FdPort,
    FrameSplitter,
    Kind,
    LocalBroker,
    MqttControllerPeer,
    build_link,
    decode_frame,
    encode_frame,
    mqtt_settings,
    open_pty_pair,
)
from plantrig.sim import load_rig, load_scenario, run_to_folder

ROOT = Path(__file__).resolve().parents[1]
GUARDED = ROOT / "configs" / "rehearsals" / "conveyor_guarded_hil.toml"


def guarded_rig(tmp_path: Path, duration: float = 1.5):
    src = rig_text(GUARDED).replace("duration = 4.0", f"duration = {duration}")
    path = tmp_path / "rig.toml"
    path.write_text(src)
    return load_rig(path)


def test_controller_hears_running_tripped_running_ended(tmp_path: Path) -> None:
    rig = guarded_rig(tmp_path)
    scenario_path = tmp_path / "estop.toml"
    scenario_path.write_text(
        '[scenario]\nallow_trips = ["estop"]\n\n'
        "[[steps]]\nat = 0.4\nestop = true\n\n"
        '[[steps]]\nat = 0.8\nreset = "estop"\n')
    scenario = load_scenario(scenario_path, rig)
    pair = open_pty_pair()
    proc = subprocess.Popen(controller_command(rig.path, pair.slave_path),
                            stdout=subprocess.PIPE, text=True)
    try:
        assert wait_ready(proc, 30.0), "the reference controller did not start"
        pair.close_slave()
        link = build_link(rig, port=FdPort(pair.master_fd, name="pty", owns_fd=False))
        _, outcome, summary = run_to_folder(rig, tmp_path / "runs", realtime=True, link=link,
                                            scenario=scenario)
        time.sleep(0.3)          # let the controller read the last STATUS before hang-up
    finally:
        pair.close_master()      # the controller ends when the rig's end closes
        text, _ = proc.communicate(timeout=20)
    states = controller_closing(text)
    code = int(summary["exit_code"])
    # a loaded machine may miss the real-time rule: the run is then a fault, and says so
    last = "fault" if outcome.ended == "fault" else "ended"
    # 1 = the E-stop (the first interlock number, docs/protocol.md 1.2); then the exit code
    assert states["states"].split() == ["running/0", "tripped/1", "running/0",
                                       f"{last}/{code}"], (text, outcome.reason)
    h = summary["link"]
    # the health is read before the end status goes out: three of the four are in it
    assert h["status_out"] == 3 and h["commands_used"] > 0.5 * rig.n_ticks


def read_frames(fd: int, splitter: FrameSplitter) -> list:
    out = []
    while True:
        try:
            data = os.read(fd, 4096)
        except BlockingIOError:
            return out
        out += [decode_frame(p) for p in splitter.feed(data)]


def test_heartbeats_when_idle_and_heartbeats_alone_are_lost(tmp_path: Path) -> None:
    rig = guarded_rig(tmp_path)
    pair = open_pty_pair()
    slave = pair.slave_fd
    os.set_blocking(slave, False)
    try:
        link = build_link(rig, port=FdPort(pair.master_fd, name="pty", owns_fd=False))
        link.open()
        link.state(-1, "running", "")  # type: ignore[attr-defined]
        splitter = FrameSplitter()
        out = np.zeros(1)
        seq = 0
        lost_at = None
        for k in range(400):          # 0.4 s of ticks: no sensor frame sent at all
            link.receive(k, k * rig.tick, out)
            if lost_at is None and any(e.kind == "link_lost" for e in link.drain_events()):
                lost_at = k
            if k % 20 == 0:           # the controller: heartbeats only, every 20 ms
                os.write(slave, encode_frame(Kind.HEARTBEAT, seq, 0))
                seq += 1
            time.sleep(0.0002)
        frames = read_frames(slave, splitter)
        h = link.health()
        link.close()
    finally:
        pair.close_slave()
        pair.close_master()
    kinds = [f.kind for f in frames]
    assert kinds[0] == Kind.STATUS and frames[0].values[:2] == (1.0, 0.0)
    # heartbeat_period 0.1 s = 100 ticks: ticks 100, 200, 300 (at least three)
    assert kinds.count(Kind.HEARTBEAT) >= 3 and h["heartbeats_out"] == kinds.count(Kind.HEARTBEAT)
    assert Kind.SENSOR not in kinds
    # heartbeats were counted, yet the watchdog (timeout 0.1 s) declared the link lost
    assert h["heartbeats_in"] >= 10 and h["commands_in"] == 0
    assert lost_at is not None and lost_at <= 102 and h["link_lost"] == 1


def test_mqtt_status_document_carries_the_run_state(tmp_path: Path,
                                                    mosquitto_broker: LocalBroker) -> None:
    rig = mqtt_rig(tmp_path, mosquitto_broker)
    link = build_link(rig)
    link.open()
    try:
        link.state(-1, "running", "")  # type: ignore[attr-defined]
        link.state(40, "tripped", "estop")  # type: ignore[attr-defined]
        doc: dict = {}
        end = time.monotonic() + 5
        while time.monotonic() < end:
            doc = retained(mosquitto_broker, "plantrig/conveyor/status")
            if doc.get("run_state") == "tripped":
                break
            time.sleep(0.05)
        assert doc["state"] == "online" and doc["run_state_code"] == 2
        assert doc["detail"] == "estop" and doc["detail_code"] == 1 and doc["state_tick"] == 40
        link.state(90, "fault", "fault")  # type: ignore[attr-defined]
    finally:
        link.close()
    doc = retained(mosquitto_broker, "plantrig/conveyor/status")
    # the last word after close: offline, and how the run ended (exit code 1, a fault)
    assert doc["state"] == "offline" and doc["run_state"] == "fault"
    assert doc["run_state_code"] == 3 and doc["detail_code"] == 1
    # the reference controller notes it when it hears it live; retained, it is the last
    # word of a run before the controller came, and means nothing for this one
    assert rig.link is not None
    noted: list[tuple[float, ...]] = []
    peer = MqttControllerPeer(mqtt_settings(rig.link), 2, lambda *_: None,
                              on_rig_status=noted.append)
    for retain in (True, False):
        message = aiomqtt.Message("plantrig/conveyor/status", json.dumps(doc).encode(), 1,
                                  retain, 0, None)
        assert peer._rig_status(message) is not retain      # live: the rig closed the link
    assert noted == [(3.0, 1.0)]


def frames_at_least(fd: int, n: int, timeout: float = 5.0) -> list:
    """Read frames from ``fd`` until there are ``n`` (the pty delivers in its own time)."""
    splitter, frames = FrameSplitter(), []
    deadline = time.monotonic() + timeout
    while len(frames) < n:
        assert time.monotonic() < deadline, f"{len(frames)} of {n} frames"
        frames += read_frames(fd, splitter)
        time.sleep(0.005)
    return frames


def test_serial_status_again_when_the_port_comes_back(tmp_path: Path) -> None:
    rig = guarded_rig(tmp_path)
    pair = open_pty_pair()
    os.set_blocking(pair.slave_fd, False)
    again = -1
    try:
        link = build_link(rig, port=FdPort(pair.master_fd, name="pty", owns_fd=False))
        link.open()
        link.state(-1, "running", "")  # type: ignore[attr-defined]
        link.state(3, "tripped", "estop")  # type: ignore[attr-defined]
        before = frames_at_least(pair.slave_fd, 2)
        pair.close_slave()            # the far end hangs up: EIO at the next read
        out = np.zeros(1)
        link.receive(4, 4 * rig.tick, out)
        assert link.health()["port_errors"] >= 1
        again = os.open(pair.slave_path, os.O_RDWR | os.O_NOCTTY | os.O_NONBLOCK)
        for k in range(5, 5 + 2 * round(0.5 / rig.tick)):   # the port is retried every 0.5 s
            link.receive(k, k * rig.tick, out)
        after = frames_at_least(again, 1)
        h = link.health()
        link.close()
    finally:
        if again >= 0:
            os.close(again)
        pair.close_master()
    assert [f.values[:2] for f in before] == [(1.0, 0.0), (2.0, 1.0)]
    # the first frame on the reopened port is the newest state: tripped by the E-stop
    assert after[0].kind == Kind.STATUS and after[0].values[:2] == (2.0, 1.0)
    assert h["status_out"] == 3 and h["link_lost"] == 1


def test_mqtt_run_state_survives_a_broker_restart_and_heartbeats_go_on(
        tmp_path: Path, mosquitto_broker: LocalBroker) -> None:
    rig = mqtt_rig(tmp_path, mosquitto_broker)
    host, port = mosquitto_broker
    link = build_link(rig)
    link.open()
    try:
        link.state(12, "tripped", "estop")  # type: ignore[attr-defined]
        # no sensor values are ever sent: the heartbeat topic still speaks
        beat, _ = asyncio.run(_first_message(str(host), int(port),
                                             "plantrig/conveyor/heartbeat"))
        mosquitto_broker.restart()   # forgets every retained message
        drain_until(link, "link_reconnected")  # type: ignore[arg-type]
        doc = retained(mosquitto_broker, "plantrig/conveyor/status")
    finally:
        link.close()
    assert set(beat) == {"seq", "tick", "uptime"}
    assert doc["connects"] == 2 and doc["run_state"] == "tripped"
    assert doc["run_state_code"] == 2 and doc["detail_code"] == 1 and doc["state_tick"] == 12


def test_modbus_run_state_registers_follow_every_change() -> None:
    rig = load_rig(DEMO)
    port = free_port()
    link = build_link(rig, port=f"127.0.0.1:{port}")
    link.open()
    client = ModbusTcpClient("127.0.0.1", port=port, timeout=2, retries=0)
    seen = []
    try:
        assert client.connect()
        link.state(-1, "running", "")  # type: ignore[attr-defined]
        link.send(0, 0.0, np.zeros(len(rig.outputs)))
        for k, state, detail in [(1, None, ""), (7, "tripped", "estop"),
                                 (9, "running", ""), (20, "ended", "completed")]:
            if state:
                link.state(k, state, detail)  # type: ignore[attr-defined]
            link.send(k, k * rig.tick, np.zeros(len(rig.outputs)))
            want = link.rig_state.code  # type: ignore[attr-defined]
            end = time.monotonic() + 3
            while True:   # the server process takes the record in its own time
                r = client.read_input_registers(2, count=2, device_id=1)
                assert not r.isError()
                if r.registers[0] == want or time.monotonic() > end:
                    break
                time.sleep(0.01)
            seen.append(tuple(r.registers))
    finally:
        client.close()
        link.close()
    # [state, detail] (docs/modbus_link.md): 1 = the E-stop; after the end, exit code 0
    assert seen == [(1, 0), (2, 1), (1, 0), (4, 0)]
