"""What a campaign leaves behind: the cases table (Parquet and CSV), summary.json,
junit.xml and the campaign manifest (SHA-256 of every output).

The table is built from the case rows only, sorted by case number, so it is the same
bit for bit however the cases were spread over workers. Columns that cannot be the
same between two runs of a campaign (wall time, worker, memory) come last
(NONDETERMINISTIC) and are left out when tables are compared.
"""

from __future__ import annotations

import csv
import datetime as _dt
import io
import json
from pathlib import Path
from typing import Any

from plantrig._junit import judged_case, write_junit
from plantrig.sim import sha256_file, write_atomic

CASES_PARQUET, CASES_CSV, SUMMARY, JUNIT = "cases.parquet", "cases.csv", "summary.json", "junit.xml"
CAMPAIGN_MANIFEST, PLAN, JOURNAL = "campaign_manifest.json", "plan.json", "cases.jsonl"
REPORT = "report.html"
NONDETERMINISTIC = ("wall_s", "worker", "worker_rss_mb")
HEAD = (("index", "int64"), ("case_id", "string"), ("rig", "string"), ("scenario", "string"),
        ("variation", "string"), ("draw", "int64"), ("seed", "int64"), ("status", "string"),
        ("outcome", "string"), ("reason", "string"), ("exit_code", "int64"),
        ("ticks", "int64"), ("error", "string"))

EXIT_OK, EXIT_ERROR, EXIT_USAGE, EXIT_FAILED, EXIT_STOPPED = 0, 1, 2, 3, 5
CAMPAIGN_EXIT_HELP = """exit codes:
  0  every case passed (completed, every verdict passed)
  1  a case could not be judged: it raised (see its error), or it is missing
     because its worker died again and again; or the scheduler could not be reached
  2  campaign, rig or scenario file mistake, or usage mistake: nothing was run
  3  every case was judged and at least one failed (an outcome other than
     completed, or a failed verdict)
  5  stopped by a signal (Ctrl-C, SIGTERM): finish with --resume"""


def columns_of(rows: list[dict[str, Any]]) -> list[tuple[str, str]]:
    """(name, type) of every column: the fixed head, each varied key, each verdict's
    measured value and pass, then the reproduction assignments and the
    nondeterministic tail."""
    keys: dict[str, str] = {}
    verdicts: dict[str, None] = {}
    for row in rows:
        for key, value in row["values"]:
            numeric = isinstance(value, int | float) and not isinstance(value, bool)
            keys[key] = "float64" if numeric and keys.get(key, "float64") == "float64" \
                else "string"
        for v in row["verdicts"]:
            verdicts.setdefault(v["name"], None)
    cols = list(HEAD)
    cols += [(f"value:{k}", t) for k, t in keys.items()]
    for name in verdicts:
        cols += [(f"measured:{name}", "float64"), (f"passed:{name}", "bool")]
    cols += [("set", "string"), ("scenario_set", "string"), ("wall_s", "float64"),
             ("worker", "string"), ("worker_rss_mb", "float64")]
    return cols


def flatten(row: dict[str, Any]) -> dict[str, Any]:
    out = {name: row.get(name) for name, _ in HEAD}
    for key, value in row["values"]:
        out[f"value:{key}"] = value
    for v in row["verdicts"]:
        out[f"measured:{v['name']}"] = v["measured"]
        out[f"passed:{v['name']}"] = v["passed"]
    out["set"] = " ".join(row["set"])
    out["scenario_set"] = " ".join(row["scenario_set"])
    for name in NONDETERMINISTIC:
        out[name] = row.get(name)
    return out


