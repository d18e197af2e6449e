"""Benchmark the MQTT link: closed-loop round trip at 500 Hz beside a bare aiomqtt echo.

Not a test: run `.venv/bin/python bench/bench_mqtt.py [--seconds 30]` and read the
markdown it prints. Everything runs against one local mosquitto (loopback,
set_tcp_nodelay true) started for the run, and every number sits beside its peer:

1. bare echo (the peer): an aiomqtt client publishes a ping every 2 ms and an aiomqtt
   echo in another process answers it; round trip timed in the client's event loop.
2. the link: MqttLink (its worker process) and the reference controller's MQTT end
   (PI law) in another process, driven at 500 Hz with the engine's pacing. Two round
   trips: in the worker (publish to answer: the span the bare echo times) and loop to
   loop (send() of tick k to the receive() that sees the answer; the bench waits on the
   link's socket to see it land, where the tick loop looks once per tick).
   The two loops alternate in one-second blocks, so both see the same machine load.
3. where the asyncio client lives: the engine at 500 Hz in real time against the
   reference controller, the worker in its own process vs in a thread of the loop's
   process; the loop's lateness shows what the thread costs (docs/platform.md: a busy
   thread delays every wake-up of the loop by about one GIL switch interval).

Lost: sensor messages (pings) that got no answer by the end of the run.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import multiprocessing
import multiprocessing.synchronize
import select
import struct
import sys
import time
from pathlib import Path

import aiomqtt
import numpy as np

from plantrig.io import build_link
from plantrig.io._broker import LocalBroker
from plantrig.io._mqtt_config import mqtt_settings
from plantrig.io._mqtt_controller import MqttControllerPeer
from plantrig.io._mqtt_link import MqttLink
from plantrig.io._mqtt_worker import TCP_NODELAY
from plantrig.io._refcontroller import ReferenceController
from plantrig.sim import Rig, WallClock, load_rig, simulate

RIG = Path(__file__).resolve().parents[1] / "configs" / "conveyor_mqtt.toml"
TICK = 0.002
TICK_NS = 2_000_000
PING = struct.Struct("<qq")


def stats(ms: list[float]) -> tuple[float, float, float]:
    a = np.asarray(ms, dtype=float)
    if not a.size:
        return float("nan"), float("nan"), float("nan")
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


class BareEcho:
    """A connected aiomqtt client on its own event loop, run one block at a time."""

    def __init__(self, port: int) -> None:
        ctx = multiprocessing.get_context("spawn")
        ready = ctx.Event()
        self.peer = ctx.Process(target=_echo_main, args=(port, ready))
        self.peer.start()
        if not ready.wait(30):
            raise SystemExit("the echo peer did not start")
        self.loop = asyncio.new_event_loop()
        self.loop.run_until_complete(self._connect(port))
        self.rtt: list[float] = []
        self.answered: set[int] = set()
        self.sent = 0

    async def _connect(self, port: int) -> None:
        self.client = aiomqtt.Client("127.0.0.1", port, socket_options=(TCP_NODELAY,))
        await self.client.__aenter__()
        await self.client.subscribe("bench/pong")
        self.reader = asyncio.create_task(self._receive())

    async def _receive(self) -> None:
        async for m in self.client.messages:
            seq, sent = PING.unpack(m.payload)  # type: ignore[arg-type]
            self.rtt.append((time.perf_counter_ns() - sent) / 1e6)
            self.answered.add(seq)

    async def _block(self, seconds: float) -> None:
        start = time.perf_counter()
        for i in range(int(seconds / TICK)):
            await asyncio.sleep(max(0.0, start + i * TICK - time.perf_counter()))
            await self.client.publish("bench/ping", PING.pack(self.sent, time.perf_counter_ns()))
            self.sent += 1
        await asyncio.sleep(0.02)  # let the last answers in

    def block(self, seconds: float) -> None:
        self.loop.run_until_complete(self._block(seconds))

    def close(self) -> None:
        self.loop.run_until_complete(self.client.publish("bench/ping", b"end"))
        self.reader.cancel()
        self.loop.run_until_complete(self.client.__aexit__(None, None, None))
        self.loop.close()
        self.peer.join(5)


# ---- 2. the link ----------------------------------------------------------------------

def _controller_main(rig_path: str, port: int, ready: multiprocessing.synchronize.Event) -> None:
    rig = load_rig(rig_path)
    link = rig.link
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


class LinkLoop:
    """MqttLink driven like the tick loop (send tick k, then receive until tick k + 1)."""

    def __init__(self, rig: Rig, port: int, seconds: float) -> None:
        link = build_link(rig, port=port)
        assert isinstance(link, MqttLink)
        self.link = link
        self.proc = start_controller(rig, port)
        link.open()
        self.out = np.zeros(len(rig.inputs))
        self.values = np.array([0.4, 1.0])
        self.sent_ns = np.zeros(int(seconds / TICK) + 1000, dtype=np.int64)
        self.rtt: list[float] = []
        self.clock = WallClock()  # the engine's pacing: sleep, then spin the last 200 us
        self.k = 0
        self.seen = -2

    def block(self, seconds: float, send: bool = True) -> None:
        link, sock = self.link, self.link._sock
        start = time.perf_counter_ns()
        for i in range(int(seconds / TICK)):
            self.clock.sleep_until_ns(start + i * TICK_NS)
            k = self.k
            if send:
                self.sent_ns[k] = time.perf_counter_ns()
                link.send(k, k * TICK, self.values)
            while (left := start + (i + 1) * TICK_NS - time.perf_counter_ns()) > 0:
                select.select([sock], [], [], left / 1e9)
                if link.receive(k, k * TICK, self.out) and link.last_echo_tick != self.seen:
                    self.seen = link.last_echo_tick
                    self.rtt.append((time.perf_counter_ns() - self.sent_ns[self.seen]) / 1e6)
            link.drain_events()
            self.k += 1 if send else 0
        if send:  # the last answers of this block, before the peer's block starts
            self.block(0.02, send=False)

    def close(self) -> dict[str, float]:
        self.block(0.1, send=False)  # the stragglers
        health = self.link.health()
        self.link.close()
        self.proc.terminate()
        self.proc.join(5)
        return health


# ---- 3. process vs thread --------------------------------------------------------------

def engine_run(rig: Rig, port: int, worker: str, seconds: float) -> dict[str, float]:
    assert rig.link is not None
    settings = dataclasses.replace(rig.link, options={**rig.link.options, "worker": worker})
    rig = dataclasses.replace(rig, duration=seconds, link=settings)
    link = build_link(rig, port=port)
    proc = start_controller(rig, port)
    try:
        data = simulate(rig, realtime=True, link=link)
    finally:
        proc.terminate()
        proc.join(5)
    late = data["lateness"] * 1e6
    h = data.outcome.link_health
    return {"late_p50": float(np.percentile(late, 50)), "late_p99": float(np.percentile(late, 99)),
            "late_max": float(late.max()), "overruns": float(data.outcome.overruns),
            "missed": h.get("missed_ticks", 0.0), "late_answers": h.get("late", 0.0),
            "rtt_p50": h.get("latency_ms_p50", float("nan"))}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=30.0,
                    help="seconds of each loop (alternating 1 s blocks)")
    args = ap.parse_args(argv)
    rig = dataclasses.replace(load_rig(RIG), tick=TICK)
    blocks = max(1, round(args.seconds))
    with LocalBroker() as broker:
        bare = BareEcho(broker.port)
        loop = LinkLoop(rig, broker.port, blocks)
        for _ in range(blocks):
            bare.block(1.0)
            loop.block(1.0)
        bare.close()
        h = loop.close()
        seconds = min(blocks, 10)
        placement = {w: engine_run(rig, broker.port, w, seconds) for w in ("process", "thread")}
    b50, b99, bmax = stats(bare.rtt)
    w50, w99, wmax = (h.get(f"latency_ms_{q}", float("nan")) for q in ("p50", "p99", "max"))
    l50, l99, lmax = stats(loop.rtt)
    bare_lost = bare.sent - len(bare.answered)
    lost = loop.k - int(h.get("commands_in", 0))
    print(f"## MQTT link\n\nMeasured by `bench/bench_mqtt.py --seconds {args.seconds:g}` "
          f"({blocks} one-second blocks of each loop, alternating; 500 Hz). mosquitto on "
          f"127.0.0.1 with set_tcp_nodelay true, QoS 0, JSON payloads, MQTT 3.1.1; Python "
          f"{sys.version.split()[0]}, aiomqtt {aiomqtt.__version__}.\n")
    print("| round trip | sent | lost | p50 | p99 | max | p50 / peer | p99 / peer |")
    print("|---|---|---|---|---|---|---|---|")
    print(f"| bare aiomqtt echo (peer) | {bare.sent} | {bare_lost} | {b50:.3f} ms | "
          f"{b99:.3f} ms | {bmax:.3f} ms | 1.00 | 1.00 |")
    print(f"| link, in the worker (the same span) | {loop.k} | {lost} | {w50:.3f} ms | "
          f"{w99:.3f} ms | {wmax:.3f} ms | {w50 / b50:.2f} | {w99 / b99:.2f} |")
    print(f"| link, loop to loop | {loop.k} | {lost} | {l50:.3f} ms | {l99:.3f} ms | "
          f"{lmax:.3f} ms | {l50 / b50:.2f} | {l99 / b99:.2f} |")
    print(f"\nLink counters: superseded before the loop looked {h.get('superseded', 0):.0f}, "
          f"dropped out {h.get('dropped_out', 0):.0f}, bad "
          f"{sum(v for k, v in h.items() if k.startswith(('bad_', 'rejected_'))):.0f}. The "
          "worker's span holds its last 4096 round trips.\n")
    within = [float(np.mean(np.asarray(rtt) < TICK * 1e3)) * 100 for rtt in (bare.rtt, loop.rtt)]
    print(f"Round trips within one tick ({TICK * 1e3:g} ms), the most a tick loop that does "
          f"not wait could use in its next tick: bare echo {within[0]:.1f} %, link loop to "
          f"loop {within[1]:.1f} %.\n")
    print(f"| worker placement (engine, 500 Hz real time, {seconds} s) | lateness p50 | p99 | "
          "max | overruns | ticks without a fresh command | late answers | round trip p50 |")
    print("|---|---|---|---|---|---|---|---|")
    for w, r in placement.items():
        print(f"| {w} | {r['late_p50']:.1f} us | {r['late_p99']:.1f} us | "
              f"{r['late_max']:.1f} us | {r['overruns']:.0f} | {r['missed']:.0f} "
              f"({r['missed'] / (seconds / TICK) * 100:.1f} %) | "
              f"{r['late_answers']:.0f} | {r['rtt_p50']:.3f} ms |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
