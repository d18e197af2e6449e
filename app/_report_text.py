"""What the sign-off report says, as sections of (label, text) rows, in reading order.

Page 1 carries what a reviewer decides on, first: the result at a glance, the run's
identity, the acceptance rules and the verdicts; then the signatures, then the
software and the hashes that tie the report to one state of the record. Everything is
worded for a person: event kinds, recorder and link counters in plain words, never a
raw field name or a Python value (no "False", "None").
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import platform
import tomllib
from pathlib import Path
from typing import Any

import numpy as np

from plantrig import __version__
from plantrig._console import REHEARSED, dut_text, human_duration, link_lines
from plantrig._plots import PlotContext, label
from plantrig.sim import DRAFT_MARK, Readiness, RunRecord, column_parts

Rows = list[tuple[str, str]]
Section = tuple[str, Rows]

EVENT_WORDS = {"run_end": "run ended", "fault_injected": "fault injected",
               "fault_cleared": "fault cleared", "scenario_step": "scenario step",
               "limit_warn": "limit warning", "link_lost": "link lost",
               "link_restored": "link restored", "command_refused": "command refused",
               "reset_refused": "reset refused", "estop": "E-stop",
               "expect": "expectation checked", "events_suppressed": "events not itemised"}
OUTCOME_WORDS = {"completed": "COMPLETED", "stopped": "STOPPED", "tripped": "TRIPPED",
                 "fault": "FAULT", "interrupted": "INTERRUPTED"}
RECORDER_WORDS = {"rows": "ticks written", "lost": "ticks lost",
                  "max_backlog_rows": "largest backlog (ticks)",
                  "rows_not_written": "ticks not written"}
NOT_GIVEN = "____________________"
REFUSAL_WORDS = {"bad": "malformed:", "rejected": "not usable:"}
# link counters the console's lines leave out (docs/protocol.md section 5)
MORE_LINK_WORDS = {"lost_in": "gaps in the controller's count",
                   "resyncs": "count restarts", "clamped": "commands clamped",
                   "encode_errors": "sensor values the codec refused",
                   "sensor_clipped": "sensor values clipped", "link_restored": "link restored",
                   "disconnects": "disconnects", "connect_failures": "failed connects",
                   "auth_failures": "refused credentials",
                   "dropped_in": "commands the receive queue let go",
                   "dropped_to_worker": "records lost on the way to the link's worker",
                   "dropped_to_loop": "records lost on the way to the loop",
                   "bad_loop_records": "unreadable worker records",
                   "empty_messages": "empty messages",
                   "controller_state": "controller's last state"}
NO_EXIT_CODE = "none (the rig process ended without one)"


def start_of(folder: Path) -> dict[str, Any]:
    """run_start.json (what a run that is not over started as), or {}."""
    try:
        start = json.loads((folder / "run_start.json").read_text())
    except (OSError, ValueError):
        return {}
    return start if isinstance(start, dict) else {}


def run_facts(record: RunRecord) -> dict[str, Any]:
    """The summary, with what only run_start.json holds filled in."""
    start = start_of(record.folder)
    s = dict(record.summary or start)
    for key in ("dut", "link_used", "environment", "tick0_utc"):
        if not s.get(key) and start.get(key):
            s[key] = start[key]
    return s


def passed(s: dict[str, Any]) -> bool:
    return s.get("ended") == "completed" and s.get("exit_code") == 0


def result_line(s: dict[str, Any]) -> str:
    """The outcome at a glance: PASS only for a completed run that exits 0."""
    if "ended" not in s:
        return "RESULT: UNKNOWN — the run has no summary (not over, or it died)"
    word = "PASS" if passed(s) else "NOT ACCEPTED"
    return (f"RESULT: {word} — {OUTCOME_WORDS.get(s['ended'], s['ended'])} "
            f"({s.get('reason', '')}), {exit_text(s)}")


def exit_text(s: dict[str, Any]) -> str:
    """The run's exit code; a run whose rig process died (rebuilt by recover) has none."""
    return f"exit code {s['exit_code']}" if "exit_code" in s else f"exit code {NO_EXIT_CODE}"


