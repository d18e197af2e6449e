"""The run catalogue: one SQLite file (stdlib sqlite3) in the runs folder indexing every
run folder and campaign folder in it, so a test engineer finds last week's failing
rehearsals without opening folders.

The folders are the record; the catalogue is only an index of them. ``plantrig run``
and ``plantrig campaign`` add their folder when they finish; ``plantrig runs`` first
brings the index up to date with the folders (a missing, moved or changed folder, or a
missing or unreadable catalogue file, is simply indexed again), then lists.
An index that cannot be written never fails a run: it is rebuilt on the next listing.

A listing does not take summary.json's word for a run: each entry keeps what
``plantrig verify`` said of the folder (``verify_problem``: every file's size and
SHA-256 against manifest.json; a campaign's summary.json against campaign_manifest.json)
and a stamp of the size and modification time of every file it read. A folder whose stamp is
unchanged is not hashed again, so listing many runs costs a ``stat`` per file; a folder
with any file changed, added or gone is verified again in full. (Only ``plantrig verify``
is the full check: a file rewritten with its old size and time kept is noticed there.)
"""

from __future__ import annotations

import argparse
import contextlib
import datetime as _dt
import hashlib
import json
import sqlite3
import sys
import tomllib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from plantrig._campaign_out import CAMPAIGN_MANIFEST

CATALOGUE = "catalogue.sqlite"
SCHEMA = """CREATE TABLE IF NOT EXISTS folders (
    folder TEXT PRIMARY KEY,      -- path relative to the runs folder
    kind TEXT NOT NULL,           -- 'run' or 'campaign'
    rig TEXT NOT NULL,            -- rig name (a campaign: its rigs, comma-separated)
    scenario TEXT NOT NULL,       -- scenario name ('' for none; a campaign: its scenarios)
    started_utc TEXT NOT NULL,
    outcome TEXT NOT NULL,        -- a run's outcome; a campaign: passed/failed/incomplete
    exit_code INTEGER,
    passed INTEGER NOT NULL,      -- verdicts (run) or cases (campaign) that passed
    failed INTEGER NOT NULL,      -- ... that did not
    summary_sha256 TEXT NOT NULL,
    manifest_sha256 TEXT NOT NULL,
    verify TEXT NOT NULL,         -- 'ok', 'FAILS' (fails verify) or 'unsealed' (no manifest)
    files_stamp TEXT NOT NULL     -- SHA-256 of every file's path, size and mtime
)"""
SCHEMA_VERSION = 2                # PRAGMA user_version; an older catalogue is rebuilt
CAMPAIGN_SUMMARY_FORMAT = "plantrig-campaign"
EXIT_OK, EXIT_USAGE = 0, 2
RUNS_EXIT_HELP = """exit codes:
  0  listed (also when nothing matches)
  2  no such runs folder, a date that cannot be read, or a catalogue that cannot be written"""


@contextlib.contextmanager
def _db(runs: Path) -> Iterator[sqlite3.Connection]:
    con = sqlite3.connect(runs / CATALOGUE, timeout=10)
    try:
        if con.execute("PRAGMA user_version").fetchone()[0] != SCHEMA_VERSION:
            con.execute("DROP TABLE IF EXISTS folders")    # only an index: rebuilt
            con.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
        con.execute(SCHEMA)
        yield con
        con.commit()
    finally:
        con.close()


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest() if path.is_file() else ""


def _stamp(folder: Path) -> str:
    """The size and modification time of every file of ``folder`` (derived/ aside), in
    one SHA-256: it changes when any file is rewritten, added or removed."""
    from plantrig.sim import DERIVED
    digest = hashlib.sha256()
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder).as_posix()
        if path.is_file() and not rel.startswith(f"{DERIVED}/"):
            st = path.stat()
            digest.update(f"{rel}\0{st.st_size}\0{st.st_mtime_ns}\n".encode())
    return digest.hexdigest()


