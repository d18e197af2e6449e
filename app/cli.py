"""The plantrig command line: the composition root that joins sim, io and gui.

Exit codes: each command lists its own in --help; `run` and `demo` give the outcome
class of the run (plantrig.sim.EXIT_CODE_HELP), 2 is always a rig file or usage mistake.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import signal
import sys
from importlib import import_module
from pathlib import Path
from typing import TYPE_CHECKING, Any

from plantrig import CAUTION, __version__, show_caution

if TYPE_CHECKING:
    from plantrig.sim import Rig, RigFileError

    Subcommands = argparse._SubParsersAction[argparse.ArgumentParser]

EXIT_OK, EXIT_FAULT, EXIT_USAGE, EXIT_VERDICT, EXIT_STOPPED = 0, 1, 2, 3, 5
MIN_TEST_S = 0.1          # the shortest --bench pacing test that says anything
EXIT_CLOSED_PIPE = 141   # 128 + SIGPIPE, what shell tools give when their reader quits
EXIT_MEANINGS = {0: "completed", 1: "fault", 2: "usage mistake", 3: "a verdict failed",
                 4: "tripped", 5: "stopped", 6: "interrupted"}


def _load(path: str, overrides: list[str] | None = None, trust_model: bool = False) -> Rig:
    from plantrig._model_trust import model_guard
    from plantrig.sim import RigFileError, load_rig_with_overrides

    if _not_a_rig(path):
        raise SystemExit(EXIT_USAGE)
    refusal = model_guard(path, overrides=overrides or (), trust=trust_model)
    if refusal:
        print(f"error: {path}: {refusal}. replay, verify, report and export read a run "
              "folder without running it", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)
    try:
        return load_rig_with_overrides(path, overrides or ())
    except RigFileError as exc:
        _print_issues(path, exc)
        raise SystemExit(EXIT_USAGE) from None


def _print_issues(path: str, exc: RigFileError) -> None:
    for issue in exc.issues:
        print(f"error: {issue}", file=sys.stderr)
    count = len(exc.issues)
    print(f"{path}: {count} mistake{'s' if count != 1 else ''}; nothing was run",
          file=sys.stderr)


def _not_a_rig(path: str) -> bool:
    """True (after saying so) when ``path`` is a scenario or campaign file given where a
    rig is due (the rig checker would list a dozen mistakes that miss the point)."""
    import tomllib

    try:
        doc = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError):
        return False   # the rig checker says what is wrong with it
    if "rig" in doc:
        return False
    if "scenario" in doc:
        print(f"error: {path} is a scenario file, not a rig file; check it against the rig "
              f"it rehearses: plantrig check RIG --scenario {path}", file=sys.stderr)
        return True
    if "campaign" in doc:
        print(f"error: {path} is a campaign file, not a rig file; run it with: "
              f"plantrig campaign {path}", file=sys.stderr)
        return True
    return False


def cmd_check(args: argparse.Namespace) -> int:
    from plantrig.sim import RigFileError, summarize

    rig = _load(args.rig, trust_model=args.trust_model)
    model = summarize(rig.plant, rig.tick, rig.x0, rig.method, rig.substeps)
    print(f"{rig.path}: ok")
    print(f"rig: {rig.name} — {rig.description}" if rig.description else f"rig: {rig.name}")
    print(f"tick: {rig.tick:g} s ({1 / rig.tick:g} Hz), duration {rig.duration:g} s "
          f"({rig.n_ticks} ticks), mode {rig.mode}, on overrun: {rig.on_overrun}")
    for line in model.lines():
        print(line)
    for group, signals in (("states", rig.states), ("inputs", rig.inputs),
                           ("outputs", rig.outputs)):
        print(f"{group}: " + ", ".join(f"{s.name} [{s.unit}]" for s in signals))
    print(f"controller: {rig.controller.kind}; references: "
          + (", ".join(r.name for r in rig.references) or "none"))
    for line in _safety_lines(rig):
        print(line)
    if args.scenario:
        from plantrig.sim import load_scenario
        try:
            scenario = load_scenario(args.scenario, rig)
        except RigFileError as exc:
            _print_issues(args.scenario, exc)
            return EXIT_USAGE
        print(f"scenario: {scenario.name}: {len(scenario.steps)} step(s), "
              f"{len(scenario.verdicts)} verdict(s); {args.scenario}: ok")
    if args.bench:
        from plantrig._readiness_cli import bench_report
        return bench_report(rig, args.seconds)
    return EXIT_OK


def _safety_lines(rig: Any) -> list[str]:
    """Link, limits, interlocks and acceptance rules of a checked rig, one line each."""
    lines = []
    if rig.link is not None:
        lines.append(f"link: {rig.link.kind} {rig.link.where}".rstrip())
    for lim in rig.limits:
        low, high = math.isfinite(lim.trip_low), math.isfinite(lim.trip_high)
        where = (f"outside {lim.trip_low:g} .. {lim.trip_high:g}" if low and high else
                 f"below {lim.trip_low:g}" if low else f"above {lim.trip_high:g}" if high
                 else "never (warns only)")
        lines.append(f"limit: {lim.name} on {lim.column}, trips {where} {lim.unit}".rstrip())
    for spec in rig.interlocks:
        lines.append(f"interlock: {spec.name} on {', '.join(spec.on)} -> {spec.action}")
    a = rig.acceptance
    lines.append(f"acceptance: controller answers >= {a.min_answered:.0%} of ticks, link "
                 f"{'may be lost' if a.allow_link_loss else 'never lost'}, late ticks <= "
                 f"{a.max_late:.0%}, allowed trips: {', '.join(a.allowed_trips) or 'none'}")
    return lines


def cmd_run(args: argparse.Namespace) -> int:
    from plantrig._catalogue import index_run
    from plantrig._console import print_outcome
    from plantrig._override_options import overrides_of
    from plantrig._progress import RunProgress, both
    from plantrig.sim import RecordError, RigFileError, build_chains, run_to_folder

    rig = _load(args.rig, overrides_of(args), trust_model=args.trust_model)
    scenario = None
    if args.scenario:
        from plantrig.sim import load_scenario
        try:
            scenario = load_scenario(args.scenario, rig)
        except RigFileError as exc:
            for issue in exc.issues:
                print(f"error: {issue}", file=sys.stderr)
            print(f"{args.scenario}: {len(exc.issues)} mistake(s); nothing was run",
                  file=sys.stderr)
            return EXIT_USAGE
    realtime = True if args.realtime else False if args.fast else None
    show_caution()
    out = Path(args.out)
    problem = _outputs_problem(out, args.junit)
    if problem:
        print(f"error: {problem}", file=sys.stderr)
        return EXIT_USAGE
    dashboard = _open_dashboard(rig, out) if args.gui else None
    if args.gui and dashboard is None:
        return EXIT_USAGE
    fast = not (realtime or (realtime is None and rig.mode == "realtime"))
    # a serial bench rig run fast gets the bench's law in lockstep over a pty; an MQTT or
    # Modbus rig talks to whatever controller serves its broker or server, as on the bench
    rehearse = (fast and rig.controller.kind == "external" and args.port is None
                and rig.link is not None and rig.link.kind == "serial")
    if rehearse:
        from plantrig._hil import fast_rehearsal
        try:
            rig = fast_rehearsal(rig)
        except ValueError as exc:
            print(f"error: {args.rig}: {exc}", file=sys.stderr)
            return EXIT_USAGE
    progress = RunProgress(rig.n_ticks) if fast else None
    dashboard_args = {"commands": dashboard.commands} if dashboard else {}
    dashboard_args["on_tapes_ready"] = both(dashboard.on_tapes_ready if dashboard else None,
                                            progress.on_tapes_ready if progress else None)
    bench = contextlib.ExitStack()
    try:
        actuator_chain, sensor_chain = build_chains(rig)
        link = None
        if rig.controller.kind == "external":
            from plantrig.io import build_link
            port = args.port
            if rehearse:
                from plantrig._hil import reference_controller_on_pty
                port, _proc, ready = bench.enter_context(reference_controller_on_pty(rig))
                print(f"{ready}; rehearsing in lockstep (fast mode)", file=sys.stderr)
            link = build_link(rig, port=port)
    except RigFileError as exc:
        bench.close()
        _print_issues(args.rig, exc)
        return EXIT_USAGE
    except ValueError as exc:     # a --port the link cannot use: nothing has started
        bench.close()
        print(f"error: --port {args.port}: {exc}; nothing was run", file=sys.stderr)
        return EXIT_USAGE
    except RuntimeError as exc:   # the reference controller did not start
        bench.close()
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_FAULT
    try:
        folder, _outcome, summary = run_to_folder(rig, out, realtime=realtime,
                                                  **dashboard_args,
                                                  actuator_chain=actuator_chain,
                                                  sensor_chain=sensor_chain, link=link,
                                                  scenario=scenario,
                                                  run_info=_dut_info(rig, args),
                                                  npy=args.npy)
    except RecordError as exc:  # preflight, or a record that could not be finished
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    finally:
        bench.close()
        if progress is not None:
            progress.close()
    code = int(summary["exit_code"])
    index_run(out, folder, summary)
    if args.junit and not _write_junit(args.junit, rig.name, scenario, summary) and not code:
        code = EXIT_FAULT   # the run passed, but CI would not see it
    # with --json the summary alone goes to stdout; the text a person reads to stderr
    with contextlib.redirect_stdout(sys.stderr) if args.json else contextlib.nullcontext():
        print_outcome(folder, summary, scenario.name if scenario is not None else None)
        print(f"exit code {code}: {EXIT_MEANINGS[code]}")
    if args.json:
        print(json.dumps({"folder": str(folder), "exit_code": code, **summary}))
    if dashboard is not None:
        if summary["reason"].startswith("signal "):
            dashboard.close()
        else:
            problem = dashboard.after_run(folder)
            if problem:   # the window is not the run: the exit code stays the run's
                print(f"warning: the dashboard window failed: {problem}; exit code {code} "
                      f"is the run's; look again with: plantrig replay {folder}",
                      file=sys.stderr)
    return code


def _outputs_problem(out: Path, junit: str | None) -> str:
    """Why the run's outputs cannot be written, or "": the runs folder is made, and a
    --junit path checked before the run, so that a run that passes is never reported
    as a fault for want of its report file."""
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        return f"cannot create run folder parent {out}: {exc.strerror}"
    if not junit:
        return ""
    path = Path(junit)
    if path.is_dir():
        why = "is a folder"
    elif not path.parent.is_dir():
        why = f"no folder {path.parent}"
    elif not os.access(path if path.exists() else path.parent, os.W_OK):
        why = "not writable"
    else:
        return ""
    return f"--junit {junit}: {why}; nothing was run"


def _write_junit(path: str, rig_name: str, scenario: Any, summary: dict[str, Any]) -> bool:
    """run --junit: this rehearsal as one JUnit test case (the form campaigns write)."""
    from plantrig._junit import judged_case, write_junit
    name = scenario.name if scenario is not None else rig_name
    failed_rules = [r for r in summary.get("acceptance", []) if r["passed"] is False]
    case = judged_case(rig_name, f"{rig_name}.{name}", name, summary["timing"]["wall_s"],
                       summary["ended"], summary["reason"], summary.get("verdicts", []),
                       output="\n".join(f"acceptance FAILED {r['rule']}: {r['measured']}"
                                        for r in failed_rules))
    try:
        write_junit(Path(path), f"plantrig run {rig_name}", [case])
    except OSError as exc:
        print(f"error: cannot write {path}: {exc.strerror}", file=sys.stderr)
        return False
    print(f"junit: {path}")
    return True


def _dut_info(rig: Any, args: argparse.Namespace) -> dict[str, Any] | None:
    """The device under test: the rig file's [dut], with --dut / --firmware winning."""
    dut = rig.dut.with_overrides(args.dut, args.firmware)
    return {"dut": dut.as_dict()} if dut.named else None


