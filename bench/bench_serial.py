"""Benchmark the serial link: closed-loop round trip over a pty, and the wire budget.

Not a test: run `.venv/bin/python bench/bench_serial.py [--seconds 30]` and read the
markdown it prints. Numbers sit beside a peer measured in the same run:

- round trip at 1 kHz over a pty: the rig's SerialLink writes the conveyor's sensor
  frame and waits (select, no spinning: a spinning SCHED_FIFO thread starves the
  kernel worker that moves pty bytes on its core) until the answer of the reference
  controller (another process, the one `plantrig demo` runs) is decoded, beside a
  bare pyserial echo of the same bytes over another pty (a child process that only
  reads and writes back). The two are
  measured in alternating one-second blocks, so machine load hits both alike;
- bytes per tick on the wire for the conveyor rig, against the line rate at 115200 and
  921600 baud (8N1: 10 bits per byte, common practice), and the highest tick rate each
  carries. A pty does not enforce a baud rate (docs/platform.md), so the round trip above
  is the software's share only; add the frames' time on a real line.
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from plantrig._hil import controller_command, wait_ready
from plantrig.io import (
    FdPort,
    FrameSplitter,
    Kind,
    SerialLink,
    build_link,
    decode_frame,
    encode_line,
    open_pty_pair,
)
from plantrig.sim import WallClock, load_rig, simulate
from plantrig.sim.engine._clock import SPIN_NS
from plantrig.sim.engine._realtime import realtime_process

RIG = Path(__file__).resolve().parents[1] / "configs" / "conveyor_hil.toml"
TICK_NS = 1_000_000
BAUDS = (115200, 921600)
BITS_PER_BYTE = 10   # 8N1: start + 8 data + stop (common practice)

ECHO = """
import os, sys, serial
from plantrig.io._refcontroller import prefer_realtime
ser = serial.serial_for_url(sys.argv[1], baudrate=921600, timeout=0.05)
prefer_realtime()
print("echo: ready", flush=True)
while True:
    try:
        data = ser.read(max(1, ser.in_waiting))
        if data and ser.in_waiting:
            data += ser.read(ser.in_waiting)
        if data:
            ser.write(data)
    except OSError:
        break