def _campaign_verify(folder: Path, summary_sha: str) -> str:
    """A campaign's summary.json against what campaign_manifest.json lists for it."""
    try:
        files = json.loads((folder / CAMPAIGN_MANIFEST).read_text(encoding="utf-8"))["files"]
    except FileNotFoundError:
        return "unsealed"
    except (OSError, ValueError, KeyError, TypeError):
        return "FAILS"
    listed = files.get("summary.json") if isinstance(files, dict) else None
    return "ok" if isinstance(listed, dict) and listed.get("sha256") == summary_sha else "FAILS"


def _entry(runs: Path, folder: Path, summary: dict[str, Any],
           sealed_here: bool = False) -> tuple[Any, ...]:
    """One catalogue row from a folder's summary.json and a check of its record
    (``sealed_here``: by the command that has just written its manifest from these very
    files, so hashing them again would only cost a long run's time at its end)."""
    from plantrig.sim import MANIFEST, verify_problem
    stamp = _stamp(folder)              # before the check: a later change shows
    summary_path = folder / "summary.json"
    summary_sha = _sha(summary_path)
    if summary.get("format") == CAMPAIGN_SUMMARY_FORMAT:
        rigs = sorted({g.split("/", 1)[0] for g in summary["by_rig_and_scenario"]})
        scenarios = sorted({g.split("/", 1)[1] for g in summary["by_rig_and_scenario"]} - {"-"})
        n = summary["cases"]
        outcome = ("incomplete" if not summary["complete"] else
                   "passed" if n["passed"] == n["planned"] else "failed")
        return (folder.relative_to(runs).as_posix(), "campaign", ", ".join(rigs),
                ", ".join(scenarios), summary["started_utc"], outcome, summary["exit_code"],
                n["passed"], n["done"] - n["passed"] + n["missing"], summary_sha,
                _sha(folder / CAMPAIGN_MANIFEST), _campaign_verify(folder, summary_sha), stamp)
    verdicts = summary.get("verdicts") or []
    verify = ("unsealed" if not (folder / MANIFEST).is_file() else
              "ok" if sealed_here or not verify_problem(folder) else "FAILS")
    return (folder.relative_to(runs).as_posix(), "run", summary["rig"]["name"],
            _scenario_name(folder), summary["started_utc"], summary["ended"],
            summary.get("exit_code"), sum(bool(v["passed"]) for v in verdicts),
            sum(not v["passed"] for v in verdicts), summary_sha,
            _sha(folder / MANIFEST), verify, stamp)


def _scenario_name(folder: Path) -> str:
    path = folder / "scenario.toml"
    if not path.is_file():
        return ""
    try:
        return str(tomllib.loads(path.read_text(encoding="utf-8"))["scenario"]["name"])
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError, KeyError, TypeError):
        return path.stem


def _index(runs: Path, folder: Path, summary: dict[str, Any]) -> str | None:
    """Add or replace the entry of ``folder``, just finished; the reason when the
    catalogue cannot be written."""
    try:
        runs, folder = runs.resolve(), folder.resolve()
        with _db(runs) as con:
            con.execute("INSERT OR REPLACE INTO folders VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
                        _entry(runs, folder, summary, sealed_here=True))
    except (sqlite3.Error, OSError, KeyError, ValueError) as exc:
        return f"run catalogue {runs / CATALOGUE} not updated ({exc}); `plantrig runs` " \
               "rebuilds it"
    return None


def index_run(runs: Path, folder: Path, summary: dict[str, Any]) -> None:
    """Index a finished run folder (a warning on stderr if that cannot be done)."""
    problem = _index(runs, folder, summary)
    if problem:
        print(f"warning: {problem}", file=sys.stderr)


index_campaign = index_run


