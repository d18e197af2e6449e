"""Command-line parts for a controller over MQTT: `plantrig controller` on an MQTT rig and
`plantrig demo --mqtt`.

The demo is the whole MQTT bench on one machine: it starts its own mosquitto on a free
127.0.0.1 port (generated configuration: loopback listener only, anonymous access, which
is fine for a demo on loopback and nowhere else, set_tcp_nodelay true), the reference
controller as a separate process, and the rig in real time; then it prints the run
folder, the link health and the timing, and stops the broker.
"""

from __future__ import annotations

import argparse
import signal
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from plantrig import show_caution, shown_env
from plantrig.configs import CONFIGS

EXIT_OK, EXIT_FAULT, EXIT_USAGE = 0, 1, 2
DEMO_RIG = CONFIGS / "conveyor_mqtt.toml"
READY_TIMEOUT_S = 20.0


def run_mqtt_controller(args: argparse.Namespace, rig: Any, settings: Any,
                        controller: Any, ready_word: str) -> int:
    """`plantrig controller RIG` for an MQTT [link]: serve until the rig closes the link.

    ``--port`` overrides the broker: a port number or host:port.
    """
    from plantrig.io import end_lines, mqtt_settings, prefer_realtime, serve_reference

    try:
        mqtt = mqtt_settings(settings, args.port)
    except ValueError as exc:
        print(f"error: --port: {exc}", file=sys.stderr)
        return EXIT_USAGE
    stopping: list[bool] = []
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: stopping.append(True))

    scheduler = prefer_realtime() if not args.no_realtime else "SCHED_OTHER"

    def ready(where: str) -> None:
        print(f"{ready_word} on mqtt {where} ({mqtt.payload}, "
              f"{controller.law.__class__.__name__}, {scheduler})", flush=True)

    def waiting(where: str) -> None:
        print(f"waiting for the MQTT broker at {where}; retrying until it answers "
              "(Ctrl-C stops)", file=sys.stderr, flush=True)

    reason = serve_reference(controller, mqtt, len(rig.outputs), stop=lambda: bool(stopping),
                             on_ready=ready, on_waiting=waiting)
    print("\n".join(end_lines(settings.kind, reason, controller.counts)), flush=True)
    return EXIT_OK


def cmd_demo_mqtt(args: argparse.Namespace, load: Callable[[str], Any]) -> int:
    """Rig and reference controller through a local mosquitto, in real time."""
    from plantrig._hil import demo_result, reap, wait_ready
    from plantrig.io import BrokerError, LocalBroker, build_link
    from plantrig.sim import run_to_folder

    show_caution()
    rig = load(args.rig or str(DEMO_RIG))
    found = rig.link.kind if rig.link else None
    if found != "mqtt":
        print(f"error: {rig.path}: link.kind: expected 'mqtt' for demo --mqtt, found "
              f"{found!r}", file=sys.stderr)
        return EXIT_USAGE
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    try:
        broker = LocalBroker()
        broker.start()
    except (BrokerError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_FAULT
    where = f"{broker.host}:{broker.port}"
    print(f"broker: mosquitto on {where} (config {broker.conf})")
    proc = subprocess.Popen([sys.executable, "-m", "plantrig", "controller", str(rig.path),
                             "--port", where], stdout=subprocess.PIPE, text=True,
                            env=shown_env())
    try:
        ready = wait_ready(proc, READY_TIMEOUT_S)
        if ready is None:
            print("error: the reference controller did not start", file=sys.stderr)
            return EXIT_FAULT
        print(f"{ready} (pid {proc.pid})")
        link = build_link(rig, port=where)
        print(f"rig: {rig.name}, {1 / rig.tick:g} Hz for {rig.duration:g} s in real time "
              f"over MQTT at {where}")
        folder, outcome, summary = run_to_folder(rig, out, realtime=True, link=link)
    finally:
        reap(proc)   # the controller ends when the rig says 'offline' (link closed)
        broker.close()
    return demo_result(proc, folder, outcome, summary)