def _open_dashboard(rig: Any, out: Path) -> Any:
    """The dashboard for ``run --gui``, imported only then; None after a message."""
    try:
        from plantrig.gui import NO_DISPLAY, LiveDashboard, display_available
    except ImportError as exc:
        print(f"error: --gui needs dearpygui ({exc}); install plantrig[gui]", file=sys.stderr)
        return None
    if not display_available():
        print(f"error: {NO_DISPLAY}", file=sys.stderr)
        return None
    return LiveDashboard(rig.path, runs=out)


def cmd_replay(args: argparse.Namespace) -> int:
    try:
        from plantrig.gui import replay
    except ImportError as exc:
        print(f"error: replay needs dearpygui ({exc}); install plantrig[gui]", file=sys.stderr)
        return EXIT_USAGE
    return replay(args.folder, screenshot=args.screenshot)


def _test_seconds(text: str) -> float:
    """--seconds: a pacing test long enough to say anything (a test of 0 s paced one
    tick and said the rate held)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of seconds, found {text!r}") \
            from None
    if not value >= MIN_TEST_S or math.isinf(value):
        raise argparse.ArgumentTypeError(f"expected at least {MIN_TEST_S:g} s, found {text}")
    return value


def add_check(sub: Subcommands) -> None:
    from plantrig._model_trust import TRUST_HELP

    p = sub.add_parser("check",
                       description="Check a rig file (every mistake at once) and print the "
                                   "model summary: modes, stability, ranks, tick warnings. "
                                   "An ODE plant's module is Python code and is imported "
                                   "(its path and SHA-256 are printed first). Exit codes: "
                                   "0 the rig file is sound (with --bench: and this machine "
                                   "holds its rate), 1 with --bench: the rate does not hold "
                                   "here, 2 a mistake in it, or a model "
                                   "module that came with a run folder (see --trust-model); "
                                   "141 the reader closed the pipe before the summary was "
                                   "written (plantrig check RIG | head), as shell tools do.")
    p.add_argument("rig", help="rig file (TOML)")
    p.add_argument("--trust-model", action="store_true", help=TRUST_HELP)
    p.add_argument("--scenario", metavar="FILE",
                   help="also check a scenario file against this rig (nothing is run)")
    p.add_argument("--bench", action="store_true",
                   help="also judge whether this machine holds the rig's rate: what decides "
                        "it here, a short pacing test at the rig's tick, the largest rate "
                        "that would hold (exit code 1 when the rate does not hold)")
    p.add_argument("--seconds", type=_test_seconds, default=2.0,
                   help="length of the --bench pacing test (default 2; at least 0.1)")
    p.set_defaults(func=cmd_check)


def add_run(sub: Subcommands) -> None:
    from plantrig._model_trust import TRUST_HELP
    from plantrig._override_options import add_override_options
    from plantrig.sim import EXIT_CODE_HELP

    p = sub.add_parser("run",
                       description="Run a rig closed-loop and write a run folder with the "
                                   "tick data, a copy of the rig file and a summary. The run "
                                   "ends as one outcome: completed, stopped, tripped or "
                                   "fault, judged by the rig's [acceptance] rules "
                                   "(docs/records.md). SIGINT (Ctrl-C) and SIGTERM stop it "
                                   "at the next tick and finish the record.",
                       epilog=f"{EXIT_CODE_HELP}\n\n{CAUTION}",
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("rig", help="rig file (TOML)")
    mode = p.add_mutually_exclusive_group()
    mode.add_argument("--fast", action="store_true", help="as fast as possible (overrides rig)")
    mode.add_argument("--realtime", action="store_true",
                      help="paced to the wall clock (overrides rig)")
    p.add_argument("--out", default="runs", help="folder for run folders (default: runs)")
    p.add_argument("--json", action="store_true",
                   help="print the run's summary as one JSON object on stdout (with the run "
                        "folder and exit code); the text for people goes to stderr")
    p.add_argument("--npy", action="store_true",
                   help="also write ticks.npy beside run.h5 (numpy only, for scripts)")
    p.add_argument("--gui", action="store_true",
                   help="open the live dashboard (needs dearpygui and a display); a "
                        "window that fails is reported on stderr and leaves the exit code "
                        "the run's")
    p.add_argument("--port", help="where the controller is (overrides link.port)")
    p.add_argument("--scenario", metavar="FILE",
                   help="rehearse a scenario file (TOML): its steps fire during the run, "
                        "its verdicts are judged after it; exit code 3 if one fails")
    p.add_argument("--junit", metavar="OUT.xml",
                   help="also write the result as JUnit XML (one test case), as campaigns do")
    p.add_argument("--dut", metavar="NAME",
                   help="the device under test (overrides the rig file's dut.name); "
                        "recorded in the run folder and the report")
    p.add_argument("--firmware", metavar="VERSION",
                   help="its firmware version (overrides dut.firmware); recorded likewise")
    p.add_argument("--trust-model", action="store_true", help=TRUST_HELP)
    add_override_options(p)
    p.set_defaults(func=cmd_run)


def add_replay(sub: Subcommands) -> None:
    p = sub.add_parser("replay",
                       description="Open a recorded run folder in the dashboard, with a "
                                   "time slider (needs dearpygui and a display). Reads "
                                   "data only: a model module in the folder is never "
                                   "imported. Exit codes: 0 the window was closed (or the "
                                   "screenshot saved), 1 the window failed, 2 not a "
                                   "readable run folder, no display or no dearpygui.")
    p.add_argument("folder", help="run folder written by plantrig run")
    p.add_argument("--screenshot", metavar="PNG",
                   help="draw the run once, save the window as a PNG and exit")
    p.set_defaults(func=cmd_replay)


def add_link_commands(sub: Subcommands) -> None:
    from plantrig._hil import add_parsers
    add_parsers(sub, _load)


RECORDS = "plantrig._records_cli:add_record_commands"
LINK = "plantrig.cli:add_link_commands"
# Every command: the line `plantrig --help` shows for it (its only home) and the
# "module:function" that adds its full parser (a function may add a group of commands).
# main() imports only the module of the command typed, so `plantrig --help` and
# `plantrig check` load nothing that other commands need (h5py, matplotlib, Dask,
# pymodbus, aiomqtt...); bench/bench_imports.py measures the start-up.
COMMANDS: dict[str, tuple[str, str]] = {
    "new": ("write a commented starter rig file", "plantrig._new_cli:add_parser"),
    "check": ("check a rig file and print the model summary", "plantrig.cli:add_check"),
    "run": ("run a rig and write a run folder", "plantrig.cli:add_run"),
    "recover": ("rebuild the record of a run that died", RECORDS),
    "verify": ("check a run folder against its manifest", RECORDS),
    "keygen": ("make an Ed25519 key pair for signing run folders", RECORDS),
    "sign": ("sign a run folder's manifest (Ed25519)", RECORDS),
    "report": ("write report.html and report.pdf for a run", RECORDS),
    "export": ("export a run as CSV and/or MATLAB .mat", RECORDS),
    "replay": ("open a run folder in the dashboard", "plantrig.cli:add_replay"),
    "controller": ("run the reference controller on a rig's link", LINK),
    "demo": ("rig and reference controller over a pty, in real time", LINK),
    "compare": ("compare two run folders signal by signal", "plantrig._compare_cli:add_parser"),
    "plot": ("draw chosen signals of a run to a PNG or SVG", "plantrig._plot_cli:add_parser"),
    "campaign": ("run many rehearsals (a campaign file) on Dask",
                 "plantrig._campaign_cli:add_parser"),
    "runs": ("list the run and campaign folders in a runs folder",
             "plantrig._catalogue:add_parser"),
    "rerun": ("re-simulate a run folder with its recorded commands (what-if)",
              "plantrig._rerun_cli:add_parser"),
}


class Commands(argparse._SubParsersAction):  # type: ignore[type-arg]
    """The subcommands' action: each parser gets its line of help from COMMANDS."""

    def add_parser(self, name: str, **kwargs: Any) -> argparse.ArgumentParser:
        kwargs.setdefault("help", COMMANDS[name][0])
        return super().add_parser(name, **kwargs)