def write_tables(folder: Path, rows: list[dict[str, Any]]) -> None:
    """cases.parquet and cases.csv, one row per case in case order."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    rows = sorted(rows, key=lambda r: r["index"])
    cols = columns_of(rows)
    flat = [flatten(r) for r in rows]
    arrays = {}
    for name, kind in cols:
        values = [f.get(name) for f in flat]
        if kind == "string":
            values = [None if v is None else str(v) for v in values]
        types = {"int64": pa.int64(), "float64": pa.float64(), "string": pa.string(),
                 "bool": pa.bool_()}
        arrays[name] = pa.array(values, type=types[kind])
    table = pa.table(arrays)
    tmp = folder / f".{CASES_PARQUET}.tmp"
    pq.write_table(table, tmp)
    tmp.replace(folder / CASES_PARQUET)
    text = io.StringIO()
    writer = csv.writer(text, lineterminator="\n")
    writer.writerow([name for name, _ in cols])
    for f in flat:
        writer.writerow(["" if f.get(name) is None else repr(f[name])
                         if isinstance(f[name], float) else f[name] for name, _ in cols])
    write_atomic(folder / CASES_CSV, text.getvalue().encode())


def exit_code(planned: int, rows: list[dict[str, Any]], interrupted: bool) -> int:
    if interrupted:
        return EXIT_STOPPED
    if len(rows) < planned or any(r["status"] == "error" for r in rows):
        return EXIT_ERROR
    return EXIT_FAILED if any(r["status"] == "failed" for r in rows) else EXIT_OK


def summarize_campaign(campaign: Any, planned: int, rows: list[dict[str, Any]], *,
                       started: str, session: dict[str, Any], interrupted: bool,
                       kept: list[str]) -> dict[str, Any]:
    """summary.json: counts, per rig and scenario, the failing cases, and timing."""
    counts = {s: sum(r["status"] == s for r in rows) for s in ("passed", "failed", "error")}
    groups: dict[str, dict[str, int]] = {}
    for r in sorted(rows, key=lambda r: r["index"]):
        g = groups.setdefault(f"{r['rig']}/{r['scenario'] or '-'}",
                              {"passed": 0, "failed": 0, "error": 0})
        g[r["status"]] += 1
    return {
        "format": "plantrig-campaign", "version": 1,
        "campaign": {"name": campaign.name, "description": campaign.description,
                     "file": str(campaign.path), "sha256": campaign.sha256,
                     "seed": campaign.seed, "keep": campaign.keep},
        "started_utc": started,
        "written_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        "complete": len(rows) == planned and not interrupted,
        "cases": {"planned": planned, "done": len(rows), **counts,
                  "missing": planned - len(rows)},
        "exit_code": exit_code(planned, rows, interrupted),
        "by_rig_and_scenario": groups,
        "not_passed": [{"case_id": r["case_id"], "index": r["index"], "rig": r["rig"],
                        "scenario": r["scenario"], "variation": r["variation"],
                        "status": r["status"], "outcome": r["outcome"],
                        "error": r["error"],
                        "failed_verdicts": [v["name"] for v in r["verdicts"]
                                            if not v["passed"]]}
                       for r in sorted(rows, key=lambda r: r["index"])
                       if r["status"] != "passed"],
        "kept_folders": kept,
        "last_session": session,
    }


def write_junit_for(folder: Path, campaign_name: str, rows: list[dict[str, Any]]) -> None:
    cases = []
    for r in sorted(rows, key=lambda r: r["index"]):
        suite = f"{r['rig']}/{r['scenario'] or 'rig'}"
        values = ", ".join(f"{k}={v!r}" for k, v in r["values"])
        cases.append(judged_case(
            suite, f"{campaign_name}.{r['rig']}.{r['scenario'] or 'rig'}",
            f"{r['variation']} draw {r['draw']} [{r['case_id']}]", r.get("wall_s") or 0.0,
            r["outcome"], r["reason"], r["verdicts"], r["error"],
            output=f"case {r['case_id']}, seed {r['seed']}" + (f"; {values}" if values else "")
            + "\n" + reproduce(r)))
    write_junit(folder / JUNIT, f"campaign {campaign_name}", cases)


def reproduce(row: dict[str, Any]) -> str:
    """The command that runs this case alone (with a run folder)."""
    scenario = f" --scenario {row['scenario_file']}" if row.get("scenario_file") else ""
    text = (f"reproduce: plantrig run {row.get('rig_file', 'RIG')} --fast{scenario} "
            + " ".join(f"--set '{a}'" for a in row["set"]))
    if row["scenario_set"]:
        text += ("\nwith these scenario keys set in a copy of the scenario file: "
                 + ", ".join(row["scenario_set"]))
    return text


def write_manifest(folder: Path) -> dict[str, Any]:
    """campaign_manifest.json: SHA-256 and size of every file in the campaign folder
    (kept run folders included), itself excepted."""
    files = {}
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        rel = path.relative_to(folder).as_posix()
        if rel == CAMPAIGN_MANIFEST or path.name.startswith("."):
            continue
        files[rel] = {"sha256": sha256_file(path), "bytes": path.stat().st_size}
    doc = {"format": "plantrig-campaign-manifest", "version": 1, "algorithm": "sha256",
           "created_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
           "files": files}
    write_atomic(folder / CAMPAIGN_MANIFEST, (json.dumps(doc, indent=2) + "\n").encode())
    return doc


def check_manifest(folder: Path) -> dict[str, list[str]]:
    """Every file of a campaign folder against campaign_manifest.json: the names
    changed (size or SHA-256), missing and extra. Raises ValueError when the manifest
    cannot be read as one."""
    try:
        doc = json.loads((folder / CAMPAIGN_MANIFEST).read_text(encoding="utf-8"))
        listed = doc["files"]
        if doc.get("format") != "plantrig-campaign-manifest" or not isinstance(listed, dict):
            raise ValueError("not a plantrig campaign manifest")
        expected = {name: (int(v["bytes"]), str(v["sha256"])) for name, v in listed.items()}
    except (OSError, UnicodeDecodeError, ValueError, KeyError, TypeError) as exc:
        raise ValueError(f"{CAMPAIGN_MANIFEST}: cannot be read ({exc})") from None
    present = {p.relative_to(folder).as_posix(): p for p in folder.rglob("*")
               if p.is_file() and not p.name.startswith(".")}
    present.pop(CAMPAIGN_MANIFEST, None)
    changed = [name for name, (size, sha) in sorted(expected.items()) if name in present
               and (present[name].stat().st_size != size
                    or sha256_file(present[name]) != sha)]
    return {"changed": changed, "missing": sorted(set(expected) - set(present)),
            "extra": sorted(set(present) - set(expected))}


def read_journal(path: Path) -> dict[str, dict[str, Any]]:
    """Finished case rows by case id; a torn last line (killed mid-write) is dropped."""
    rows: dict[str, dict[str, Any]] = {}
    if not path.exists():
        return rows
    for line in path.read_text(encoding="utf-8").splitlines():
        try:
            row = json.loads(line)
        except json.JSONDecodeError:
            continue
        rows[row["case_id"]] = row
    return rows
