"""The Modbus link with a real pymodbus client as the controller: the register map,
exception responses for what the rig refuses (none of it reaches the plant), the
watchdog on accepted writes, fuzzed requests, the RTU CRC, and `plantrig demo --modbus`.

Exception codes (Modbus application protocol specification V1.1b3, section 7; from
memory): 01 illegal function, 02 illegal data address, 03 illegal data value.
"""

from __future__ import annotations

import random
import socket
import struct
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from hil_helpers import controller_closing, rig_issues
from pymodbus.client import ModbusTcpClient
from pymodbus.framer.rtu import FramerRTU
from rig_text import rig_text

from plantrig.io import build_link
from plantrig.sim import load_rig

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "conveyor_modbus.toml"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture
def served(tmp_path: Path):  # type: ignore[no-untyped-def]
    """The demo rig's Modbus link, open on a free port, and a connected client."""
    rig = load_rig(DEMO)
    port = free_port()
    link = build_link(rig, port=f"127.0.0.1:{port}")
    link.open()
    client = ModbusTcpClient("127.0.0.1", port=port, timeout=2, retries=0)
    assert client.connect()
    try:
        yield rig, link, client, port
    finally:
        client.close()
        link.close()


def f32_words(v: float) -> list[int]:
    """float32 big-endian words, high word first (word_order = "big")."""
    hi, lo = struct.unpack(">HH", struct.pack(">f", v))
    return [hi, lo]


def pump(link, ticks: int, start: int = 0) -> tuple[list[list[float]], list, dict]:  # type: ignore[no-untyped-def]
    """Run ``ticks`` loop ticks against the link; commands taken, events, health."""
    out = np.full(1, -99.0)
    used, events = [], []
    for k in range(start, start + ticks):
        if link.receive(k, k * 0.001, out):
            used.append(out.tolist())
        events += link.drain_events()
        time.sleep(0.001)
    return used, events, link.health()


def test_register_map_read_and_a_good_write(served) -> None:  # type: ignore[no-untyped-def]
    rig, link, client, _ = served
    link.state(-1, "running", "")
    link.send(41, 0.041, np.array([0.5, 1.25]))
    time.sleep(0.2)
    r = client.read_input_registers(0, count=7, device_id=1)
    assert not r.isError()
    # tick 41 (uint32, high word first), state running (1), detail 0, belt_speed 0.5 as
    # float32 0x3F000000 (IEEE 754), motor_current 1.25 A at 0.01 A per count = 125
    assert r.registers == [0, 41, 1, 0, 0x3F00, 0x0000, 125]
    w = client.write_registers(0, [0, 41, *f32_words(10.0)], device_id=1)
    assert not w.isError()
    used, _, h = pump(link, 150, start=42)
    assert used == [[10.0]] and h["commands_in"] == 1 and h["latency_ticks_max"] == 1
    back = client.read_holding_registers(2, count=2, device_id=1)
    assert back.registers == f32_words(10.0)


def test_refused_requests_get_exceptions_and_never_reach_the_plant(served) -> None:  # type: ignore[no-untyped-def]
    rig, link, client, _ = served
    link.send(1, 0.001, np.array([0.0, 0.0]))
    time.sleep(0.1)
    cases = [
        (client.read_input_registers(7, count=1, device_id=1), 2),        # unmapped
        (client.read_coils(0, count=1, device_id=1), 2),                  # no coils mapped
        (client.write_register(2, 0x4120, device_id=1), 2),               # half a float32
        (client.write_registers(40, [1, 2], device_id=1), 2),             # unmapped
        (client.write_registers(2, [0x7FC0, 0x0000], device_id=1), 3),    # NaN
        (client.write_registers(2, [0x7F80, 0x0000], device_id=1), 3),    # +inf
        (client.write_registers(2, f32_words(24.5), device_id=1), 3),     # above 24 V
        (client.diag_read_diagnostic_register(device_id=1), 1),           # function 08
    ]
    for response, code in cases:
        assert response.isError() and response.exception_code == code, response
    used, events, h = pump(link, 150)
    assert used == []                                    # nothing reached the plant
    assert h["exceptions_01"] == 1 and h["exceptions_02"] == 4 and h["exceptions_03"] == 3
    assert h["bad_address"] == 3 and h["bad_partial"] == 1 and h["bad_non_finite"] == 2
    assert h["rejected_range"] == 1 and h["bad_function"] == 1
    kinds = [e.kind for e in events]
    assert kinds.count("bad_frame") == 7 and kinds.count("rejected_command") == 1