def _add_full(sub: Subcommands, name: str) -> None:
    module, function = COMMANDS[name][1].split(":")
    getattr(import_module(module), function)(sub)


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The command line, every command's parser in full; with ``only`` (the word typed
    after plantrig, perhaps none or a typo) just that command's, the others a name and
    its line of help, which is all their listing in `plantrig --help` needs."""
    parser = argparse.ArgumentParser(
        prog="plantrig", description="A virtual plant on the controller test bench.",
        epilog=CAUTION)
    parser.add_argument("--version", action="version", version=f"plantrig {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND",
                                action=Commands)
    if only in COMMANDS:
        _add_full(sub, only)
    for name in COMMANDS:
        if name not in sub.choices:
            if only is None:
                _add_full(sub, name)
            else:
                sub.add_parser(name)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    # the first word that is not an option names the command (plantrig's own options,
    # --help and --version, take no value)
    parser = build_parser(only=next((a for a in argv if not a.startswith("-")), ""))
    args = parser.parse_args(argv)
    # outside a run, SIGTERM is treated as Ctrl-C: stop quietly (a run installs its own
    # graceful handlers, plantrig.sim.run_to_folder)
    signal.signal(signal.SIGTERM, signal.default_int_handler)
    code: int | None = None
    try:
        code = int(args.func(args))
        sys.stdout.flush()   # a reader that went away shows here, not at interpreter exit
    except KeyboardInterrupt:
        print("plantrig: stopped by a signal", file=sys.stderr)
        return EXIT_STOPPED
    except BrokenPipeError:   # plantrig check RIG | head: the reader has what it wanted
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
    return EXIT_CLOSED_PIPE if code is None else code


if __name__ == "__main__":
    sys.exit(main())