"""


def _wait_line(proc: subprocess.Popen[str], word: str) -> None:
    assert proc.stdout is not None
    line = proc.stdout.readline()
    if not line.startswith(word):
        raise SystemExit(f"peer did not start: {line!r}")


def percentiles(us: list[float]) -> tuple[float, float, float]:
    a = np.array(us)
    return float(np.percentile(a, 50)), float(np.percentile(a, 99)), float(a.max())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=30.0,
                        help="seconds of each of the two loops (default 30)")
    args = parser.parse_args()
    rig = load_rig(RIG)
    settings = rig.link
    assert settings is not None
    # realistic sensor values: the conveyor's outputs from a fast run with the law built in
    twin = dataclasses.replace(rig, controller=settings.controller, link=None, mode="fast")
    y = simulate(twin).rows[:, [twin_col(twin, o.name) for o in rig.outputs]]

    link_pair, echo_pair = open_pty_pair(), open_pty_pair()
    ctrl = subprocess.Popen(controller_command(rig.path, link_pair.slave_path),
                            stdout=subprocess.PIPE, text=True)
    echo = subprocess.Popen([sys.executable, "-c", ECHO, echo_pair.slave_path],
                            stdout=subprocess.PIPE, text=True)
    try:
        if not wait_ready(ctrl, 30.0):
            raise SystemExit("the reference controller did not start")
        _wait_line(echo, "echo: ready")
        link_pair.close_slave()
        echo_pair.close_slave()
        link = build_link(rig, port=FdPort(link_pair.master_fd, name="pty", owns_fd=False))
        assert isinstance(link, SerialLink)
        link.open()
        echo_port = FdPort(echo_pair.master_fd, name="echo pty", owns_fd=False)
        # the rig's loop runs as the engine runs it: GC frozen, pinned, SCHED_FIFO if allowed
        with realtime_process(TICK_NS, SPIN_NS) as rt:
            results = run_blocks(link, echo_port, y, args.seconds)
        health = link.health()
        link.close()
    finally:
        link_pair.close_master()
        echo_pair.close_master()
        for proc in (ctrl, echo):
            with contextlib.suppress(subprocess.TimeoutExpired):
                proc.wait(timeout=5)
            if proc.poll() is None:
                proc.kill()
    report(rig, link, y, results, health, args.seconds)
    print(f"\nRig loop: {rt.scheduler}, cpu {rt.cpu}; peers: SCHED_FIFO 5 where permitted.")


def twin_col(rig, name: str) -> int:  # type: ignore[no-untyped-def]
    from plantrig.sim import tick_columns
    return tick_columns(rig)[0].index(f"sent:{name}")


@dataclasses.dataclass
class Loop:
    rtt_us: list[float] = dataclasses.field(default_factory=list)
    lost: int = 0


def run_blocks(link: SerialLink, echo: FdPort, y: np.ndarray,
               seconds: float) -> dict[str, Loop]:
    """Alternate one-second blocks of the link loop and the echo loop at 1 kHz."""
    clock = WallClock()
    out = {"link": Loop(), "echo": Loop()}
    cmd = np.zeros(1)
    port = link.io
    assert port is not None
    splitter = FrameSplitter()
    ticks = int(seconds * 1000)
    k = 0
    start = clock.now_ns() + 10_000_000
    slot = 0
    for block in range(2 * int(np.ceil(seconds))):
        which = "link" if block % 2 == 0 else "echo"
        res = out[which]
        for _ in range(1000):
            if len(res.rtt_us) + res.lost >= ticks:
                break
            deadline = start + slot * TICK_NS
            slot += 1
            clock.sleep_until_ns(deadline)
            values = y[k % len(y)]
            t0 = time.perf_counter_ns()
            got = False
            if which == "link":
                link.send(k, k * 1e-3, values)
                while (left := TICK_NS * 9 // 10 - (time.perf_counter_ns() - deadline)) > 0:
                    port.wait_readable(left / 1e9)
                    if link.receive(k + 1, (k + 1) * 1e-3, cmd) and link.last_echo == k:
                        got = True
                        break
            else:
                frame = link.wire.encode(Kind.SENSOR, k & 0xFFFF, k, values)
                echo.write_some(frame)
                while (left := TICK_NS * 9 // 10 - (time.perf_counter_ns() - deadline)) > 0:
                    echo.wait_readable(left / 1e9)
                    data = echo.read_some()
                    if data and any(decode_frame(p).tick == k for p in splitter.feed(data)):
                        got = True
                        break
            if got:
                res.rtt_us.append((time.perf_counter_ns() - t0) / 1e3)
            else:
                res.lost += 1
            k += 1
    return out


def report(rig, link: SerialLink, y: np.ndarray,  # type: ignore[no-untyped-def]
           results: dict[str, Loop], health: dict[str, float],
           seconds: float) -> None:
    print("## Serial link\n")
    print(f"Measured by `bench/bench_serial.py --seconds {seconds:g}` on this machine "
          f"({time.strftime('%Y-%m-%d')}). Round trip at 1 kHz over a pty: write the "
          "sensor frame, wait (select) until the answer is decoded; the two loops "
          "alternate in one-second blocks.\n")
    print("| loop | answers | lost (> 0.9 tick) | p50 | p99 | max |")
    print("|---|---|---|---|---|---|")
    stats = {}
    for name, label in (("link", "SerialLink + reference controller (decode, PI law, "
                                  "encode)"), ("echo", "bare pyserial echo, same bytes")):
        rtts = results[name].rtt_us
        p50, p99, mx = percentiles(rtts)
        stats[name] = (p50, p99)
        print(f"| {label} | {len(rtts)} | {results[name].lost} | {p50:.0f} us | "
              f"{p99:.0f} us | {mx:.0f} us |")
    ratio50 = stats["link"][0] / stats["echo"][0]
    ratio99 = stats["link"][1] / stats["echo"][1]
    print(f"\nOverhead ratio link / echo: {ratio50:.2f}x at p50, {ratio99:.2f}x at p99 "
          f"(target <= 1.3x). Link counters: bad frames "
          f"{sum(v for k, v in health.items() if k.startswith(('bad_', 'rejected_'))):.0f}, "
          f"dropped out {health['dropped_out']:.0f}.\n")

    sensor = len(link.wire.encode(Kind.SENSOR, 1, 1, y[-1]))
    command = len(link.wire.encode(Kind.COMMAND, 1, 1, [12.5]))
    text_sensor = float(np.mean([len(encode_line(k, 100_000 + k, y[k])) for k in
                                 range(0, len(y), 10)]))
    text_command = len(encode_line(1, 100_000, [-12.3456789]))
    print(f"Bytes per tick for `{rig.name}` ({len(rig.outputs)} sensor values, "
          f"{len(rig.inputs)} command value), with the 0x00 delimiter; a UART is full "
          "duplex, so the larger direction sets the limit:\n")
    print("| format | rig -> controller | controller -> rig | "
          + " | ".join(f"max tick rate at {b}" for b in BAUDS) + " |")
    print("|---|---|---|" + "---|" * len(BAUDS))
    for label, s, c in (("binary float32", sensor, command),
                        ("text, checksum (mean)", text_sensor, text_command)):
        rates = [b / BITS_PER_BYTE / max(s, c) for b in BAUDS]
        print(f"| {label} | {s:.0f} B | {c:.0f} B | "
              + " | ".join(f"{r:.0f} Hz" for r in rates) + " |")
    print(f"\nAt {1 / rig.tick:g} Hz the binary sensor frames need "
          f"{sensor * BITS_PER_BYTE / rig.tick:.0f} baud: 115200 baud cannot carry the "
          "conveyor at 1 kHz; 921600 (the conveyor_hil rig's setting) can.")


if __name__ == "__main__":
    main()
