"""A command in the other encoding than the link's never reaches the plant.

The controller (tests/wrong_encoding_controller.py, its own process) answers every
sensor frame with a good command of 0.5 V in the link's encoding, and every fifth one
also with a 7 V command in the other encoding: raw 7 as int16 on a float32 link, or
7.0 as float32 on an int16 link. Before the link checked the encoding, the 7 V command
was the newest valid one and drove the plant. Now each is refused with its own reason
(bad_encoding_mismatch), recorded as a bad_frame event, and the plant input only ever
holds the safe 0 V or the good command. Over a real pty pair (serial, binary frames)
and over a real mosquitto broker (MQTT, binary payloads).
"""

from __future__ import annotations

import contextlib
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from rig_text import rig_text

from plantrig.io import MqttLink, SerialLink, build_link, open_pty_pair
from plantrig.io._broker import LocalBroker
from plantrig.sim import Rig, RunData, load_rig, simulate

CONFIGS = Path(__file__).parents[1] / "configs"
CONTROLLER = Path(__file__).with_name("wrong_encoding_controller.py")
INT16_SCALE = 0.001
GOOD, WRONG = 0.5, 7.0   # as in wrong_encoding_controller.py


def with_encoding(src: str, encoding: str) -> str:
    """A [link] table set to ``encoding`` (int16 with INT16_SCALE volts per count)."""
    line = 'encoding = "int16"\nscale = 0.001' if encoding == "int16" else \
        'encoding = "float32"'
    src = src.replace('encoding = "float32"\n', "")
    return src.replace("[link]\n", f"[link]\n{line}\n", 1)


def good_value(encoding: str) -> float:
    """GOOD as the rig decodes it: float32-rounded, or whole counts times the scale."""
    if encoding == "int16":
        return round(GOOD / INT16_SCALE) * INT16_SCALE
    return float(np.float32(GOOD))


@contextlib.contextmanager
def controller(args: list[str], pass_fds: tuple[int, ...] = ()) -> Iterator[list[str]]:
    """The wrong-encoding controller in its own process; yields its output lines once
    it has ended (filled in after the block)."""
    proc = subprocess.Popen([sys.executable, str(CONTROLLER), *args], pass_fds=pass_fds,
                            stdout=subprocess.PIPE, text=True)
    said: list[str] = []
    try:
        assert proc.stdout is not None
        assert proc.stdout.readline().startswith("wrong-encoding: ready")
        yield said
    finally:
        try:
            out, _ = proc.communicate(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            out, _ = proc.communicate()
        said += out.splitlines()


def check_run(data: RunData, encoding: str, said: list[str]) -> None:
    u = data["u:voltage"]
    assert WRONG not in u
    assert set(np.unique(u)) <= {0.0, good_value(encoding)}
    assert good_value(encoding) in u
    h = data.outcome.link_health
    sent = int(said[-1].split()[-1])                 # "wrong-encoding: sent N"
    assert sent >= 10 and h["commands_in"] >= 10     # the loop really ran
    # every wrong frame the rig read was refused under its own reason; a loaded machine
    # may leave the last few unread when the run ends
    assert 1 <= h["bad_encoding_mismatch"] <= sent
    assert sum(v for k, v in h.items() if k.startswith(("bad_", "rejected_"))) == \
        h["bad_encoding_mismatch"]                   # and under no other reason
    other = "float32" if encoding == "int16" else "int16"
    events = [e for e in data.outcome.events if e.kind == "bad_frame"]
    assert events and all(e.detail == f"encoding_mismatch: COMMAND frame carries {other}, "
                                       f"the link is set up for {encoding}" for e in events)


@pytest.mark.parametrize("encoding", ["float32", "int16"])
def test_serial_link_refuses_the_other_encoding(tmp_path: Path, encoding: str) -> None:
    src = rig_text(CONFIGS / "conveyor_hil.toml").replace("duration = 3.0",
                                                             "duration = 1.5")
    path = tmp_path / "rig.toml"
    path.write_text(with_encoding(src, encoding))
    rig = load_rig(path)
    pair = open_pty_pair()
    scale = str(INT16_SCALE if encoding == "int16" else 1.0)
    try:
        with controller(["pty", str(pair.master_fd), encoding, scale],
                        pass_fds=(pair.master_fd,)) as said:
            pair.close_master()                   # the controller holds the master now
            link = build_link(rig, port=pair.slave_path)   # by path, through pyserial
            assert isinstance(link, SerialLink)
            data = simulate(rig, realtime=True, link=link)
    finally:
        pair.close_slave()
    check_run(data, encoding, said)


def mqtt_rig(tmp_path: Path, broker: LocalBroker, encoding: str) -> Rig:
    src = (rig_text(CONFIGS / "conveyor_mqtt.toml")
           .replace("duration = 3.0", "duration = 1.5")
           .replace("port = 1883", f"port = {broker.port}")
           .replace('payload = "json"', 'payload = "binary"'))
    path = tmp_path / "rig.toml"
    path.write_text(with_encoding(src, encoding))
    return load_rig(path)


@pytest.mark.parametrize("encoding", ["float32", "int16"])
def test_mqtt_link_refuses_the_other_encoding(tmp_path: Path, mosquitto_broker: LocalBroker,
                                              encoding: str) -> None:
    rig = mqtt_rig(tmp_path, mosquitto_broker, encoding)
    link = build_link(rig)
    assert isinstance(link, MqttLink)
    topics = [link.settings.topic("sensors"), link.settings.topic("commands")]
    scale = str(INT16_SCALE if encoding == "int16" else 1.0)
    with controller(["mqtt", mosquitto_broker.host, str(mosquitto_broker.port), *topics,
                     encoding, scale]) as said:
        data = simulate(rig, realtime=True, link=link)
    check_run(data, encoding, said)