def not_judged(s: dict[str, Any]) -> str:
    """Why a run has no acceptance or verdict results."""
    if "recovery" in s or s.get("ended") == "interrupted":
        return "not judged: the run did not end (its rig process died; plantrig recover " \
               "rebuilt the record)"
    return "not judged (no results in the summary)"


def sections(record: RunRecord, ctx: PlotContext, readiness: Readiness, draft: bool,
             people: dict[str, str]) -> list[Section]:
    s = run_facts(record)
    head = [(DRAFT_MARK, [("why", p) for p in readiness.problems]
             or [("why", "made with --draft")])] if draft else []
    return head + [
        ("Run", identity_rows(record, s)),
        ("Acceptance rules", acceptance_rows(s)),
        ("Verdicts", verdict_rows(record.folder, s)),
        ("Signatures", [(role, f"name {people.get(role.lower()) or NOT_GIVEN}  "
                               f"signature {NOT_GIVEN}  date __________")
                        for role in ("Operator", "Witness", "Reviewer")]),
        ("Software and hashes", software_rows(record, s, readiness)),
        manifest_section(record.folder, readiness),
        ("Record", record_rows(record, s)),
        ("Limits", limit_rows(ctx)),
        ("Model summary", model_rows(s)),
        ("Events", event_rows(record)),
        ("Link and timing", timing_rows(record, s)),
    ]


def identity_rows(record: RunRecord, s: dict[str, Any]) -> Rows:
    rig = s.get("rig", {})
    description = _toml_field(record.folder / "rig.toml", "rig", "description")
    scenario = s.get("scenario") or _toml_field(record.folder / "scenario.toml", "scenario",
                                                "name")
    scenario_text = _toml_field(record.folder / "scenario.toml", "scenario", "description")
    tick0 = s.get("tick0_utc")
    ticks_run = s.get("ticks_run", s.get("ticks_recorded", record.ticks_total))
    rows = [
        ("rig", f"{rig.get('name', '?')}" + (f" — {description}" if description else "")),
        ("scenario", (f"{scenario}" + (f" — {scenario_text}" if scenario_text else ""))
         if scenario else "none"),
        ("run id", record.folder.name),
        ("tick 0 started (UTC)", str(tick0) if tick0 else
         f"not recorded by this run; the run began {s.get('started_utc', '?')} (written "
         "before the recorder started, not at tick 0)"),
        ("mode", {"fast": "fast (as fast as possible, not paced to the wall clock)",
                  "realtime": "real time (paced to the wall clock)"}.get(
                      str(s.get("mode")), str(s.get("mode", "?")))),
        ("outcome", f"{OUTCOME_WORDS.get(s['ended'], s['ended'])}: {s.get('reason', '')}"
         if "ended" in s else "not recorded: the run has no summary (not over, or it died)"),
        ("exit code", str(s["exit_code"]) if "exit_code" in s else NO_EXIT_CODE),
        ("ticks", f"{ticks_run} of {s.get('ticks_planned', '?')} planned ran, "
                  f"{s.get('ticks_recorded', record.ticks_total)} recorded; tick "
                  f"{_seconds(rig.get('tick_s'))}"),
        ("device under test", dut_text(s.get("dut"))),
        ("link used", link_text(s.get("link_used"), s)),
    ]
    return rows


