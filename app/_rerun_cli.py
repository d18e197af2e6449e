"""``plantrig rerun FOLDER``: re-simulate a recorded run with its recorded commands."""

from __future__ import annotations

import argparse
import dataclasses
import hashlib
import sys
from pathlib import Path
from typing import Any

from plantrig._override_options import add_override_options, overrides_of
from plantrig.sim import EXIT_CODE_HELP, RecordError, RigFileError, model_module, run_folder_of

EXIT_USAGE = 2


def add_parser(sub: Any, print_outcome: Any) -> None:
    p = sub.add_parser(
        "rerun", help="re-simulate a run folder with its recorded commands (what-if)",
        description="Re-run a recorded run in fast mode: the plant gets the controller's "
                    "commands exactly as recorded at each tick (after the link, before the "
                    "actuator chain, with their freshness), the scenario's steps, the "
                    "operator's stop, E-stop, reset and phase commands and the link's "
                    "watchdog events at their ticks, and the recorded seed. With the rig "
                    "unchanged the states, outputs, inputs and sensor values equal the "
                    "recording bit for bit; --plant and --set ask what the same commands "
                    "do to a changed plant. Writes a normal run folder (its summary says "
                    "what it re-ran and with which changes); compare it with the original "
                    "by plantrig compare. docs/compare.md.",
        epilog=f"{EXIT_CODE_HELP}\n  2 also: not a run folder, a record a rerun cannot "
               "reproduce exactly (the message says why), a model module that came with "
               "the folder without --trust-model",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("folder", help="run folder written by plantrig run")
    p.add_argument("--plant", metavar="FILE",
                   help="use the [plant] table of FILE (a rig file) instead of the "
                        "recorded one")
    add_override_options(p)
    p.add_argument("--out", default="runs", help="folder for run folders (default: runs)")
    p.add_argument("--trust-model", action="store_true",
                   help="import the model module that came with the run folder (someone "
                        "else's code: read it first)")
    p.set_defaults(func=lambda args: cmd_rerun(args, print_outcome))


def _untrusted_module(args: argparse.Namespace) -> str | None:
    """Why the rerun would import code that came with the folder, or None."""
    if args.plant:
        module = model_module(args.plant)
        if module is None or run_folder_of(module) is None:
            return None
    else:
        try:
            module = model_module(Path(args.folder) / "rig.toml")
        except RigFileError:
            return None       # plan_rerun reports the mistake
    if module is None or not module.is_file():
        return None
    digest = hashlib.sha256(module.read_bytes()).hexdigest()
    record = run_folder_of(module)
    if record is not None and not args.trust_model:
        return (f"plant.module: {module} (SHA-256 {digest}) came with the run folder "
                f"{record}; a rerun imports and runs that code. Read it, then pass "
                "--trust-model to rerun anyway (or --plant FILE with your own model)")
    print(f"loading model module {module} (SHA-256 {digest}): this runs its code")
    return None


def cmd_rerun(args: argparse.Namespace, print_outcome: Any) -> int:
    from plantrig._compose import build_chains
    from plantrig.sim import load_scenario, run_to_folder
    from plantrig.sim._rerun import RerunError, plan_rerun

    if not Path(args.folder).is_dir():
        print(f"error: {args.folder}: not a folder", file=sys.stderr)
        return EXIT_USAGE
    refusal = _untrusted_module(args)
    if refusal:
        print(f"error: {args.folder}: {refusal}", file=sys.stderr)
        return EXIT_USAGE
    try:
        plan = plan_rerun(args.folder, overrides=overrides_of(args), plant_file=args.plant)
        scenario = None
        if plan.scenario_path is not None:
            scenario = load_scenario(plan.scenario_path, plan.rig)
            if scenario.duration is not None and scenario.duration > plan.recorded_s:
                scenario = dataclasses.replace(scenario, duration=plan.recorded_s)
        actuator_chain, sensor_chain = build_chains(plan.rig)
    except RigFileError as exc:
        for issue in exc.issues:
            print(f"error: {issue}", file=sys.stderr)
        print(f"{args.folder}: {len(exc.issues)} mistake(s); nothing was run", file=sys.stderr)
        return EXIT_USAGE
    except RerunError as exc:
        print(f"error: {exc}; nothing was run", file=sys.stderr)
        return EXIT_USAGE
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    try:
        folder, _outcome, summary = run_to_folder(
            plan.rig, out, realtime=False, link=plan.link, actuator_chain=actuator_chain,
            sensor_chain=sensor_chain, scenario=scenario, commands=plan.operator,
            about=plan.about)
    except RecordError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    rerun = plan.about["rerun"]
    print(f"rerun of: {rerun['of']}")
    print("changes: " + ("; ".join(rerun["changes"]) or "none (bit for bit expected)"))
    print_outcome(folder, summary)
    code = int(summary["exit_code"])
    print(f"exit code {code}; compare with: plantrig compare {rerun['of']} {folder}")
    return code
