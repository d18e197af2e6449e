"""Command-line subcommands for run records: recover, verify, keygen, sign, report, export.

Kept apart from cli.py so that file stays the short composition root; cli.py calls
``add_record_commands``. Exit codes are in each command's --help (EXIT_CODES below).

report, export and sign work only on a folder fit for sign-off (sim/records/_signoff.py): the
run is over, its record finished, and it passes verify. report and export make a marked
draft of any other folder with --draft. Reports and exports go to RUN_FOLDER/derived/
(or outside the folder with --out), which the manifest never covers: making them never
changes what the manifest or a signature covers.
"""

from __future__ import annotations

import argparse
import getpass
import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from plantrig._campaign_out import CAMPAIGN_MANIFEST, check_manifest
from plantrig.sim import (
    DERIVED,
    DRAFT_MARK,
    MANIFEST,
    RUN_START,
    KeyFileError,
    ManifestError,
    Readiness,
    RecordError,
    WrongPassphrase,
    check_folder,
    generate_keypair,
    read_for_display,
    recover_run,
    sha256_file,
    sign_folder,
    verify_folder,
)

EXIT_OK, EXIT_NOT_INTACT, EXIT_USAGE, EXIT_NOT_FINISHED = 0, 1, 2, 4
EXIT_PASSPHRASE = 3     # sign: the key is encrypted and the passphrase does not open it
SIGNOFF_EXIT_CODES = """exit codes:
  0  written
  1  the folder fails verify (a file changed, missing or added, a damaged manifest,
     a malformed or invalid signature)
  2  usage mistake, or a folder or key that cannot be read or written
  4  the folder is still being written (its rig or recorder process runs) or its
     record is not finished (no summary or manifest yet, or a journal left for
     plantrig recover)"""
DRAFT_HELP = ("make a draft of a folder not fit for sign-off: every page is marked "
              f"'{DRAFT_MARK}' and the files are named DRAFT-*; never sealed")


def _folder(path: str) -> Path:
    folder = Path(path)
    if not folder.is_dir():
        print(f"error: {folder}: no such run folder", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)
    return folder


def _run_folder(path: str, public_key: str | None = None) -> Path | None:
    """A folder that is a run folder at all (and a readable key, if one is named); None
    after saying why not."""
    folder = _folder(path)
    if not any((folder / name).is_file() for name in (RUN_START, "summary.json", MANIFEST)):
        print(f"error: {folder}: not a plantrig run folder (no {RUN_START}, summary.json "
              f"or {MANIFEST})", file=sys.stderr)
        return None
    if public_key is not None and not Path(public_key).is_file():
        print(f"error: {public_key}: no such key file", file=sys.stderr)
        return None
    return folder


def _refused(folder: Path, readiness: Readiness, what: str, draft_hint: bool) -> int:
    """Say why ``folder`` is not fit for ``what``; the exit code for it."""
    for problem in readiness.problems:
        print(f"error: {folder}: {problem}", file=sys.stderr)
    print(f"{folder}: not fit for sign-off; nothing {what}"
          + (" (--draft makes a marked draft)" if draft_hint else ""), file=sys.stderr)
    return EXIT_NOT_FINISHED if readiness.unfinished else EXIT_NOT_INTACT


def _out_dir(folder: Path, out: str | None) -> Path | None:
    """Where reports and exports go: RUN_FOLDER/derived/ by default; --out may point
    outside the folder or inside derived/, never elsewhere in the record."""
    if out is None:
        return folder / DERIVED
    target = Path(out)
    return None if into_record(folder, target) else target


def into_record(folder: Path, target: Path) -> bool:
    """True (after saying so) when ``target`` lies in the run folder outside derived/:
    a file written there would change the record (verify and signatures would fail)."""
    inside = target.resolve().is_relative_to(folder.resolve())
    if inside and not target.resolve().is_relative_to((folder / DERIVED).resolve()):
        print(f"error: --out {target}: inside the run folder but not in {DERIVED}/; the "
              "record must not change (use a place outside it, or the default)",
              file=sys.stderr)
        return True
    return False


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
        return _recovered_outcome(report)
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
    return _recovered_outcome(report)


def _recovered_outcome(report: dict[str, Any]) -> int:
    """Print the outcome the record keeps and what is still missing (then
    EXIT_NOT_FINISHED)."""
    print(f"outcome: {report['ended'].upper()} ({report['reason']})")
    for problem in report["problems"]:
        print(f"record: {problem}", file=sys.stderr)
    if report["problems"]:
        print("the record is not finished: free space, then run plantrig recover again",
              file=sys.stderr)
        return EXIT_NOT_FINISHED
    return EXIT_OK