def link_text(link: Any, s: dict[str, Any]) -> str:
    if not isinstance(link, dict):
        return ("built-in controller, no link" if not s.get("link")
                else "not recorded by this run (the copied rig.toml says what was asked)")
    if link.get("kind") == "serial":
        return (f"serial port {link.get('port')} at {link.get('baud')} baud, "
                f"{link.get('byte_size')} data bits, parity {link.get('parity')}, "
                f"{link.get('stop_bits')} stop bit(s); {link.get('protocol')} frames, "
                f"{link.get('encoding')}")
    if link.get("kind") == "mqtt":
        return (f"MQTT broker {link.get('broker')}" + (" with TLS" if link.get("tls") else "")
                + f", topics {link.get('topics')}, {link.get('payload')} payload"
                + (f", client {link['client_id']}" if link.get("client_id") else ""))
    if link.get("kind") == "modbus":
        words = {"big": "high word first", "little": "low word first"}
        return (f"Modbus {'TCP' if link.get('transport') == 'tcp' else 'RTU'} server at "
                f"{link.get('address')}, unit {link.get('unit_id')}; 32-bit values "
                f"{words.get(str(link.get('word_order')), link.get('word_order'))}")
    return ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in link.items())


def acceptance_rows(s: dict[str, Any]) -> Rows:
    """The run's acceptance rules as judged after it (summary "acceptance")."""
    rules = s.get("acceptance")
    if not isinstance(rules, list) or not rules:
        return [("acceptance", not_judged(s))]
    mark = {True: "held", False: "FAILED", None: "n/a"}
    return [(str(r.get("rule", "?")), f"{mark.get(r.get('passed'), '?')}: "
             f"{r.get('measured', '')} (needs {r.get('needed', '')})")
            for r in rules if isinstance(r, dict)]


def verdict_rows(folder: Path, s: dict[str, Any]) -> Rows:
    items: Any = s.get("verdicts")
    path = folder / "verdicts.json"
    if path.exists():
        try:
            doc = json.loads(path.read_text())
            items = doc.get("verdicts", doc) if isinstance(doc, dict) else doc
        except ValueError as exc:
            return [("verdicts", f"verdicts.json does not parse ({exc})")]
    if not items:
        planned = _toml_list(folder / "scenario.toml", "verdicts")
        if planned:      # a scenario with verdicts, never judged: say so, never "none"
            return [("verdicts", f"{not_judged(s)}; the scenario's {len(planned)} "
                                 "verdict(s) were not evaluated")]
        return [("verdicts", "no acceptance criteria in this run (no scenario verdicts)")]
    items = items if isinstance(items, list) else [items]
    judged = [i for i in items if isinstance(i, dict) and "passed" in i]
    rows: Rows = []
    if judged:
        n_pass = sum(bool(i["passed"]) for i in judged)
        rows.append(("result", f"{n_pass} of {len(judged)} criteria passed"
                     + ("" if n_pass == len(judged) else " — NOT ACCEPTED")))
    for i, item in enumerate(items):
        if not isinstance(item, dict):
            rows.append((f"#{i + 1}", str(item)))
            continue
        unit = f" {item['unit']}" if item.get("unit") else ""
        parts = [("PASS" if item["passed"] else "FAIL") if "passed" in item else "not judged"]
        if item.get("criterion"):
            parts.append(str(item["criterion"]).replace("_", " "))
        if item.get("measured") is not None:
            parts.append(f"measured {fmt(item['measured'])}{unit}")
        elif "measured" in item:          # a step whose trigger never came, say
            parts.append("not measured")
        if item.get("needs"):        # the bound as the console says it ("x <= 1.15 m/s")
            parts.append(f"needs {item['needs']}")
        elif "limit" in item and item.get("criterion") != "expect":   # an expectation's
            parts.append(f"limit {fmt(item['limit'])}{unit}")           # test is its detail
        if item.get("detail") and item["detail"] != item.get("needs"):
            parts.append(str(item["detail"]))
        rows.append((str(item.get("name", f"#{i + 1}")), "; ".join(parts)))
    return rows


