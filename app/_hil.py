"""Command-line parts for a controller on a link: `plantrig controller` and `plantrig demo`.

`controller` runs the reference controller (plantrig.io) against a rig over its link.
`demo` is the whole bench on one machine: a pty pair stands in for the cable, the
reference controller runs on one end as a separate process, and the rig runs in real
time on the other; the run folder, the link health and the timing are printed at the end.
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import select
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from plantrig import CAUTION, show_caution, shown_env
from plantrig._console import print_outcome
from plantrig.configs import CONFIGS
from plantrig.sim import EXIT_CODE_HELP

EXIT_OK, EXIT_FAULT, EXIT_USAGE = 0, 1, 2
DEMO_RIG = CONFIGS / "conveyor_hil.toml"
READY_TIMEOUT_S = 20.0
READY_WORD = "controller: ready"


def link_settings(rig: Any) -> Any:
    """The checked [link] settings of a rig already loaded (and checked) by the CLI."""
    settings = rig.link
    if settings is None:
        print(f"error: {rig.path}: link: missing table (the controller is on a link)",
              file=sys.stderr)
        raise SystemExit(EXIT_USAGE)
    return settings


def cmd_controller(args: argparse.Namespace, load: Callable[[str], Any]) -> int:
    """Serve the rig's link with the reference controller until the far end closes."""
    from plantrig.io import (
        TRANSPORTS,
        ReferenceController,
        end_lines,
        prefer_realtime,
        run_controller,
    )
    from plantrig.sim import RigFileError

    show_caution()
    rig = load(args.rig)
    settings = link_settings(rig)
    try:
        controller = ReferenceController(rig, settings)
    except RigFileError as exc:
        for issue in exc.issues:
            print(f"error: {issue}", file=sys.stderr)
        return EXIT_USAGE
    if settings.kind == "modbus":  # the controller polls: plantrig._modbus_cli
        from plantrig._modbus_cli import run_modbus_controller_cli
        return run_modbus_controller_cli(args, rig, settings, controller, READY_WORD)
    if settings.kind == "mqtt":  # message-based: its own loop (plantrig._mqtt_cli)
        from plantrig._mqtt_cli import run_mqtt_controller
        return run_mqtt_controller(args, rig, settings, controller, READY_WORD)
    if settings.kind not in TRANSPORTS:
        print(f"error: the reference controller has no transport for link kind "
              f"{settings.kind!r}", file=sys.stderr)
        return EXIT_USAGE
    try:
        transport = TRANSPORTS[settings.kind](settings, args.port)
    except (OSError, ValueError) as exc:
        print(f"error: cannot open {args.port or 'the link'}: {exc}", file=sys.stderr)
        return EXIT_FAULT
    stopping = []
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: stopping.append(True))
    scheduler = prefer_realtime() if not args.no_realtime else "SCHED_OTHER"
    print(f"{READY_WORD} on {transport.name} ({settings.protocol}, "
          f"{controller.law.__class__.__name__}, {scheduler})", flush=True)
    try:
        reason = run_controller(controller, transport, stop=lambda: bool(stopping))
    finally:
        transport.close()
    print("\n".join(end_lines(settings.kind, reason, controller.counts)), flush=True)
    return EXIT_OK


def wait_ready(proc: subprocess.Popen[str], timeout: float) -> str | None:
    """The controller's ready line, or None if it exited or said nothing in time."""
    assert proc.stdout is not None
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        ready, _, _ = select.select([proc.stdout], [], [], 0.1)
        if ready:
            line = proc.stdout.readline()
            if not line:
                return None
            if line.startswith(READY_WORD):
                return line.strip()
        elif proc.poll() is not None:
            return None
    return None


def reap(proc: subprocess.Popen[str], wait_s: float = 5.0) -> None:
    """Wait for a demo's controller to end by itself (it does once the rig closes its
    end), and stop it if it does not."""
    try:
        proc.wait(timeout=wait_s)
    except subprocess.TimeoutExpired:
        proc.terminate()
        proc.wait(timeout=5)


def demo_result(proc: subprocess.Popen[str], folder: Path, outcome: Any,
                summary: dict[str, Any]) -> int:
    """The end of every demo: what the controller said, the run's outcome and one
    verdict line; returns the run's exit code."""
    assert proc.stdout is not None
    for line in proc.stdout.read().splitlines():
        print(line)
    print_outcome(folder, summary)
    code = int(summary["exit_code"])
    print("demo: ok" if code == EXIT_OK else
          f"demo: not completed ({outcome.ended}: {outcome.reason}); exit code {code}")
    return code


def controller_command(rig_path: str | Path, port: str) -> list[str]:
    """The command line that starts the reference controller in its own process."""
    return [sys.executable, "-m", "plantrig", "controller", str(rig_path), "--port", port]