def test_health_at_the_end_counts_every_command_taken(served) -> None:  # type: ignore[no-untyped-def]
    """The worker's periodic counters can be 0.1 s old; the health the run records is
    asked for at the end, so it never shows more commands used than accepted."""
    rig, link, client, _ = served
    link.send(1, 0.001, np.array([0.0, 0.0]))
    out = np.zeros(1)
    for k in range(2, 12):
        assert not client.write_registers(2, f32_words(float(k)), device_id=1).isError()
        end = time.monotonic() + 5
        while not link.receive(k, k * 0.001, out):   # the write is answered: it is on its way
            assert time.monotonic() < end
            time.sleep(0.001)
    h = link.health()
    assert h["commands_in"] == h["commands_used"] == 10 and out.tolist() == [11.0]


def test_watchdog_counts_accepted_writes_only(served) -> None:  # type: ignore[no-untyped-def]
    rig, link, client, _ = served
    link.send(1, 0.001, np.array([0.0, 0.0]))
    # reads and refused writes for 0.3 s: the controller is alive but not controlling
    out, lost_at, k = np.zeros(1), None, 0
    while k < 300:
        client.read_input_registers(0, count=7, device_id=1)
        client.write_registers(2, f32_words(99.0), device_id=1)
        link.receive(k, k * 0.001, out)
        if lost_at is None and any(e.kind == "link_lost" for e in link.drain_events()):
            lost_at = k
        k += 1
    assert lost_at is not None and lost_at <= 102           # timeout 0.1 s = 100 ticks
    client.write_registers(0, [0, 1, *f32_words(3.0)], device_id=1)
    used, events, h = pump(link, 80, start=k)   # within the timeout again
    assert used == [[3.0]] and "link_restored" in [e.kind for e in events]
    assert h["link_lost"] == 1 and h["link_restored"] == 1


def mbap(tid: int, unit: int, pdu: bytes) -> bytes:
    """A Modbus TCP frame: the MBAP header (transaction, protocol 0, length, unit)."""
    return struct.pack(">HHHB", tid, 0, len(pdu) + 1, unit) + pdu


def fuzzed_pdu(rng: random.Random) -> bytes:
    """A request PDU mixing good, refused and malformed ones."""
    fc = rng.choice((3, 4, 6, 16, 16, 16, 23, 1, 5, 8, 43, rng.randrange(1, 128)))
    addr = rng.choice((0, 1, 2, 3, 4, 6, 7, rng.randrange(0, 65536)))
    if fc == 16:
        count = rng.choice((1, 2, 4))
        words = [rng.choice((0, 0x4120, 0x7FC0, 0x7F80, 0xFF80, 0xC1C0,
                             rng.randrange(0, 65536))) for _ in range(count)]
        return struct.pack(">BHHB", fc, addr, count, 2 * count) + \
            struct.pack(f">{count}H", *words)
    if fc in (3, 4, 1):
        return struct.pack(">BHH", fc, addr, rng.randrange(1, 10))
    if fc in (5, 6):
        return struct.pack(">BHH", fc, addr, rng.randrange(0, 65536))
    return bytes([fc]) + rng.randbytes(rng.randrange(0, 8))


N_MASTERS = 4   # connections polling at once: the server answers one while a master reads


def test_100k_fuzzed_requests_no_garbage_reaches_the_plant(served) -> None:  # type: ignore[no-untyped-def]
    rig, link, client, port = served
    link.send(0, 0.0, np.array([0.0, 0.0]))
    rng = random.Random(18)
    out = np.zeros(1)
    taken: list[float] = []
    n_requests = 100_000
    answered = 0
    masters = [socket.create_connection(("127.0.0.1", port)) for _ in range(N_MASTERS)]
    try:
        for s in masters:
            s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            s.settimeout(2.0)
        # request i goes out on connection i % N_MASTERS; each connection has one request
        # at a time, as a master polls (pymodbus drops what follows an undecodable request
        # in the same read, so pipelining would lose answers), while the others' requests
        # keep the server busy between an answer and the next request
        for i in range(N_MASTERS):
            masters[i].sendall(mbap(i, 1, fuzzed_pdu(rng)))
        for i in range(n_requests):
            s = masters[i % N_MASTERS]
            pending = s.recv(512)
            while len(pending) < 6 or len(pending) < 6 + struct.unpack(">H", pending[4:6])[0]:
                pending += s.recv(512)
            assert struct.unpack(">H", pending[:2])[0] == i & 0xFFFF   # its own answer
            answered += 1
            if i + N_MASTERS < n_requests:
                s.sendall(mbap((i + N_MASTERS) & 0xFFFF, 1, fuzzed_pdu(rng)))
            if i % 50 == 0:
                if link.receive(i, i * 0.001, out):
                    taken.append(float(out[0]))
                link.drain_events()
    finally:
        for s in masters:
            s.close()
    time.sleep(0.3)
    if link.receive(n_requests, 0.0, out):
        taken.append(float(out[0]))
    h = link.health()
    assert answered == n_requests
    # requests pymodbus could not decode (a random tail after a served function code)
    # are answered by pymodbus itself and not counted as requests in
    assert 0.9 * n_requests <= h["frames_in"] <= n_requests
    # every command the loop took is finite and inside the input's range
    assert all(np.isfinite(v) and -24.0 <= v <= 24.0 for v in taken)
    assert h["exceptions_01"] > 0 and h["exceptions_02"] > 0 and h["exceptions_03"] > 0
    assert h["commands_in"] > 0
    # the server still answers a well-behaved client afterwards
    assert not client.read_input_registers(0, count=7, device_id=1).isError()