def sync(runs: Path) -> int:
    """Bring the catalogue up to date with the folders in ``runs``; how many entries
    were (re)indexed or dropped."""
    runs = runs.resolve()
    try:
        with _db(runs) as con:
            known = dict(con.execute("SELECT folder, files_stamp FROM folders"))
    except sqlite3.DatabaseError:          # not a database: start it again
        (runs / CATALOGUE).unlink(missing_ok=True)
        known = {}
    changed = 0
    present = set()
    with _db(runs) as con:
        for summary_path in sorted(runs.glob("*/summary.json")):
            folder = summary_path.parent
            rel = folder.relative_to(runs).as_posix()
            present.add(rel)
            if known.get(rel) == _stamp(folder):
                continue
            try:
                summary = json.loads(summary_path.read_text(encoding="utf-8"))
                con.execute("INSERT OR REPLACE INTO folders VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
                            _entry(runs, folder, summary))
                changed += 1
            except (OSError, json.JSONDecodeError, KeyError, TypeError):
                continue            # not a finished run or campaign folder
        for rel in set(known) - present:
            con.execute("DELETE FROM folders WHERE folder = ?", (rel,))
            changed += 1
    return changed


def add_parser(sub: Any) -> None:
    p = sub.add_parser("runs",
                       description="List every run and campaign folder in the runs folder "
                                   f"from its catalogue ({CATALOGUE}), newest first. The "
                                   "catalogue is brought up to date with the folders first "
                                   "(rebuilt when missing or stale). The verify column says "
                                   "whether the folder passes plantrig verify (FAILS: its "
                                   "outcome cannot be trusted; unsealed: no manifest), "
                                   "checked again whenever one of its files changes.",
                       epilog=RUNS_EXIT_HELP,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--out", default="runs", help="the runs folder (default: runs)")
    p.add_argument("--failed", action="store_true",
                   help="only runs and campaigns that did not pass (exit code not 0) or "
                        "fail verify")
    p.add_argument("--rig", metavar="NAME", help="only those of this rig")
    p.add_argument("--since", metavar="DATE", help="only those started on or after DATE "
                                                   "(YYYY-MM-DD or an ISO time, UTC)")
    p.set_defaults(func=cmd_runs)


def cmd_runs(args: argparse.Namespace) -> int:
    runs = Path(args.out)
    if not runs.is_dir():
        print(f"error: {runs}: no such runs folder", file=sys.stderr)
        return EXIT_USAGE
    since = None
    if args.since:
        try:
            since = _dt.datetime.fromisoformat(args.since)
        except ValueError:
            print(f"error: --since: expected a date like 2026-12-01, found {args.since!r}",
                  file=sys.stderr)
            return EXIT_USAGE
        since = since if since.tzinfo else since.replace(tzinfo=_dt.UTC)
    try:
        sync(runs)
        with _db(runs.resolve()) as con:
            rows = list(con.execute(
                "SELECT started_utc, kind, rig, scenario, outcome, exit_code, verify, passed, "
                "failed, folder FROM folders ORDER BY started_utc DESC, folder"))
    except (sqlite3.Error, OSError) as exc:
        print(f"error: {runs / CATALOGUE}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    shown = []
    for row in rows:
        started, kind, rig, _, _, code, verify, *_ = row
        if args.failed and code == 0 and verify != "FAILS":
            continue
        if args.rig and args.rig not in [r.strip() for r in rig.split(",")]:
            continue
        if since is not None and _dt.datetime.fromisoformat(started) < since:
            continue
        shown.append(row)
    head = ("started (UTC)", "kind", "rig", "scenario", "outcome", "exit", "verify",
            "pass/fail", "folder")
    table = [head, *[(s[:19].replace("T", " "), k, r, sc or "-", o, str(c), v, f"{p}/{f}", fo)
                     for s, k, r, sc, o, c, v, p, f, fo in shown]]
    widths = [max(len(row[i]) for row in table) for i in range(len(head))]
    for row in table:
        print("  ".join(cell.ljust(w) for cell, w in zip(row, widths, strict=True)).rstrip())
    print(f"{len(shown)} of {len(rows)} folders in {runs}")
    return EXIT_OK