class ControllerDidNotStart(RuntimeError):
    """The reference controller process said nothing ready in time."""


@contextlib.contextmanager
def reference_controller_on_pty(rig: Any) -> Iterator[tuple[Any, subprocess.Popen[str], str]]:
    """The reference controller in its own process on one end of a pty pair: yields the
    rig's end (a byte port for build_link), the process and its ready line. On leaving,
    the rig's end closes, which ends the controller."""
    from plantrig.io import FdPort, open_pty_pair

    pair = open_pty_pair()
    proc = subprocess.Popen(controller_command(rig.path, pair.slave_path),
                            stdout=subprocess.PIPE, text=True, env=shown_env())
    try:
        ready = wait_ready(proc, READY_TIMEOUT_S)
        if ready is None:
            raise ControllerDidNotStart("the reference controller did not start")
        # from here the controller's end is the only one open: if it goes, we see it
        pair.close_slave()
        yield FdPort(pair.master_fd, name=f"pty {pair.slave_path}", owns_fd=False), proc, ready
    finally:
        pair.close_slave()
        pair.close_master()
        reap(proc)


def fast_rehearsal(rig: Any) -> Any:
    """The rig for `run --fast` of a bench rig: its link in lockstep with the reference
    controller running [link.controller] over a pty, so the rehearsal uses the bench's
    law. Raises ValueError saying why it cannot."""
    link = rig.link
    if link is None or link.controller is None:
        raise ValueError("a fast run of a rig whose controller is external needs the law "
                         "to rehearse with ([link.controller]), or --port to a controller "
                         "that answers in lockstep")
    return dataclasses.replace(rig, mode="fast", link=dataclasses.replace(link, lockstep=True))


def cmd_demo(args: argparse.Namespace, load: Callable[[str], Any]) -> int:
    """Rig and reference controller over a pty pair, in real time; 0 if all went well."""
    from plantrig.io import build_link
    from plantrig.sim import run_to_folder

    if args.modbus:
        from plantrig._modbus_cli import cmd_demo_modbus
        return cmd_demo_modbus(args, load)
    if args.mqtt:
        from plantrig._mqtt_cli import cmd_demo_mqtt
        return cmd_demo_mqtt(args, load)
    show_caution()
    rig = load(args.rig or str(DEMO_RIG))
    link_settings(rig)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    try:
        with reference_controller_on_pty(rig) as (port, proc, ready):
            print(f"{ready} (pid {proc.pid})")
            link = build_link(rig, port=port)
            print(f"rig: {rig.name}, {1 / rig.tick:g} Hz for {rig.duration:g} s in real time "
                  f"over {port.name}")
            folder, outcome, summary = run_to_folder(rig, out, realtime=True, link=link)
    except ControllerDidNotStart as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_FAULT
    return demo_result(proc, folder, outcome, summary)


def add_parsers(sub: Any, load: Callable[[str], Any]) -> None:
    """Add `controller` and `demo` to the CLI's subcommands."""
    p = sub.add_parser("controller",
                       description="Answer the rig's sensor frames with the law in "
                                   "[link.controller], until the far end closes.",
                       epilog="exit codes:\n  0  the far end closed or a signal stopped it\n"
                              "  1  the port could not be opened\n"
                              "  2  rig file mistake or no transport for the link kind\n\n"
                              + CAUTION,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("rig", help="rig file (TOML) with a [link] table")
    p.add_argument("--port", help="device path or pyserial URL (overrides link.port); "
                                  "MQTT and Modbus TCP: PORT or HOST:PORT")
    p.add_argument("--no-realtime", action="store_true",
                   help="do not ask for SCHED_FIFO")
    p.set_defaults(func=lambda a: cmd_controller(a, load))

    p = sub.add_parser("demo",
                       description="Run a rig in real time against the reference controller "
                                   "in another process, over a pseudo-terminal pair. The exit "
                                   "code is the run's outcome, as for `plantrig run`.",
                       epilog=f"{EXIT_CODE_HELP}\n\n{CAUTION}",
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--rig", help=f"rig file (default: {DEMO_RIG.name}, or "
                                 "conveyor_mqtt.toml with --mqtt, conveyor_modbus.toml "
                                 "with --modbus)")
    p.add_argument("--out", default="runs", help="folder for run folders (default: runs)")
    p.add_argument("--mqtt", action="store_true",
                   help="through a local mosquitto it starts on a free loopback port, "
                        "instead of a pty pair")
    p.add_argument("--modbus", action="store_true",
                   help="over Modbus TCP on a free loopback port: the rig is the server, "
                        "the reference controller polls it as a PLC would")
    p.set_defaults(func=lambda a: cmd_demo(a, load))