def crc16_modbus(data: bytes) -> int:
    """CRC-16/MODBUS bit by bit, as the serial line specification describes it: init
    0xFFFF, each byte XORed into the low byte, eight shifts right with 0xA001 (the
    reflected 0x8005) whenever a 1 falls out."""
    crc = 0xFFFF
    for byte in data:
        crc ^= byte
        for _ in range(8):
            crc = (crc >> 1) ^ 0xA001 if crc & 1 else crc >> 1
    return crc


def test_rtu_crc_check_values() -> None:
    # CRC-16/MODBUS check value of ASCII "123456789" is 0x4B37 (CRC RevEng catalogue,
    # from memory); the request "11 03 00 6B 00 03" (unit 17, read 3 holding registers
    # from 0x006B), the example of the Modbus specifications, goes out with CRC bytes
    # "76 87", low byte first (from memory)
    assert crc16_modbus(b"123456789") == 0x4B37
    frame = bytes.fromhex("1103006B0003")
    assert crc16_modbus(frame).to_bytes(2, "little") == bytes.fromhex("7687")
    # pymodbus' RTU framer agrees (it returns the two bytes in wire order as one number)
    assert FramerRTU.compute_CRC(frame) == 0x7687
    rng = random.Random(5)
    for _ in range(200):
        data = rng.randbytes(rng.randrange(1, 64))
        assert FramerRTU.compute_CRC(data).to_bytes(2, "big") == \
            crc16_modbus(data).to_bytes(2, "little")


def test_register_map_mistakes_are_rig_errors(tmp_path: Path) -> None:
    shipped = rig_text(DEMO)
    register = '[link.registers.motor_current]\naddress = 6\ntype = "int16"\nscale = 0.01\n'
    assert register in shipped
    src = shipped.replace(register, '[link.registers.motor_current]\naddress = 5\n'
                          'type = "int12"\n\n[link.registers.speed]\naddress = 9\n')
    path = tmp_path / "rig.toml"
    path.write_text(src)
    issues = {i.key: i.message for i in rig_issues(path)}
    assert "expected one of int16" in issues["link.registers.motor_current.type"]
    assert "already used by belt_speed" in issues["link.registers.motor_current.address"]
    assert "unknown key" in issues["link.registers.speed"]


def test_demo_modbus_runs_without_hardware(tmp_path: Path) -> None:
    proc = subprocess.run([sys.executable, "-m", "plantrig", "demo", "--modbus", "--out",
                           str(tmp_path)], capture_output=True, text=True, timeout=180)
    text = proc.stdout
    assert "controller: ready on modbus tcp 127.0.0.1:" in text, text + proc.stderr
    closing = controller_closing(text)
    assert int(closing["answered"]) > 1500, text   # 3000 ticks: most answered over the loopback
    # the controller read the rig's state registers, the end state among them
    states = closing["states"].split()
    assert "running/0" in states and states[-1] in (f"ended/{proc.returncode}",
                                                    f"fault/{proc.returncode}"), text
    assert proc.returncode in (0, 1), text   # 1: a loaded machine missed real time


