"""`plantrig campaign FILE`: check a campaign file, run its cases on Dask, write the
campaign folder (docs/campaigns.md).

The folder holds plan.json (every case, written before the first one runs), the
journal cases.jsonl (one row per finished case), and, written from the rows at the
end (also after an interruption, marked incomplete): cases.parquet, cases.csv,
summary.json, junit.xml, report.html and campaign_manifest.json; kept run folders of
single cases are under cases/CASE_ID/.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import shutil
import sys
from pathlib import Path
from typing import Any

import plantrig._blas_threads  # noqa: F401  (first: before numpy loads)
from plantrig import CAUTION
from plantrig._campaign_out import (
    CAMPAIGN_EXIT_HELP,
    EXIT_ERROR,
    EXIT_STOPPED,
    EXIT_USAGE,
    JOURNAL,
    PLAN,
    SUMMARY,
    read_journal,
    summarize_campaign,
    write_junit_for,
    write_manifest,
    write_tables,
)
from plantrig._model_trust import TRUST_HELP, model_guard
from plantrig.sim import Campaign, CampaignFileError, Case, expand, load_campaign, write_atomic

EXIT_MEANINGS = {0: "every case passed", 1: "a case could not be judged",
                 3: "a case failed", 5: "stopped; finish with --resume"}


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "campaign",
        description="Run every case of a campaign file (rigs x scenarios x variations) in "
                    "fast mode, one case per Dask task, on an embedded local cluster or an "
                    "existing Dask scheduler, and write a campaign folder: cases table "
                    "(Parquet, CSV), summary.json, junit.xml, report.html and a manifest "
                    "with the SHA-256 of every output. Ctrl-C or SIGTERM stops it; "
                    "--resume then runs only the missing cases. See docs/campaigns.md.",
        epilog=f"{CAMPAIGN_EXIT_HELP}\n\n{CAUTION}",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("file", help="campaign file (TOML)")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, metavar="N",
                       help="worker processes of the local cluster (default: one per core)")
    where.add_argument("--cluster", metavar="tcp://HOST:PORT",
                       help="use this existing Dask scheduler instead of a local cluster "
                            "(its workers must read the rig files at the same paths)")
    p.add_argument("--out", default="runs",
                   help="folder for campaign folders (default: runs)")
    p.add_argument("--resume", nargs="?", const="", metavar="FOLDER",
                   help="finish an interrupted campaign: its folder, or by default the "
                        "newest folder of this campaign in --out")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--trust-model", action="store_true", help=TRUST_HELP)
    p.set_defaults(func=cmd_campaign)


def cmd_campaign(args: argparse.Namespace) -> int:
    from plantrig._campaign import SchedulerUnreachable, run_cases

    try:
        campaign = load_campaign(args.file)
        cases = expand(campaign)
    except CampaignFileError as exc:
        for issue in exc.issues:
            print(f"error: {issue}", file=sys.stderr)
        print(f"{args.file}: {len(exc.issues)} mistake(s); nothing was run", file=sys.stderr)
        return EXIT_USAGE
    except ValueError as exc:   # a draw that cannot be made (truncated normal far off)
        print(f"error: {args.file}: {exc}; nothing was run", file=sys.stderr)
        return EXIT_USAGE
    for rig_file, rig_set in {c.rig_file: c.rig_set for c in cases}.items():
        refusal = model_guard(rig_file, overrides=rig_set, trust=args.trust_model)
        if refusal:   # the workers would import it: the same rule as plantrig run
            print(f"error: {rig_file}: {refusal}", file=sys.stderr)
            return EXIT_USAGE
    if args.workers is not None and args.workers < 1:
        print(f"error: --workers: expected a whole number >= 1, found {args.workers}",
              file=sys.stderr)
        return EXIT_USAGE
    folder = _folder(args, campaign, cases)
    if folder is None:
        return EXIT_USAGE
    plan = json.loads((folder / PLAN).read_text())
    print(f"campaign {campaign.name}: {len(cases)} cases; folder {folder}")
    try:
        session = run_cases(cases, folder / JOURNAL, cluster=args.cluster,
                            workers=args.workers or os.cpu_count() or 1,
                            progress=not args.quiet)
    except SchedulerUnreachable as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    wanted = {c.case_id for c in cases}
    rows = [r for r in read_journal(folder / JOURNAL).values() if r["case_id"] in wanted]
    kept = [] if session.interrupted else _keep_folders(campaign, cases, rows, folder)
    summary = write_outputs(folder, campaign, len(cases), rows, plan["started_utc"],
                            session.as_dict(), session.interrupted, kept)
    _print_end(folder, summary)
    return int(summary["exit_code"])


def write_outputs(folder: Path, campaign: Campaign, planned: int, rows: list[dict[str, Any]],
                  started: str, session: dict[str, Any], interrupted: bool,
                  kept: list[str]) -> dict[str, Any]:
    """Every output from the rows; the manifest last."""
    from plantrig._campaign_report import write_report

    summary = summarize_campaign(campaign, planned, rows, started=started, session=session,
                                 interrupted=interrupted, kept=kept)
    write_tables(folder, rows)
    write_junit_for(folder, campaign.name, rows)
    write_report(folder, summary, rows)
    write_atomic(folder / SUMMARY, (json.dumps(summary, indent=2) + "\n").encode())
    write_manifest(folder)
    from plantrig._catalogue import index_campaign
    index_campaign(folder.parent, folder, summary)
    return summary


def _folder(args: argparse.Namespace, campaign: Campaign, cases: list[Case]) -> Path | None:
    """The campaign folder: a new one with plan.json, or the one to resume (checked to
    hold the same cases); None after saying why not."""
    out = Path(args.out)
    plan = {"format": "plantrig-campaign-plan", "version": 1,
            "campaign": {"name": campaign.name, "file": str(campaign.path),
                         "sha256": campaign.sha256, "seed": campaign.seed},
            "cases": [c.as_dict() for c in cases]}
    if args.resume is None:
        stamp = _dt.datetime.now(_dt.UTC)
        folder = out / f"{campaign.name}-campaign-{stamp.strftime('%Y%m%d-%H%M%S')}"
        suffix = 1
        while folder.exists():
            suffix += 1
            folder = out / f"{campaign.name}-campaign-{stamp.strftime('%Y%m%d-%H%M%S')}-{suffix}"
        try:
            folder.mkdir(parents=True)
        except OSError as exc:
            print(f"error: cannot create campaign folder {folder}: {exc.strerror}",
                  file=sys.stderr)
            return None
        plan["started_utc"] = stamp.isoformat(timespec="seconds")
        write_atomic(folder / PLAN, (json.dumps(plan, indent=1) + "\n").encode())
        return folder
    found = Path(args.resume) if args.resume else _newest(out, campaign.name)
    if found is None or not (found / PLAN).is_file():
        print(f"error: nothing to resume: no campaign folder of {campaign.name!r} "
              f"{'at ' + str(found) if found else 'in ' + str(out)}", file=sys.stderr)
        return None
    old = json.loads((found / PLAN).read_text())
    if json.loads(json.dumps(plan["cases"])) != old["cases"]:
        changed = "the campaign file" if old["campaign"]["sha256"] != campaign.sha256 \
            else "a rig or scenario file it names"
        print(f"error: {found}: {changed} changed since this campaign started, so its "
              "cases are not the same; start a new campaign (without --resume)",
              file=sys.stderr)
        return None
    return found


def _newest(out: Path, name: str) -> Path | None:
    found = []
    for plan in out.glob(f"*/{PLAN}"):
        try:
            doc = json.loads(plan.read_text())
        except (OSError, json.JSONDecodeError):
            continue
        if doc.get("campaign", {}).get("name") == name:
            found.append((doc.get("started_utc", ""), plan.stat().st_mtime, plan.parent))
    return max(found)[2] if found else None


def _keep_folders(campaign: Campaign, cases: list[Case], rows: list[dict[str, Any]],
                  folder: Path) -> list[str]:
    """Run folders of the cases the campaign keeps, run again here with the recorder
    (a case is deterministic: the run is the same); each is checked against its row."""
    if campaign.keep == "nothing":
        return []
    from plantrig._campaign_case import build_case
    from plantrig.sim import run_to_folder

    by_id = {c.case_id: c for c in cases}
    kept = []
    for row in sorted(rows, key=lambda r: r["index"]):
        if row["status"] == "error" or (campaign.keep == "failing" and row["status"] != "failed"):
            continue
        target = folder / "cases" / row["case_id"]
        if (target / "summary.json").is_file():
            kept.append(target.relative_to(folder).as_posix())
            continue
        shutil.rmtree(target, ignore_errors=True)   # left unfinished by an interruption
        target.mkdir(parents=True)
        rig, scenario, actuators, sensors = build_case(
            by_id[row["case_id"]], scenario_copy=target.parent / f"{row['case_id']}.scenario.toml")
        _, outcome, summary = run_to_folder(rig, target.parent, folder=target, realtime=False,
                                            actuator_chain=actuators, sensor_chain=sensors,
                                            scenario=scenario)
        if (outcome.ended, summary["exit_code"]) != (row["outcome"], row["exit_code"]):
            print(f"warning: case {row['case_id']}: its kept run ended {outcome.ended} "
                  f"(exit {summary['exit_code']}), the campaign's {row['outcome']} "
                  f"(exit {row['exit_code']})", file=sys.stderr)
        kept.append(target.relative_to(folder).as_posix())
    return kept


def _print_end(folder: Path, summary: dict[str, Any]) -> None:
    n = summary["cases"]
    print(f"campaign folder: {folder}")
    print(f"cases: {n['planned']} planned, {n['done']} done: {n['passed']} passed, "
          f"{n['failed']} failed, {n['error']} errors" +
          (f", {n['missing']} missing" if n["missing"] else ""))
    s = summary["last_session"]
    if s["cases_run"]:
        print(f"this session: {s['cases_run']} cases in {s['wall_s']:.1f} s on {s['where']} "
              f"({s['case_ticks_per_s']:.0f} case-ticks/s)")
    code = int(summary["exit_code"])
    if code == EXIT_STOPPED:
        print(f"stopped: {n['missing']} cases missing; finish with: plantrig campaign "
              f"{summary['campaign']['file']} --out {folder.parent} --resume")
    print(f"exit code {code}: {EXIT_MEANINGS.get(code, '')}")