def software_rows(record: RunRecord, s: dict[str, Any], readiness: Readiness) -> Rows:
    env = s.get("environment") if isinstance(s.get("environment"), dict) else None
    run_version = s.get("software", {}).get("version", "?")
    rows = [("plantrig (run)", str(run_version)),
            ("report made", f"{_dt.datetime.now(_dt.UTC).isoformat(timespec='seconds')} by "
                            f"plantrig {__version__}")]
    if env:
        rows += [("git commit", env.get("git_commit") or "not a git checkout"),
                 ("host", str(env.get("host"))),
                 ("Python", str(env.get("python"))),
                 ("numpy / scipy / h5py", " / ".join(str(env.get(k) or "not installed")
                                                     for k in ("numpy", "scipy", "h5py")))]
    else:
        rows.append(("run environment", "not recorded by this run (host, versions and git "
                                        f"commit are recorded from plantrig {__version__} "
                                        f"on); report made on Python "
                                        f"{platform.python_version()}"))
    sources = _json(record.folder / "sources.json").get("files", {})
    for role, name in (("rig", "rig.toml"), ("scenario", "scenario.toml"), ("model", None)):
        entry = next(((n, e) for n, e in sources.items() if isinstance(e, dict)
                      and e.get("role") == role), None)
        if entry is not None:     # the file as written, which may differ from its copy
            written = Path(str(entry[1].get("original") or entry[0])).name
            copy = entry[1].get("copy_sha256")
            what = "model module" if role == "model" else f"{role} file"
            rows.append((f"{what} SHA-256", f"{entry[1].get('sha256')} ({written} as "
                         "written" + (f"; {entry[0]} is its copy as run"
                                      if copy and copy != entry[1].get("sha256") else "")
                         + ")"))
            changes = entry[1].get("overrides") or []
            if changes:   # what the run changed on the command line, beside the file
                rows.append((f"{what} changed for this run", "; ".join(map(str, changes))
                             + f" (--set and options; {entry[0]} holds the result)"))
        elif name and (record.folder / name).is_file():
            digest = hashlib.sha256((record.folder / name).read_bytes()).hexdigest()
            rows.append((f"{role} {name} SHA-256", digest))
        elif role == "model":
            rows.append(("model module", "none (the model is in the rig file)"))
    v = readiness.verification
    rows.append(("manifest.json SHA-256", v.manifest_sha256 if v is not None else
                 "no verified manifest"))
    return rows


def manifest_section(folder: Path, readiness: Readiness) -> Section:
    """The manifest's own hash, what verify found when the report was made, and the hash
    of every file, labelled as not valid when the folder fails verify."""
    v = readiness.verification
    if v is None:
        why = "; ".join(readiness.problems) or "not checked"
        return ("Manifest: NONE", [("manifest", f"no verified manifest ({why})")])
    rows = [("manifest.json SHA-256", v.manifest_sha256),
            ("manifest written (UTC)", v.created_utc)]
    if readiness.not_intact:
        rows.append(("verify at report time", "FAILED: " + "; ".join(readiness.not_intact)))
    else:
        rows.append(("verify at report time", f"ok, {v.checked} files match"))
    signature = {"absent": "none (plantrig sign adds one)",
                 "not checked": "present, not checked here (check it with plantrig verify "
                                "--public-key)"}.get(v.signature, v.signature)
    rows.append(("signature", signature + (f"; {v.signature_detail}"
                                           if v.signature_detail else "")))
    files = _json(folder / "manifest.json").get("files", {})
    rows += [(name, str(entry.get("sha256", ""))) for name, entry in sorted(files.items())
             if isinstance(entry, dict)]
    title = ("Manifest (FAILS VERIFY: the hashes below are as listed, not as found)"
             if readiness.not_intact else "Manifest (SHA-256)")
    return (title, rows)