def test_rtu_over_a_pty_with_a_pymodbus_serial_client(tmp_path: Path) -> None:
    """The same map served as Modbus RTU on a serial line: the rig's server (its own
    worker process) on one pty, a pymodbus serial client on another, joined by the
    null-modem relay (tests/pty_relay.py); reads, a good write, a refused one."""
    from pymodbus.client import ModbusSerialClient
    from test_pty_hangup import null_modem

    shipped = rig_text(DEMO)
    tcp = 'transport = "tcp"\nhost = "127.0.0.1"\nport = 1502\n'
    assert tcp in shipped
    path = tmp_path / "rig.toml"
    # parity none: Linux ptys refuse parity settings (tcsetattr EINVAL); a real line
    # would keep the serial line specification's even parity
    path.write_text(shipped.replace(tcp, 'transport = "rtu"\nserial_port = "/dev/null"\n'
                                         'baud = 115200\nparity = "none"\n'))
    rig = load_rig(path)
    with null_modem() as (a, b, _relay):
        link = build_link(rig, port=a.slave_path)
        link.open()
        client = ModbusSerialClient(b.slave_path, baudrate=115200, parity="N", stopbits=1,
                                    bytesize=8, timeout=1, retries=1)
        try:
            assert client.connect()
            link.state(-1, "running", "")
            link.send(41, 0.041, np.array([0.5, 1.25]))
            time.sleep(0.3)
            r = client.read_input_registers(0, count=7, device_id=1)
            assert not r.isError(), r
            assert r.registers == [0, 41, 1, 0, 0x3F00, 0x0000, 125]   # as over TCP
            w = client.write_registers(0, [0, 41, *f32_words(10.0)], device_id=1)
            assert not w.isError(), w
            used, _, h = pump(link, 150, start=42)
            assert used == [[10.0]] and h["commands_in"] == 1
            refused = client.write_registers(0, [0, 200, *f32_words(1e6)], device_id=1)
            assert refused.isError()                   # beyond the voltage range: refused
            used, _, h = pump(link, 50, start=192)
            assert used == [] and h["commands_in"] == 1
        finally:
            client.close()
            link.close()


def test_lockstep_fast_run_answers_every_tick_like_the_built_in_law(tmp_path: Path) -> None:
    """A fast run of the Modbus rig with lockstep = true against the reference controller
    (`plantrig controller`, polling as a PLC would): every tick waits for the answer to
    the previous tick's values, so the run has a fresh command every tick and follows the
    same law run built in, up to the registers' float32 and 0.01 A quantisation."""
    import dataclasses

    from plantrig.sim import simulate

    shipped = rig_text(DEMO)
    link_head = 'kind = "modbus"\n'
    assert link_head in shipped and 'mode = "realtime"' in shipped
    path = tmp_path / "rig.toml"
    assert "watchdog_timeout = 0.1\n" in shipped
    # lockstep waits up to the watchdog timeout for each answer: 2 s, so a loaded
    # machine's scheduling cannot make an answer late
    path.write_text(shipped.replace('mode = "realtime"', 'mode = "fast"')
                    .replace(link_head, link_head + "lockstep = true\n")
                    .replace("watchdog_timeout = 0.1\n", "watchdog_timeout = 2.0\n"))
    rig = load_rig(path)
    where = f"127.0.0.1:{free_port()}"
    link = build_link(rig, port=where)
    link.open()
    proc = subprocess.Popen([sys.executable, "-m", "plantrig", "controller", str(path),
                             "--port", where, "--no-realtime"], stdout=subprocess.PIPE,
                            text=True)
    try:
        assert proc.stdout is not None and "ready" in proc.stdout.readline()
        wire = simulate(rig, realtime=False, link=link)
    finally:
        proc.wait(timeout=20)              # the controller ends when the rig's server closes
        assert proc.stdout is not None
        proc.stdout.close()
    assert wire.outcome.ended == "completed", wire.outcome.reason
    assert wire["fresh"].all() and wire.outcome.answered == rig.n_ticks
    assert link.health()["late"] == 0
    assert rig.link is not None and rig.link.controller is not None
    built_in = simulate(dataclasses.replace(rig, controller=rig.link.controller, link=None))
    deviation = np.max(np.abs(wire["y:belt_speed"] - built_in["y:belt_speed"]))
    # float32 registers round belt_speed and the voltage to 2**-24 relative (about 2e-8
    # m/s at 0.4 m/s; measured 1.8e-8): the same law to within that, with a wide margin
    assert deviation <= 1e-6, deviation


def test_a_server_that_cannot_listen_ends_the_run_at_once_with_its_cause(
        tmp_path: Path) -> None:
    # it had run its whole length as a link fault, recorded as "did not start within 10 s"
    taken = socket.socket()
    taken.bind(("127.0.0.1", 0))
    taken.listen()
    port = taken.getsockname()[1]
    try:
        done = subprocess.run([sys.executable, "-m", "plantrig", "run",
                               str(ROOT / "configs" / "conveyor_modbus.toml"), "--port",
                               f"127.0.0.1:{port}", "--out", str(tmp_path / "runs")],
                              capture_output=True, text=True, timeout=120)
    finally:
        taken.close()
    assert done.returncode == 1, done.stderr
    assert (f"outcome: FAULT (ServerNotListening: Modbus server: could not listen on "
            f"Modbus TCP on 127.0.0.1:{port}") in done.stdout
    assert "ticks: 0 of " in done.stdout and "Traceback" not in done.stderr
