"""Benchmark the MQTT link: closed-loop round trip at 500 Hz beside a bare aiomqtt echo.

Not a test: run `.venv/bin/python bench/bench_mqtt.py [--seconds 30]` and read the
markdown it prints. Everything runs against one local mosquitto (loopback,
set_tcp_nodelay true) started for the run, and every number sits beside its peer:

1. bare echo: an aiomqtt client publishes a ping every 2 ms and an aiomqtt echo in
   another process answers it; round trip measured in the client's event loop.
2. the link: MqttLink (its worker process) and the reference controller's MQTT end
   (PID law) in another process, driven at 500 Hz like the tick loop drives it. Two
   round trips: in the worker (publish to answer, the same span as the bare echo) and
   loop to loop (send() of tick k to the receive() that sees the answer to k; the bench
   waits on the link's socket to see it the moment it lands, which the tick loop does
   not do: it looks once per tick).
3. where the asyncio client lives: the real engine at 500 Hz in real time against the
   reference controller, worker in a process vs in a thread of the loop's process;
   the loop's lateness shows what the thread costs (FIELD-NOTES.md: one GIL switch
   interval per wake-up when a busy thread shares the process).

Lost frames: sensor messages that got no answer within the run (QoS 0 on loopback).
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import multiprocessing
import select
import struct
import sys
import time
from pathlib import Path

import aiomqtt
import numpy as np

from plantrig.io import build_link, parse_link_table
from plantrig.io._broker import LocalBroker
from plantrig.io._mqtt_config import mqtt_settings
from plantrig.io._mqtt_controller import MqttControllerPeer
from plantrig.io._mqtt_link import MqttLink
from plantrig.io._mqtt_worker import TCP_NODELAY
from plantrig.io._refcontroller import ReferenceController
from plantrig.sim import Rig, WallClock, load_rig, simulate

RIG = Path(__file__).resolve().parents[1] / "configs" / "conveyor_mqtt.toml"
TICK = 0.002
PING = struct.Struct("<qq")


def stats(ms: list[float] | np.ndarray) -> tuple[float, float, float]:
    a = np.asarray(ms, dtype=float)
    if not a.size:
        return (float("nan"),) * 3  # type: ignore[return-value]
    return float(np.percentile(a, 50)), float(np.percentile(a, 99)), float(a.max())


# ---- 1. bare aiomqtt echo --------------------------------------------------------------

def _echo_main(port: int, ready: multiprocessing.synchronize.Event) -> None:
    async def serve() -> None:
        async with aiomqtt.Client("127.0.0.1", port, socket_options=(TCP_NODELAY,)) as c:
            await c.subscribe("bench/ping")
            ready.set()
            async for m in c.messages:
                if m.payload == b"end":
                    return
                await c.publish("bench/pong", m.payload)
    asyncio.run(serve())


async def _bare_client(port: int, seconds: float) -> tuple[list[float], int, int]:
    rtt: list[float] = []
    got: set[int] = set()
    async with aiomqtt.Client("127.0.0.1", port, socket_options=(TCP_NODELAY,)) as c:
        await c.subscribe("bench/pong")

        async def receive() -> None:
            async for m in c.messages:
                seq, sent = PING.unpack(m.payload)  # type: ignore[arg-type]
                rtt.append((time.perf_counter_ns() - sent) / 1e6)
                got.add(seq)

        reader = asyncio.create_task(receive())
        n = int(seconds / TICK)
        start = time.perf_counter()
        for k in range(n):
            await asyncio.sleep(max(0.0, start + k * TICK - time.perf_counter()))
            await c.publish("bench/ping", PING.pack(k, time.perf_counter_ns()))
        await asyncio.sleep(0.2)
        await c.publish("bench/ping", b"end")
        reader.cancel()
    return rtt, n, n - len(got)


def bare_echo(port: int, seconds: float) -> tuple[list[float], int, int]:
    ctx = multiprocessing.get_context("spawn")
    ready = ctx.Event()
    peer = ctx.Process(target=_echo_main, args=(port, ready))
    peer.start()
    ready.wait(20)
    try:
        return asyncio.run(_bare_client(port, seconds))
    finally:
        peer.join(5)
        if peer.is_alive():
            peer.kill()


# ---- 2. the link ----------------------------------------------------------------------

def _controller_main(rig_path: str, port: int, ready: multiprocessing.synchronize.Event) -> None:
    rig = load_rig(rig_path)
    link, _ = parse_link_table(rig)
    assert link is not None
    controller = ReferenceController(rig, link)
    peer = MqttControllerPeer(mqtt_settings(link, port), len(rig.outputs),
                              controller.command_for, on_ready=lambda _: ready.set())
    asyncio.run(peer.run())


def start_controller(rig: Rig, port: int) -> multiprocessing.process.BaseProcess:
    ctx = multiprocessing.get_context("spawn")
    ready = ctx.Event()
    proc = ctx.Process(target=_controller_main, args=(str(rig.path), port, ready))
    proc.start()
    if not ready.wait(30):
        raise SystemExit("the reference controller did not start")
    return proc


def link_loop(rig: Rig, port: int, seconds: float) -> dict[str, object]:
    """Drive MqttLink like the tick loop, at 500 Hz; loop-to-loop round trips."""
    link = build_link(rig, port=port)
    assert isinstance(link, MqttLink)
    proc = start_controller(rig, port)
    try:
        link.open()
        sock = link._sock
        out = np.zeros(len(rig.inputs))
        values = np.array([0.4, 1.0])
        n = int(seconds / TICK)
        rtt: list[float] = []
        answered = 0
        clock = WallClock()  # the engine's pacing: sleep, then spin the last 200 us
        start = time.perf_counter()
        for k in range(n):
            deadline = start + (k + 1) * TICK
            clock.sleep_until_ns(int((start + k * TICK) * 1e9))
            sent = time.perf_counter_ns()
            link.send(k, k * TICK, values)
            while True:  # until the answer to k lands, or the next tick is due
                left = deadline - time.perf_counter()
                if left <= 0:
                    break
                select.select([sock], [], [], left)
                link.receive(k, k * TICK, out)
                if link.last_echo_tick == k:
                    rtt.append((time.perf_counter_ns() - sent) / 1e6)
                    answered += 1
                    break
            link.drain_events()
        health = link.health()
    finally:
        link.close()
        proc.terminate()
        proc.join(5)
    return {"rtt": rtt, "sent": n, "answered": answered, "health": health}


# ---- 3. process vs thread --------------------------------------------------------------

def engine_run(rig: Rig, port: int, worker: str, seconds: float) -> dict[str, float]:
    rig = dataclasses.replace(rig, duration=seconds, link={**(rig.link or {}), "worker": worker})
    link = build_link(rig, port=port)
    proc = start_controller(rig, port)
    try:
        data = simulate(rig, realtime=True, link=link)
    finally:
        proc.terminate()
        proc.join(5)
    t = data.outcome.timing(rig.tick)
    h = data.outcome.link_health
    return {"late_p50": float(t["lateness_p50_s"]) * 1e6,  # type: ignore[arg-type]
            "late_p99": float(t["lateness_p99_s"]) * 1e6,  # type: ignore[arg-type]
            "late_max": float(t["lateness_max_s"]) * 1e6,  # type: ignore[arg-type]
            "overruns": float(t["overruns"]),  # type: ignore[arg-type]
            "missed": h.get("missed_ticks", 0.0), "late_answers": h.get("late", 0.0),
            "rtt_p50": h.get("latency_ms_p50", float("nan"))}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=30.0, help="length of each part (s)")
    args = ap.parse_args(argv)
    rig = dataclasses.replace(load_rig(RIG), tick=TICK)
    with LocalBroker() as broker:
        bare, bare_n, bare_lost = bare_echo(broker.port, args.seconds)
        loop = link_loop(rig, broker.port, args.seconds)
        placement = {w: engine_run(rig, broker.port, w, min(args.seconds, 10.0))
                     for w in ("process", "thread")}
    h = loop["health"]
    assert isinstance(h, dict)
    b50, b99, bmax = stats(bare)
    w50, w99, wmax = h.get("latency_ms_p50", 0), h.get("latency_ms_p99", 0), \
        h.get("latency_ms_max", 0)
    l50, l99, lmax = stats(loop["rtt"])  # type: ignore[arg-type]
    lost = int(loop["sent"]) - int(loop["answered"])  # type: ignore[call-overload]
    print(f"## MQTT link (bench/bench_mqtt.py, {args.seconds:g} s per part, 500 Hz)\n")
    print(f"mosquitto on 127.0.0.1 (set_tcp_nodelay true), QoS 0, JSON payloads; "
          f"Python {sys.version.split()[0]}, aiomqtt {aiomqtt.__version__}.\n")
    print("| round trip (ms) | p50 | p99 | max | sent | lost | p50 / bare | p99 / bare |")
    print("|---|---|---|---|---|---|---|---|")
    print(f"| bare aiomqtt echo (peer) | {b50:.3f} | {b99:.3f} | {bmax:.3f} | {bare_n} | "
          f"{bare_lost} | 1.00 | 1.00 |")
    print(f"| link, in the worker (same span) | {w50:.3f} | {w99:.3f} | {wmax:.3f} | "
          f"{loop['sent']} | {lost} | {w50 / b50:.2f} | {w99 / b99:.2f} |")
    print(f"| link, loop to loop | {l50:.3f} | {l99:.3f} | {lmax:.3f} | {loop['sent']} | "
          f"{lost} | {l50 / b50:.2f} | {l99 / b99:.2f} |")
    print()
    print("| worker placement (engine, 500 Hz real time) | lateness p50 (us) | p99 (us) | "
          "max (us) | overruns | ticks without a fresh command | late answers | "
          "round trip p50 (ms) |")
    print("|---|---|---|---|---|---|---|---|")
    for w, r in placement.items():
        print(f"| {w} | {r['late_p50']:.1f} | {r['late_p99']:.1f} | {r['late_max']:.1f} | "
              f"{r['overruns']:.0f} | {r['missed']:.0f} | {r['late_answers']:.0f} | "
              f"{r['rtt_p50']:.3f} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