def record_rows(record: RunRecord, s: dict[str, Any]) -> Rows:
    rows: Rows = [("tick data read from", record.source)]
    rec: dict[str, Any] = s["record"] if isinstance(s.get("record"), dict) else {}
    rows += [("record problem", str(p)) for p in rec.get("problems", [])]
    rows += [("lost from the record", str(p)) for p in rec.get("lost", [])]
    if not rec.get("problems") and not rec.get("lost"):
        rows.append(("record", "complete: every recorded tick is in the files"))
    if "recovery" in s:
        r = s["recovery"]
        lost = r.get("lost_rows")
        rows.append(("recovered", "rebuilt after the rig died: " + (
            f"{lost} ticks lost ({fmt(r.get('lost_ms'))} ms)" if lost is not None else
            "the tape was gone, ticks after the journal's last row are unknown")))
    recorder = s.get("recorder") or {}
    if recorder:
        counts = ", ".join(f"{RECORDER_WORDS[k]} {recorder[k]}" for k in RECORDER_WORDS
                           if recorder.get(k) is not None)
        state = []
        if recorder.get("disk_error"):
            state.append(f"disk error: {recorder['disk_error']}")
        if recorder.get("orphaned"):
            state.append("it lost its rig process and ended on its own")
        rows.append(("recorder", counts + ("; " + "; ".join(state) if state else
                                           "; no disk error")))
    return rows


def limit_rows(ctx: PlotContext) -> Rows:
    if ctx.rig_note and not ctx.limits:
        return [("limits", ctx.rig_note)]
    if not ctx.limits:
        return [("limits", "none in this rig")]
    from plantrig._limit_use import limit_use
    rows: Rows = []
    for lim in ctx.limits:
        if lim.column not in ctx.record:
            continue
        use = limit_use(ctx.record, lim)
        rows.append((lim.name, f"watches {label(lim.column)}; {use.bands_text}; "
                               f"peak use {use.peak:.3f} of the trip band at "
                               f"{use.peak_time:.4g} s ({lim.column} = "
                               f"{use.peak_value:.6g} {lim.unit})".rstrip()
                     + (f"; {lim.description}" if lim.description else "")))
    return rows or [("limits", "none on a recorded signal")]


def model_rows(s: dict[str, Any]) -> Rows:
    model = s.get("model", {})
    names = {"kind": "model kind", "states": "states", "inputs": "inputs",
             "outputs": "outputs", "stability": "stability",
             "controllability_rank": "controllability rank",
             "observability_rank": "observability rank"}
    rows = [(names[k], fmt(model[k])) for k in names if k in model]
    for re_, im in model.get("eigenvalues", []):
        rows.append(("eigenvalue", f"{re_:+.6g} {im:+.6g}j"))
    if model.get("time_constants_s"):
        rows.append(("time constants [s]",
                     ", ".join(f"{v:.4g}" for v in model["time_constants_s"])))
    rows += [("warning", w) for w in model.get("warnings", [])]
    return rows or [("model", "not recorded")]


def event_rows(record: RunRecord) -> Rows:
    return [(f"{ev['time']:.4f} s (tick {ev['tick']})" if ev["tick"] >= 0 else
             "before tick 0",           # the link's set-up, recorded as tick -1
             f"{event_word(ev['kind'])}: {ev.get('detail', '')}") for ev in record.events] \
        or [("events", "none")]


def event_word(kind: str) -> str:
    return EVENT_WORDS.get(kind, kind.replace("_", " "))


def overruns_of(record: RunRecord, s: dict[str, Any]) -> tuple[int | None, str]:
    """Overruns from the summary, else counted from the lateness column (a recovered
    run's summary is rebuilt from the ticks): a tick that started a whole tick late."""
    timing = s.get("timing", {})
    if timing.get("overruns") is not None:
        return int(timing["overruns"]), ""
    tick = (s.get("rig") or {}).get("tick_s")
    if "lateness" in record and tick:
        late = sum(int(np.count_nonzero(part >= float(tick)))
                   for part in column_parts(record.folder, "lateness"))
        return late, " (counted from the recorded lateness of each tick)"
    return None, ""


