"""``plantrig rerun FOLDER``: re-simulate a recorded run with its recorded commands."""

from __future__ import annotations

import argparse
import dataclasses
import sys
from pathlib import Path
from typing import Any

from plantrig._console import print_outcome
from plantrig._model_trust import TRUST_HELP, model_guard, model_to_load
from plantrig._override_options import add_override_options, overrides_of
from plantrig.sim import EXIT_CODE_HELP, RecordError, RigFileError, verify_problem

EXIT_NOT_INTACT, EXIT_USAGE = 1, 2      # 1 as report and export: a folder fails verify


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "rerun",
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
        epilog=f"{EXIT_CODE_HELP}\n  1 also: the folder fails plantrig verify (a file "
               "changed, missing or added, a damaged\n     manifest or a malformed "
               "signature; its model module is judged by --trust-model\n     and "
               "--public-key instead): nothing was run, as report and export refuse it"
               "\n  2 also: not a run folder, a record a rerun cannot "
               "reproduce exactly (the message says why), a model module that came with "
               "the folder and is not vouched for (changed since the run, not listed in "
               "the manifest, an unsigned folder, or a signature that does not verify "
               "with --public-key) without --trust-model. docs/security.md",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("folder", help="run folder written by plantrig run")
    p.add_argument("--plant", metavar="FILE",
                   help="use the [plant] table of FILE (a rig file) instead of the "
                        "recorded one")
    add_override_options(p)
    p.add_argument("--out", default="runs", help="folder for run folders (default: runs)")
    p.add_argument("--trust-model", action="store_true", help=TRUST_HELP)
    p.add_argument("--public-key", metavar="FILE",
                   help="Ed25519 public key (PEM) of someone you trust: a model module of "
                        "a folder signed with it is imported when its SHA-256 is the one "
                        "the signed manifest lists")
    p.set_defaults(func=cmd_rerun)


def _untrusted_module(args: argparse.Namespace) -> str | None:
    """Print the model module the rerun imports; why it must not, or None."""
    if args.plant:
        return model_guard(args.plant, trust=args.trust_model, public_key=args.public_key)
    return model_guard(Path(args.folder) / "rig.toml", overrides=overrides_of(args),
                       trust=args.trust_model, public_key=args.public_key,
                       from_folder=Path(args.folder))


def _folder_module(folder: Path) -> frozenset[str]:
    """The model module the folder's rig.toml names, as a path inside the folder (none
    when it names none or one outside)."""
    module = model_to_load(folder / "rig.toml")
    if module is None or not module.is_relative_to(folder.resolve()):
        return frozenset()
    return frozenset([module.relative_to(folder.resolve()).as_posix()])


def cmd_rerun(args: argparse.Namespace) -> int:
    from plantrig.sim import (
        RerunError,
        build_chains,
        load_scenario,
        plan_rerun,
        run_to_folder,
    )

    if not Path(args.folder).is_dir():
        print(f"error: {args.folder}: not a folder", file=sys.stderr)
        return EXIT_USAGE
    refusal = _untrusted_module(args)
    if refusal:
        print(f"error: {args.folder}: {refusal}; or give --public-key KEY for a folder "
              "signed by a key you trust, or --plant FILE with your own model",
              file=sys.stderr)
        return EXIT_USAGE
    problem = verify_problem(Path(args.folder), apart=_folder_module(Path(args.folder)))
    if problem:
        print(f"error: {args.folder}: fails verification: {problem}; its record is not "
              "the one the run wrote, so nothing was run (plantrig verify FOLDER says more)",
              file=sys.stderr)
        return EXIT_NOT_INTACT
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
    print_outcome(folder, summary, scenario.name if scenario is not None else None)
    code = int(summary["exit_code"])
    print(f"exit code {code}; compare with: plantrig compare {rerun['of']} {folder}")
    return code
