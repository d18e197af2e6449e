"""Command-line subcommands for run records: recover, verify, keygen, sign, report, export.

Kept apart from cli.py so that file stays the short composition root; cli.py calls
``add_record_commands``. Exit codes as in cli.py: 0 success, 1 a record that fails its
check, 2 a usage mistake or a folder that cannot be read or written.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from plantrig.sim import (
    RecordError,
    generate_keypair,
    read_run,
    recover_run,
    sign_folder,
    verify_folder,
)
from plantrig.sim._manifest import ManifestError, extend_manifest

EXIT_OK, EXIT_FAULT, EXIT_USAGE = 0, 1, 2


def _folder(path: str) -> Path:
    folder = Path(path)
    if not folder.is_dir():
        print(f"error: {folder}: no such run folder", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)
    return folder


def cmd_recover(args: argparse.Namespace) -> int:
    folder = _folder(args.folder)
    try:
        report = recover_run(folder)
    except RecordError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if report.get("finished_again"):
        print(f"{folder}: finished the record of an ended run: "
              f"{report['recovered_rows']} ticks")
        return EXIT_OK
    print(f"{folder}: recovered {report['recovered_rows']} ticks "
          f"({report['journal_rows']} from the journal, {report['tape_rows']} from the tape; "
          f"{report['torn_bytes_dropped']} torn bytes dropped)")
    if report["lost_rows"] is None:
        print("the tape is gone (machine restarted?): ticks produced after the journal's "
              "last row are unknown")
    else:
        print(f"the rig had produced {report['produced_rows']} ticks: {report['lost_rows']} "
              f"lost ({report['lost_ms']:.1f} ms); from the journal alone "
              f"{report['journal_only_lost_rows']} ({report['journal_only_lost_ms']:.1f} ms)")
    return EXIT_OK


def cmd_verify(args: argparse.Namespace) -> int:
    folder = _folder(args.folder)
    try:
        result = verify_folder(folder, Path(args.public_key) if args.public_key else None)
    except ManifestError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_FAULT
    for label, names in (("changed", result.changed), ("missing", result.missing),
                         ("extra", result.extra)):
        for name in names:
            print(f"{label}: {name}")
    print(f"signature: {result.signature}")
    if result.ok:
        print(f"{folder}: ok, {result.checked} files match the manifest")
        return EXIT_OK
    print(f"{folder}: FAILED", file=sys.stderr)
    return EXIT_FAULT


def cmd_keygen(args: argparse.Namespace) -> int:
    private, public = Path(f"{args.out}.private.pem"), Path(f"{args.out}.public.pem")
    try:
        fingerprint = generate_keypair(private, public)
    except (ManifestError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    print(f"private key: {private} (keep it secret; mode 0600)")
    print(f"public key:  {public} (give it to whoever checks: plantrig verify --public-key)")
    print(f"fingerprint (SHA-256 of the raw public key): {fingerprint}")
    return EXIT_OK


def cmd_sign(args: argparse.Namespace) -> int:
    folder = _folder(args.folder)
    try:
        fingerprint = sign_folder(folder, Path(args.key))
    except ManifestError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    print(f"{folder}: manifest signed, key fingerprint {fingerprint}")
    return EXIT_OK


def _record_added(folder: Path, added: list[Path]) -> None:
    """List new files of a finished folder in its manifest, and say what that did."""
    try:
        signed = extend_manifest(folder, [p.relative_to(folder).as_posix() for p in added])
    except ManifestError as exc:
        print(f"warning: {exc}", file=sys.stderr)
        return
    if signed:
        print("note: the manifest changed, so its signature was removed; sign it again "
              "(plantrig sign)")


def cmd_report(args: argparse.Namespace) -> int:
    from plantrig._report import write_report

    folder = _folder(args.folder)
    try:
        record = read_run(folder)
        paths = write_report(record, operator=args.operator, witness=args.witness)
    except (OSError, ValueError) as exc:
        print(f"error: {folder}: cannot make the report ({exc})", file=sys.stderr)
        return EXIT_USAGE
    for p in paths:
        print(f"wrote {p}")
    _record_added(folder, paths)
    return EXIT_OK


def cmd_export(args: argparse.Namespace) -> int:
    from plantrig.sim import export_csv, export_mat

    folder = _folder(args.folder)
    if not (args.csv or args.mat):
        print("error: say what to export: --csv, --mat or both", file=sys.stderr)
        return EXIT_USAGE
    out = Path(args.out) if args.out else folder / "export"
    try:
        record = read_run(folder)
        paths = (export_csv(record, out) if args.csv else []) + (
            export_mat(record, out) if args.mat else [])
    except (OSError, ValueError) as exc:
        print(f"error: {folder}: cannot export ({exc})", file=sys.stderr)
        return EXIT_USAGE
    for p in paths:
        print(f"wrote {p}")
    if out.resolve().is_relative_to(folder.resolve()):
        _record_added(folder, paths)
    return EXIT_OK


def add_record_commands(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Register the run-record subcommands on the main parser's subparsers."""
    p = sub.add_parser("recover", help="rebuild the record of a run that died",
                       description="Rebuild run.h5, ticks.npy, summary.json and the manifest "
                                   "of a run folder whose rig was killed, from the journal, "
                                   "events.jsonl and the tapes left in shared memory; "
                                   "report the ticks lost.")
    p.add_argument("folder", help="run folder")
    p.set_defaults(func=cmd_recover)

    p = sub.add_parser("verify", help="check a run folder against its manifest",
                       description="Report files changed, missing or added since the "
                                   "manifest was written (exit 1 on any), and check the "
                                   "signature with a public key.")
    p.add_argument("folder", help="run folder")
    p.add_argument("--public-key", metavar="FILE", help="Ed25519 public key (PEM)")
    p.set_defaults(func=cmd_verify)

    p = sub.add_parser("keygen", help="make an Ed25519 key pair for signing run folders")
    p.add_argument("--out", default="plantrig-key", metavar="PREFIX",
                   help="writes PREFIX.private.pem and PREFIX.public.pem "
                        "(default: plantrig-key)")
    p.set_defaults(func=cmd_keygen)

    p = sub.add_parser("sign", help="sign a run folder's manifest (Ed25519)")
    p.add_argument("folder", help="run folder")
    p.add_argument("--key", required=True, metavar="FILE", help="private key (PEM)")
    p.set_defaults(func=cmd_sign)

    p = sub.add_parser("report", help="write report.html and report.pdf for a run",
                       description="Write a sign-off report (self-contained HTML and PDF) "
                                   "into the run folder and add it to the manifest.")
    p.add_argument("folder", help="run folder")
    p.add_argument("--operator", default="", metavar="NAME", help="who ran the test")
    p.add_argument("--witness", default="", metavar="NAME", help="who witnessed it")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("export", help="export a run as CSV and/or MATLAB .mat")
    p.add_argument("folder", help="run folder")
    p.add_argument("--csv", action="store_true", help="ticks.csv (names and units rows) "
                                                      "and events.csv")
    p.add_argument("--mat", action="store_true", help="run.mat (scipy.io.savemat)")
    p.add_argument("--out", metavar="DIR", help="where to write (default: RUN_FOLDER/export)")
    p.set_defaults(func=cmd_export)
