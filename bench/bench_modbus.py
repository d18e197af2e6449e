"""Modbus link: a controller's poll against plantrig's server beside a bare pymodbus one.

Not a test: run `.venv/bin/python bench/bench_modbus.py [--cycles 3000]` and read the
markdown it prints. One pymodbus TCP client plays the controller of the demo rig
(configs/conveyor_modbus.toml): each cycle reads the seven input registers (run state
and sensors) and writes the four holding registers (tick stamp and the voltage), the
poll a PLC makes. Timed against, in the same run:

- a bare pymodbus server (its own simulator datastore, in its own process): the floor
  of a Modbus round trip on this machine;
- plantrig's Modbus link (its server process with the register map) while the rig's
  loop runs beside it at 1 kHz in this process, taking every command it is given.

Reported: round-trip p50/p99/max of both (the bare server timed before and after, so
drift on the machine shows), their ratio (target <= 1.3x), and the link's own
loop-to-loop latency in ticks from its health counters.
"""

from __future__ import annotations

import argparse
import socket
import struct
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
from pymodbus.client import ModbusTcpClient

from plantrig.io import build_link
from plantrig.sim import load_rig

ROOT = Path(__file__).resolve().parents[1]
RIG = ROOT / "configs" / "conveyor_modbus.toml"
BARE_SERVER = """
import asyncio, sys
from pymodbus.server import ModbusTcpServer
from pymodbus.simulator import DataType, SimData, SimDevice

async def main():
    device = SimDevice(id=1, simdata=[SimData(0, count=16, values=0,
                                              datatype=DataType.REGISTERS)])
    server = ModbusTcpServer(device, address=("127.0.0.1", int(sys.argv[1])))
    print("ready", flush=True)
    await server.serve_forever()

asyncio.run(main())
"""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def connect(port: int) -> ModbusTcpClient:
    client = ModbusTcpClient("127.0.0.1", port=port, timeout=2, retries=0)
    deadline = time.monotonic() + 10
    while not client.connect():
        if time.monotonic() > deadline:
            sys.exit(f"no Modbus server on 127.0.0.1:{port}")
        time.sleep(0.05)
    return client


def poll_cycles(client: ModbusTcpClient, cycles: int) -> np.ndarray:
    """Round-trip seconds of ``cycles`` controller polls (read inputs, write command)."""
    out = np.empty(cycles)
    for i in range(cycles):
        began = time.perf_counter()
        r = client.read_input_registers(0, count=7, device_id=1)
        stamp = r.registers[:2] if not r.isError() else [0, 0]   # the tick it answers
        hi, lo = struct.unpack(">HH", struct.pack(">f", 1.0 + (i % 7) * 0.1))
        w = client.write_registers(0, [*stamp, hi, lo], device_id=1)
        out[i] = time.perf_counter() - began
        if r.isError() or w.isError():
            sys.exit(f"poll {i} failed: {r} {w}")
    return out


def bare(cycles: int) -> np.ndarray:
    port = free_port()
    proc = subprocess.Popen([sys.executable, "-c", BARE_SERVER, str(port)],
                            stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout is not None and proc.stdout.readline().startswith("ready")
        client = connect(port)
        try:
            poll_cycles(client, 200)                       # warm up
            return poll_cycles(client, cycles)
        finally:
            client.close()
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def plantrig(cycles: int) -> tuple[np.ndarray, dict[str, float]]:
    rig = load_rig(RIG)
    port = free_port()
    link = build_link(rig, port=f"127.0.0.1:{port}")
    link.open()
    stop = threading.Event()

    def loop() -> None:                    # the rig's side at 1 kHz: send, take commands
        cmd = np.zeros(len(rig.inputs))
        k = 0
        next_at = time.perf_counter()
        while not stop.is_set():
            link.send(k, k * rig.tick, np.array([0.4, 1.0]))
            link.receive(k, k * rig.tick, cmd)
            link.drain_events()
            k += 1
            next_at += rig.tick
            time.sleep(max(0.0, next_at - time.perf_counter()))

    runner = threading.Thread(target=loop, name="rig-loop", daemon=True)
    link.state(-1, "running", "")
    runner.start()
    try:
        client = connect(port)
        try:
            poll_cycles(client, 200)
            times = poll_cycles(client, cycles)
        finally:
            client.close()
    finally:
        stop.set()
        runner.join()
        health = link.health()
        link.close()
    return times, health


def row(name: str, t: np.ndarray, floor: np.ndarray | None) -> str:
    us = t * 1e6
    ratio = (f"{np.percentile(t, 50) / np.percentile(floor, 50):.2f}x p50, "
             f"{np.percentile(t, 99) / np.percentile(floor, 99):.2f}x p99"
             if floor is not None else "1.00x")
    return (f"| {name} | {len(t)} | {np.percentile(us, 50):.0f} | {np.percentile(us, 99):.0f} "
            f"| {us.max():.0f} | {ratio} |")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cycles", type=int, default=3000)
    args = parser.parse_args()
    floor = bare(args.cycles)
    ours, health = plantrig(args.cycles)
    floor_again = bare(args.cycles)                        # before and after: drift shows
    print("| server | polls | round trip p50 (us) | p99 (us) | max (us) | vs bare |")
    print("|---|---|---|---|---|---|")
    print(row("bare pymodbus (before)", floor, None))
    print(row("plantrig Modbus link, loop at 1 kHz", ours, np.concatenate([floor, floor_again])))
    print(row("bare pymodbus (after)", floor_again, None))
    if "latency_ticks_p50" in health:
        print(f"\nlink loop-to-loop latency (1 ms ticks, from the values' tick stamp to "
              f"the tick the command answering them was taken): "
              f"{health['latency_ticks_p50']:.0f} p50, {health['latency_ticks_max']:.0f} max; "
              f"commands in {health.get('commands_in', 0):.0f}")


if __name__ == "__main__":
    main()
