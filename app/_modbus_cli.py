"""Command-line parts for a controller on a Modbus link: `plantrig controller` on a
modbus rig polls it as a PLC would, and `plantrig demo --modbus` runs the whole bench on
one machine over Modbus TCP on a free loopback port."""

from __future__ import annotations

import argparse
import signal
import socket
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from plantrig import show_caution, shown_env
from plantrig.configs import CONFIGS

EXIT_OK, EXIT_FAULT, EXIT_USAGE = 0, 1, 2
DEMO_RIG = CONFIGS / "conveyor_modbus.toml"
READY_TIMEOUT_S = 20.0


def run_modbus_controller_cli(args: argparse.Namespace, rig: Any, settings: Any,
                              controller: Any, ready_word: str) -> int:
    """`plantrig controller` for a modbus [link]: poll until the rig goes away."""
    from plantrig.io import end_lines, modbus_setup, prefer_realtime, run_modbus_controller

    try:
        setup = modbus_setup(rig, settings, args.port)
    except ValueError as exc:
        print(f"error: --port: {exc}", file=sys.stderr)
        return EXIT_USAGE
    stopping: list[bool] = []
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: stopping.append(True))
    where = (f"{setup['host']}:{setup['port']}" if setup["transport"] == "tcp"
             else setup["serial_port"])

    scheduler = prefer_realtime() if not args.no_realtime else "SCHED_OTHER"

    def ready() -> None:
        print(f"{ready_word} on modbus {setup['transport']} {where} (unit "
              f"{setup['unit_id']}, {controller.law.__class__.__name__}, {scheduler})",
              flush=True)

    reason = run_modbus_controller(controller, setup, stop=lambda: bool(stopping),
                                   on_connected=ready)
    print("\n".join(end_lines(settings.kind, reason, controller.counts)), flush=True)
    return EXIT_OK if reason != "no connection to the rig" else EXIT_FAULT


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def cmd_demo_modbus(args: argparse.Namespace, load: Callable[[str], Any]) -> int:
    """Rig (the Modbus server) and the reference controller (the client), in real time."""
    from plantrig._hil import demo_result, reap, wait_ready
    from plantrig.io import build_link
    from plantrig.sim import run_to_folder

    show_caution()
    rig = load(args.rig or str(DEMO_RIG))
    found = rig.link.kind if rig.link else None
    if found != "modbus":
        print(f"error: {rig.path}: link.kind: expected 'modbus' for demo --modbus, found "
              f"{found!r}", file=sys.stderr)
        return EXIT_USAGE
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    where = f"127.0.0.1:{free_port()}"
    link = build_link(rig, port=where)
    link.open()       # the server listens before the controller connects
    proc = subprocess.Popen([sys.executable, "-m", "plantrig", "controller", str(rig.path),
                             "--port", where], stdout=subprocess.PIPE, text=True,
                            env=shown_env())
    try:
        ready = wait_ready(proc, READY_TIMEOUT_S)
        if ready is None:
            print("error: the reference controller did not connect", file=sys.stderr)
            link.close()
            return EXIT_FAULT
        print(f"{ready} (pid {proc.pid})")
        print(f"rig: {rig.name}, {1 / rig.tick:g} Hz for {rig.duration:g} s in real time, "
              f"Modbus TCP server on {where}")
        folder, outcome, summary = run_to_folder(rig, out, realtime=True, link=link)
    finally:
        reap(proc, 10.0)   # the controller ends when the rig's server closes
    return demo_result(proc, folder, outcome, summary)