def cmd_verify(args: argparse.Namespace) -> int:
    folder = _folder(args.folder)
    if not (folder / MANIFEST).exists() and (folder / CAMPAIGN_MANIFEST).exists():
        return _verify_campaign(folder)
    try:
        result = verify_folder(folder, Path(args.public_key) if args.public_key else None)
    except KeyFileError as exc:      # the command's key, not the folder, is at fault
        print(f"error: --public-key {exc}", file=sys.stderr)
        return EXIT_USAGE
    except ManifestError as exc:
        print(f"error: {exc}", file=sys.stderr)
        print(f"{folder}: FAILED", file=sys.stderr)
        return EXIT_NOT_INTACT
    print(f"manifest.json SHA-256: {result.manifest_sha256} (written {result.created_utc})")
    for label, names in (("changed", result.changed), ("missing", result.missing),
                         ("extra", result.extra)):
        for name in names:
            print(f"{label}: {name}")
    print(f"signature: {result.signature}"
          + (f" ({result.signature_detail})" if result.signature_detail else ""))
    if result.not_covered:
        print(f"not covered: {DERIVED}/ ({len(result.not_covered)} files: reports and "
              "exports made from the record, not part of it)")
    if result.ok:
        print(f"{folder}: ok, {result.checked} files match the manifest")
        return EXIT_OK
    print(f"{folder}: FAILED", file=sys.stderr)
    return EXIT_NOT_INTACT


def _verify_campaign(folder: Path) -> int:
    """verify on a campaign folder: every file against campaign_manifest.json."""
    try:
        found = check_manifest(folder)
    except ValueError as exc:
        print(f"error: {exc}", file=sys.stderr)
        print(f"{folder}: FAILED", file=sys.stderr)
        return EXIT_NOT_INTACT
    print(f"{CAMPAIGN_MANIFEST} SHA-256: {sha256_file(folder / CAMPAIGN_MANIFEST)}")
    for label, names in found.items():
        for name in names:
            print(f"{label}: {name}")
    if any(found.values()):
        print(f"{folder}: FAILED", file=sys.stderr)
        return EXIT_NOT_INTACT
    print(f"{folder}: ok, every file of the campaign matches {CAMPAIGN_MANIFEST}")
    return EXIT_OK


def _env_passphrase(name: str) -> bytes | None:
    """The passphrase in environment variable ``name``; None after saying why not."""
    value = os.environ.get(name)
    if not value:
        print(f"error: --passphrase-env {name}: the environment variable is "
              f"{'empty' if value == '' else 'not set'}", file=sys.stderr)
        return None
    return value.encode("utf-8")