def link_rows(s: dict[str, Any]) -> Rows:
    """The link's health in the console's words (app/_console.py), then what a reviewer
    may also want: each refusal by its reason, and the counters the console leaves out."""
    health = s.get("link") or {}
    rows: Rows = []
    counts = {k: v for k, v in health.items() if k not in REHEARSED}
    if counts:
        kind = (s.get("link_used") or {}).get("kind", "serial")
        tick = float((s.get("rig") or {}).get("tick_s") or 0.0)
        rows += [("link", line.removeprefix("link: "))
                 for line in link_lines(counts, tick, kind).splitlines()]
        refused = [f"{REFUSAL_WORDS[k.partition('_')[0]]} {k.partition('_')[2].replace('_', ' ')}"
                   f" {v:.0f}" for k, v in sorted(counts.items())
                   if k.startswith(("bad_", "rejected_")) and v]
        rows.append(("refused, by reason", ", ".join(refused) or "none"))
        more = [f"{words} {counts[k]:.0f}" for k, words in MORE_LINK_WORDS.items()
                if k in counts]
        if more:
            rows.append(("link, more counts", ", ".join(more)))
    rehearsed = [f"{v:.0f} {REHEARSED[k]}" for k, v in health.items() if k in REHEARSED and v]
    if rehearsed:
        rows.append(("rehearsed link faults", ", ".join(rehearsed)))
    return rows


def timing_rows(record: RunRecord, s: dict[str, Any]) -> Rows:
    rows = link_rows(s)
    if not any(key == "link" for key, _ in rows):
        rows.insert(0, ("link", "none (built-in controller)"))
    elif "fresh" in record and len(record.rows):
        fresh = sum(float(part.sum()) for part in column_parts(record.folder, "fresh"))
        total = record.ticks_total if record.ticks_total >= 0 else len(record.rows)
        rows.append(("fresh commands", f"{fresh / max(1, total) * 100:.2f} % of ticks"))
    timing = s.get("timing", {})
    if s.get("mode") != "realtime":
        rows.append(("timing", "fast mode: ticks were not paced to the wall clock, so "
                               "lateness and overruns do not apply; wall time "
                               f"{human_duration(float(timing.get('wall_s') or 0.0))}"))
        if timing.get("ticks_in_c"):
            rows.append(("plain ticks in C", f"{timing['ticks_in_c']} of "
                         f"{timing.get('ticks', '?')} (the same record as ticks in Python)"))
        return rows
    res = timing.get("timing_resolution_s")
    res_text = f" (to {res * 1e6:g} us)" if res else ""
    for key, what in (("lateness", "lateness"), ("exec", "work time")):
        values = [timing.get(f"{key}_{q}_s") for q in ("p50", "p99", "max")]
        if all(v is not None for v in values):
            rows.append((what, "p50 {}, p99 {}, max {}".format(
                *(human_duration(float(v)) for v in values)) + res_text))
    overruns, how = overruns_of(record, s)
    rows.append(("overruns", f"{overruns}{how}" if overruns is not None else "not recorded"))
    if timing.get("skipped_slots") is not None:
        rows.append(("skipped slots", str(timing["skipped_slots"])))
    if timing.get("scheduler"):
        rows.append(("scheduler", str(timing["scheduler"])))
    if timing.get("cpu") is not None:
        rows.append(("cpu", str(timing["cpu"])))
    if timing.get("wall_s") is not None:
        rows.append(("wall time", human_duration(float(timing["wall_s"]))))
    return rows


def fmt(value: Any) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if value is None:
        return "none"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def _seconds(value: Any) -> str:
    if not isinstance(value, int | float):
        return "?"
    return f"{value * 1e3:g} ms" if value < 1 else f"{value:g} s"


def _json(path: Path) -> dict[str, Any]:
    try:
        doc = json.loads(path.read_text())
    except (OSError, ValueError):
        return {}
    return doc if isinstance(doc, dict) else {}


def _toml_list(path: Path, key: str) -> list[Any]:
    """The top-level list ``key`` of a TOML file, or [] (missing, unreadable)."""
    try:
        value = tomllib.loads(path.read_text()).get(key, [])
    except (OSError, tomllib.TOMLDecodeError):
        return []
    return value if isinstance(value, list) else []


def _toml_field(path: Path, table: str, key: str) -> str:
    try:
        value = tomllib.loads(path.read_text()).get(table, {}).get(key, "")
    except (OSError, tomllib.TOMLDecodeError):
        return ""
    return value if isinstance(value, str) else ""