def cmd_keygen(args: argparse.Namespace) -> int:
    private, public = Path(f"{args.out}.private.pem"), Path(f"{args.out}.public.pem")
    passphrase = None
    if args.passphrase_env:
        passphrase = _env_passphrase(args.passphrase_env)
        if passphrase is None:
            return EXIT_USAGE
    try:
        fingerprint = generate_keypair(private, public, passphrase)
    except (ManifestError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    protected = "encrypted with the passphrase" if passphrase else "not encrypted"
    print(f"private key: {private} (keep it secret; mode 0600; {protected})")
    print(f"public key:  {public} (give it to whoever checks: plantrig verify --public-key)")
    print(f"fingerprint (SHA-256 of the raw public key): {fingerprint}")
    return EXIT_OK


def _sign_passphrase(args: argparse.Namespace, key: Path) -> Callable[[], bytes]:
    """Where an encrypted key's passphrase comes from: --passphrase-env, else a prompt
    on the terminal (getpass: not echoed)."""
    def ask() -> bytes:
        if args.passphrase_env:
            value = os.environ.get(args.passphrase_env)
            if not value:
                raise WrongPassphrase(f"{key}: the key is encrypted and the environment "
                                      f"variable {args.passphrase_env} is "
                                      f"{'empty' if value == '' else 'not set'}")
            return value.encode("utf-8")
        try:
            return getpass.getpass(f"passphrase for {key}: ").encode("utf-8")
        except EOFError:
            raise WrongPassphrase(f"{key}: the key is encrypted and no passphrase could be "
                                  "read (no terminal): use --passphrase-env NAME") from None
    return ask


def cmd_sign(args: argparse.Namespace) -> int:
    folder = _run_folder(args.folder)
    if folder is None:
        return EXIT_USAGE
    readiness = check_folder(folder)
    if not readiness.ok:
        return _refused(folder, readiness, "signed", draft_hint=False)
    key = Path(args.key)
    try:
        fingerprint = sign_folder(folder, key, _sign_passphrase(args, key))
    except WrongPassphrase as exc:
        print(f"error: {exc}; not signed", file=sys.stderr)
        return EXIT_PASSPHRASE
    except ManifestError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(f"{folder}: not signed", file=sys.stderr)
        return EXIT_USAGE
    print(f"{folder}: manifest signed, key fingerprint {fingerprint}")
    return EXIT_OK


def cmd_report(args: argparse.Namespace) -> int:
    from plantrig._report import write_report

    folder = _run_folder(args.folder, args.public_key)
    if folder is None:
        return EXIT_USAGE
    readiness = check_folder(folder, Path(args.public_key) if args.public_key else None)
    if not (readiness.ok or args.draft):
        return _refused(folder, readiness, "written", draft_hint=True)
    out = _out_dir(folder, args.out)
    if out is None:
        return EXIT_USAGE
    try:
        record = read_for_display(folder)   # memory that does not grow with the run
        paths = write_report(record, out, operator=args.operator, witness=args.witness,
                             readiness=readiness, draft=args.draft, reviewer=args.reviewer)
    except (OSError, ValueError) as exc:
        print(f"error: {folder}: cannot make the report ({exc})", file=sys.stderr)
        return EXIT_USAGE
    for p in paths:
        print(f"wrote {p}")
    _say_draft(args.draft, readiness)
    return EXIT_OK


def cmd_export(args: argparse.Namespace) -> int:
    from plantrig.sim import export_csv, export_mat

    folder = _run_folder(args.folder)
    if folder is None:
        return EXIT_USAGE
    if not (args.csv or args.mat):
        print("error: say what to export: --csv, --mat or both", file=sys.stderr)
        return EXIT_USAGE
    readiness = check_folder(folder)
    if not (readiness.ok or args.draft):
        return _refused(folder, readiness, "exported", draft_hint=True)
    out = _out_dir(folder, args.out)
    if out is None:
        return EXIT_USAGE
    if args.draft:
        status = f"{DRAFT_MARK}: " + ("; ".join(readiness.problems) or "made with --draft")
    else:
        assert readiness.verification is not None
        status = ("verified record, manifest.json SHA-256 "
                  f"{readiness.verification.manifest_sha256}")
    try:
        paths = (export_csv(folder, out, draft=args.draft) if args.csv else []) + (
            export_mat(folder, out, status, draft=args.draft) if args.mat else [])
    except (OSError, ValueError) as exc:
        print(f"error: {folder}: cannot export ({exc})", file=sys.stderr)
        return EXIT_USAGE
    for p in paths:
        print(f"wrote {p}")
    _say_draft(args.draft, readiness)
    return EXIT_OK


def _say_draft(draft: bool, readiness: Readiness) -> None:
    if draft:
        print(f"{DRAFT_MARK}: " + ("; ".join(readiness.problems) or "made with --draft"))


def add_record_commands(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Register the run-record subcommands on the main parser's subparsers."""
    raw = argparse.RawDescriptionHelpFormatter
    p = sub.add_parser("recover",
                       description="Rebuild run.h5, ticks.npy, summary.json and the manifest "
                                   "of a run folder whose rig was killed, from the journal, "
                                   "events.jsonl and the tapes left in shared memory; "
                                   "report the ticks lost. A run that ended but could not "
                                   "finish its record (disk full) is finished as it ended, "
                                   "its outcome kept; a run whose rig died is 'interrupted'.",
                       epilog="exit codes:\n  0  the record is finished\n"
                              "  2  not a run folder, the run still going, or nothing to "
                              "recover\n  4  still not finished (the disk is still full): "
                              "free space and run recover again", formatter_class=raw)
    p.add_argument("folder", help="run folder")
    p.set_defaults(func=cmd_recover)

    p = sub.add_parser("verify",
                       description="Check every field of manifest.json (it must be intact "
                                   "to the bit), then the size and SHA-256 of every file of "
                                   "the record; report files changed, missing or added, "
                                   "and print manifest.json's own SHA-256. A signature "
                                   "file must be well formed; with --public-key it must "
                                   f"also be valid. Files under {DERIVED}/ (reports, "
                                   "exports) are not covered. A campaign folder is checked "
                                   f"against its {CAMPAIGN_MANIFEST} (every file, kept run "
                                   "folders included).",
                       epilog="exit codes:\n  0  ok\n  1  the folder fails verify (or has no "
                              "manifest)\n  2  no such folder, or a --public-key file that "
                              "cannot be read or is not an Ed25519 public key",
                       formatter_class=raw)
    p.add_argument("folder", help="run folder or campaign folder")
    p.add_argument("--public-key", metavar="FILE", help="Ed25519 public key (PEM)")
    p.set_defaults(func=cmd_verify)

    p = sub.add_parser("keygen",
                       description="Write PREFIX.private.pem (mode 0600) and "
                                   "PREFIX.public.pem. With --passphrase-env the private "
                                   "key is encrypted (PKCS#8, the cryptography library's "
                                   "best available encryption): a copy of the file alone "
                                   "cannot sign. docs/security.md.",
                       epilog="exit codes: 0 written, 2 a key file exists or cannot be "
                              "written, or the passphrase variable is unset or empty",
                       formatter_class=raw)
    p.add_argument("--out", default="plantrig-key", metavar="PREFIX",
                   help="writes PREFIX.private.pem and PREFIX.public.pem "
                        "(default: plantrig-key)")
    p.add_argument("--passphrase-env", metavar="NAME",
                   help="encrypt the private key with the passphrase held in the "
                        "environment variable NAME")
    p.set_defaults(func=cmd_keygen)

    p = sub.add_parser("sign",
                       description="Sign manifest.json of a finished run folder that passes "
                                   "verify. A folder already signed is not signed again. "
                                   "An encrypted key's passphrase comes from "
                                   "--passphrase-env NAME, else it is asked for on the "
                                   "terminal (not echoed).",
                       epilog=SIGNOFF_EXIT_CODES.replace(
                           "\n  4", "\n  3  the key is encrypted and the passphrase is "
                                    "wrong or could not be read\n  4"),
                       formatter_class=raw)
    p.add_argument("folder", help="run folder")
    p.add_argument("--key", required=True, metavar="FILE", help="private key (PEM)")
    p.add_argument("--passphrase-env", metavar="NAME",
                   help="read an encrypted key's passphrase from the environment variable "
                        "NAME instead of asking")
    p.set_defaults(func=cmd_sign)

    p = sub.add_parser("report",
                       description="Write a sign-off report (self-contained HTML and PDF) "
                                   f"into RUN_FOLDER/{DERIVED}/ (not covered by the "
                                   "manifest, so it never changes it). Refuses a folder "
                                   "still being written, not finished, or failing verify, "
                                   "unless --draft.",
                       epilog=SIGNOFF_EXIT_CODES, formatter_class=raw)
    p.add_argument("folder", help="run folder")
    p.add_argument("--operator", default="", metavar="NAME", help="who ran the test")
    p.add_argument("--witness", default="", metavar="NAME", help="who witnessed it")
    p.add_argument("--reviewer", default="", metavar="NAME", help="who reviews the record")
    p.add_argument("--public-key", metavar="FILE",
                   help="also check the signature with this Ed25519 public key (PEM)")
    p.add_argument("--out", metavar="DIR",
                   help=f"where to write (default: RUN_FOLDER/{DERIVED}; outside the run "
                        f"folder or inside {DERIVED}/)")
    p.add_argument("--draft", action="store_true", help=DRAFT_HELP)
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("export",
                       description=f"Export a run into RUN_FOLDER/{DERIVED}/ (not covered by "
                                   "the manifest). Refuses a folder still being written, "
                                   "not finished, or failing verify, unless --draft.",
                       epilog=SIGNOFF_EXIT_CODES, formatter_class=raw)
    p.add_argument("folder", help="run folder")
    p.add_argument("--csv", action="store_true", help="ticks.csv (names and units rows) "
                                                      "and events.csv")
    p.add_argument("--mat", action="store_true", help="run.mat (scipy.io.savemat)")
    p.add_argument("--out", metavar="DIR",
                   help=f"where to write (default: RUN_FOLDER/{DERIVED}; outside the run "
                        f"folder or inside {DERIVED}/)")
    p.add_argument("--draft", action="store_true", help=DRAFT_HELP)
    p.set_defaults(func=cmd_export)
