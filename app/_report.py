"""The sign-off report of a run: report.html (self-contained) and report.pdf.

Both carry the same content, in this order: identity of the run (rig, date, operator,
witness, software, outcome and exit code), the manifest (its own SHA-256, what verify
found when the report was made, the signature, the hash of every file), the acceptance
rules as judged after the run, model summary, verdicts, event
timeline, signal plots with their range bands and fault and trip windows marked, limit
use, link and timing statistics with a lateness histogram. Images are rendered once with
matplotlib (Agg) and embedded in the HTML as base64 PNG; the PDF is written with PdfPages.

A report is written beside the record (``derived/``), never into what the manifest
covers, so making one never changes the manifest or voids a signature; it names the
manifest's SHA-256 instead, which ties it to exactly one state of the record. A draft
(a folder that is still being written, not finished or fails verify) is named
``DRAFT-report.*`` and says so on every page and in every image.

Column meanings (shared with the dashboard): ``fault:<name>`` and ``trip:<name>`` are
non-zero while the fault or interlock is active; ``limit:<name>`` is the fraction of a
limit in use, above 1 beyond it.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import json
import tempfile
import tomllib
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig import CAUTION, __version__
from plantrig.sim._reader import RunRecord
from plantrig.sim._signoff import DRAFT_MARK, DRAFT_PREFIX, Readiness, check_folder

PLOT_POINTS = 4000           # per trace, min/max envelope beyond this
PANELS_PER_PAGE = 5
GROUPS = (("reference", "ref"), ("plant input (applied)", "u"), ("plant output (true)", "y"),
          ("plant state (true)", "x"), ("controller command", "cmd"),
          ("controller reads", "sent"))        # plantrig.sim.SIGNAL_LABELS' words
INK, BAND, FAULT, TRIP, LIMIT = "#1f3b57", "#d9534f", "#f0ad4e", "#8e44ad", "#2a9d8f"
DRAFT_INK = "#c0392b"
PAGE = (8.27, 11.69)         # A4 portrait, inches
TEXT_LINES_PER_PAGE = 80


def write_report(record: RunRecord, out_dir: Path, operator: str = "", witness: str = "",
                 readiness: Readiness | None = None, draft: bool = False) -> list[Path]:
    """Write report.html and report.pdf (DRAFT-report.* for a draft) into ``out_dir``;
    return their paths. ``readiness``: what check_folder found (checked here if None)."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.backends.backend_pdf import PdfPages

    readiness = readiness if readiness is not None else check_folder(record.folder)
    sections = _sections(record, operator, witness, readiness, draft)
    figures = _figures(record)
    if draft:
        for _title, fig in figures:
            _mark_draft(fig)
    out_dir.mkdir(parents=True, exist_ok=True)
    name = f"{DRAFT_PREFIX if draft else ''}report"
    html_path, pdf_path = out_dir / f"{name}.html", out_dir / f"{name}.pdf"
    html_path.write_text(_html(record, sections, figures, draft), encoding="utf-8")
    title = f"{'DRAFT ' if draft else ''}plantrig run {record.folder.name}"
    with PdfPages(pdf_path, metadata={"Title": title,
                                      "Creator": f"plantrig {__version__}"}) as pdf:
        for page in _text_pages(sections):
            if draft:
                _mark_draft(page)
            pdf.savefig(page)
            _close(page)
        for _title, fig in figures:
            pdf.savefig(fig)
    for _title, fig in figures:
        _close(fig)
    return [html_path, pdf_path]


# -- content -----------------------------------------------------------------------------

Section = tuple[str, list[tuple[str, str]]]


def _sections(record: RunRecord, operator: str, witness: str, readiness: Readiness,
              draft: bool) -> list[Section]:
    s = record.summary or _start_of(record.folder)   # a run not over: what it started as
    rig = s.get("rig", {})
    description = ""
    rig_file = record.folder / "rig.toml"
    if rig_file.exists():
        try:
            description = tomllib.loads(rig_file.read_text()).get("rig", {}).get(
                "description", "")
        except tomllib.TOMLDecodeError:
            description = "(rig.toml does not parse)"
    identity = [
        ("rig", f"{rig.get('name', '?')}" + (f" — {description}" if description else "")),
        ("run folder", record.folder.name),
        ("started (UTC)", str(s.get("started_utc", "?"))),
        ("mode", str(s.get("mode", "?"))),
        ("ended", f"{s['ended']}: {s.get('reason', '')}" if "ended" in s else
                  "not recorded: the run has no summary (not over, or it died)"),
        ("exit code", str(s.get("exit_code", "?"))),
        ("ticks", f"{s.get('ticks_recorded', len(record.rows))} of "
                  f"{s.get('ticks_planned', '?')} planned, tick {rig.get('tick_s', '?')} s"),
        ("operator", operator or "________________"),
        ("witness", witness or "________________"),
        ("software", f"plantrig {s.get('software', {}).get('version', '?')} "
                     f"(report by plantrig {__version__})"),
        ("rig file SHA-256", str(rig.get("sha256", "?"))),
        ("report made (UTC)", _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")),
        ("tick data read from", record.source),
    ]
    if "recovery" in s:
        r = s["recovery"]
        identity.append(("recovered", f"rebuilt after the rig died: {r.get('lost_rows')} "
                                      f"ticks lost ({r.get('lost_ms')} ms)"))
    if isinstance(s.get("record"), dict):
        identity += [("record problem", str(p)) for p in s["record"].get("problems", [])]
    model = s.get("model", {})
    model_rows = [(k, _fmt(model.get(k))) for k in
                  ("kind", "states", "inputs", "outputs", "stability",
                   "controllability_rank", "observability_rank") if k in model]
    for re_, im in model.get("eigenvalues", []):
        model_rows.append(("eigenvalue", f"{re_:+.6g} {im:+.6g}j"))
    if model.get("time_constants_s"):
        model_rows.append(("time constants [s]",
                           ", ".join(f"{v:.4g}" for v in model["time_constants_s"])))
    model_rows += [("warning", w) for w in model.get("warnings", [])]
    head = [(DRAFT_MARK, [("why", p) for p in readiness.problems] or [
        ("why", "made with --draft")])] if draft else []
    return head + [("Run identity", identity), _manifest_section(record.folder, readiness),
            ("Acceptance rules", _acceptance_rows(s)),
            ("Model summary", model_rows or [("model", "not recorded")]),
            ("Verdicts", _verdict_rows(record.folder)),
            ("Events", [(f"{ev['time']:.4f} s (tick {ev['tick']})",
                         f"{ev['kind']}: {ev.get('detail', '')}") for ev in record.events]
             or [("events", "none")]),
            ("Link and timing", _stat_rows(record)),
            ("Caution", [("", CAUTION)])]


def _start_of(folder: Path) -> dict[str, Any]:
    try:
        start = json.loads((folder / "run_start.json").read_text())
    except (OSError, ValueError):
        return {}
    return start if isinstance(start, dict) else {}


def _manifest_section(folder: Path, readiness: Readiness) -> Section:
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
    try:
        files = json.loads((folder / "manifest.json").read_text()).get("files", {})
    except (OSError, ValueError):
        files = {}
    rows += [(name, str(entry.get("sha256", ""))) for name, entry in sorted(files.items())
             if isinstance(entry, dict)]
    title = ("Manifest (FAILS VERIFY: the hashes below are as listed, not as found)"
             if readiness.not_intact else "Manifest (SHA-256)")
    return (title, rows)


def _acceptance_rows(summary: dict[str, Any]) -> list[tuple[str, str]]:
    """The run's acceptance rules as judged after it (summary "acceptance")."""
    rules = summary.get("acceptance")
    if not isinstance(rules, list) or not rules:
        return [("acceptance", "not judged (no acceptance results in the summary)")]
    mark = {True: "held", False: "FAILED", None: "n/a"}
    return [(str(r.get("rule", "?")), f"{mark.get(r.get('passed'), '?')}: "
             f"{r.get('measured', '')} (needs {r.get('needed', '')})")
            for r in rules if isinstance(r, dict)]


def _verdict_rows(folder: Path) -> list[tuple[str, str]]:
    path = folder / "verdicts.json"
    if not path.exists():
        return [("verdicts", "no acceptance criteria in this run")]
    try:
        doc = json.loads(path.read_text())
    except ValueError as exc:
        return [("verdicts", f"verdicts.json does not parse ({exc})")]
    items = doc.get("verdicts", doc) if isinstance(doc, dict) else doc
    if isinstance(items, dict):
        items = [{"name": k, **(v if isinstance(v, dict) else {"result": v})}
                 for k, v in items.items()]
    rows = []
    items = items if isinstance(items, list) else [items]
    judged = [i for i in items if isinstance(i, dict) and "passed" in i]
    if judged:
        passed = sum(bool(i["passed"]) for i in judged)
        rows.append(("result", f"{passed} of {len(judged)} criteria passed"
                     + ("" if passed == len(judged) else " — NOT ACCEPTED")))
    for i, item in enumerate(items):
        if not isinstance(item, dict):
            rows.append((f"#{i + 1}", _fmt(item)))
            continue
        name = str(item.get("name", f"#{i + 1}"))
        unit = f" {item['unit']}" if item.get("unit") else ""
        parts = []
        if "passed" in item:
            parts.append("PASS" if item["passed"] else "FAIL")
        if item.get("criterion"):
            parts.append(str(item["criterion"]))
        if "measured" in item:
            parts.append(f"measured {_fmt(item['measured'])}{unit}")
        if "limit" in item:
            parts.append(f"limit {_fmt(item['limit'])}{unit}")
        known = {"name", "passed", "criterion", "measured", "limit", "unit"}
        parts += [f"{k} {_fmt(v)}" for k, v in item.items() if k not in known and v not in
                  (None, "")]
        rows.append((name, "; ".join(parts)))
    return rows or [("verdicts", "verdicts.json lists no criteria")]


def _stat_rows(record: RunRecord) -> list[tuple[str, str]]:
    s = record.summary
    rows = [(f"link {k}", _fmt(v)) for k, v in sorted(s.get("link", {}).items())]
    if "fresh" in record and len(record.rows):
        rows.append(("fresh commands", f"{record['fresh'].mean() * 100:.2f} % of ticks"))
    timing = s.get("timing", {})
    for key in ("lateness_p50_s", "lateness_p99_s", "lateness_max_s", "exec_p50_s",
                "exec_p99_s", "exec_max_s"):
        if key in timing:
            rows.append((key.replace("_s", "").replace("_", " "),
                         f"{timing[key] * 1e6:.1f} us"))
    for key in ("overruns", "skipped_slots", "scheduler", "cpu", "wall_s", "ticks_per_s"):
        if timing.get(key) is not None:
            rows.append((key.replace("_", " "), _fmt(timing[key])))
    rec = s.get("recorder", {})
    if rec:
        rows.append(("recorder", ", ".join(f"{k} {_fmt(v)}" for k, v in rec.items())))
    return rows or [("statistics", "none recorded")]


def _fmt(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


# -- figures -----------------------------------------------------------------------------

def _figures(record: RunRecord) -> list[tuple[str, Any]]:
    out: list[tuple[str, Any]] = []
    if not len(record.rows):
        return out
    t = record.t
    windows = [(c, "fault", FAULT) for c in record.names("fault")] + \
              [(c, "trip", TRIP) for c in record.names("trip")]
    info = {c.get("name"): c for c in record.info}
    if record.events:
        out.append(("Event timeline", _timeline(record)))
    panels = [(group, name) for group, prefix in GROUPS for name in record.names(prefix)]
    pages = (len(panels) + PANELS_PER_PAGE - 1) // PANELS_PER_PAGE
    for page in range(pages):
        chunk = panels[page * PANELS_PER_PAGE:(page + 1) * PANELS_PER_PAGE]
        title = f"Signals ({page + 1} of {pages})"
        out.append((title, _signal_page(record, t, chunk, info, windows, title)))
    limits = record.names("limit")
    if limits:
        out.append(("Limit use", _limit_page(record, t, limits)))
    out.append(("Timing", _timing_page(record)))
    return out


def _envelope(t: NDArray[np.float64], v: NDArray[np.float64]) -> tuple[NDArray[np.float64],
                                                                        NDArray[np.float64]]:
    """At most PLOT_POINTS points, keeping each bucket's min and max (peaks stay)."""
    if len(t) <= PLOT_POINTS:
        return t, v
    buckets = PLOT_POINTS // 2
    edges = np.linspace(0, len(t), buckets + 1).astype(int)
    tt, vv = [], []
    for a, b in zip(edges[:-1], edges[1:], strict=True):
        seg = v[a:b]
        i, j = a + int(np.argmin(seg)), a + int(np.argmax(seg))
        for k in sorted((i, j)):
            tt.append(t[k])
            vv.append(v[k])
    return np.array(tt), np.array(vv)


def _spans(t: NDArray[np.float64], active: NDArray[np.bool_]) -> list[tuple[float, float]]:
    """(start, end) times of the runs of True in ``active``."""
    if not active.any():
        return []
    edges = np.flatnonzero(np.diff(np.concatenate([[0], active.astype(np.int8), [0]])))
    step = float(t[1] - t[0]) if len(t) > 1 else 0.0
    return [(float(t[a]), float(t[b - 1]) + step) for a, b in zip(edges[::2], edges[1::2],
                                                                  strict=True)]


def _signal_page(record: RunRecord, t: NDArray[np.float64], panels: list[tuple[str, str]],
                 info: dict[str, dict[str, Any]], windows: list[tuple[str, str, str]],
                 title: str) -> Any:
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(PANELS_PER_PAGE, 1, figsize=PAGE, sharex=True)
    fig.suptitle(title, fontsize=13, x=0.06, ha="left")
    for ax in axes[len(panels):]:
        ax.set_visible(False)
    for ax, (group, name) in zip(axes, panels, strict=False):
        v = record[name]
        tt, vv = _envelope(t, v)
        ax.plot(tt, vv, color=INK, lw=1.0)
        meta = info.get(name, {})
        lo, hi = meta.get("min"), meta.get("max")
        span = [x for x in (lo, hi, float(np.nanmin(v)) if v.size else None,
                            float(np.nanmax(v)) if v.size else None) if x is not None
                and np.isfinite(x)]
        if lo is not None or hi is not None:
            pad = 0.08 * ((max(span) - min(span)) or 1.0)
            bottom, top = min(span) - pad, max(span) + pad
            if lo is not None:
                ax.axhspan(bottom, lo, color=BAND, alpha=0.12, lw=0)
                ax.axhline(lo, color=BAND, lw=0.8, ls="--")
            if hi is not None:
                ax.axhspan(hi, top, color=BAND, alpha=0.12, lw=0)
                ax.axhline(hi, color=BAND, lw=0.8, ls="--")
            ax.set_ylim(bottom, top)
        for column, kind, colour in windows:
            for a, b in _spans(t, record[column] != 0):
                ax.axvspan(a, b, color=colour, alpha=0.25, lw=0,
                           label=f"{kind} {column.partition(':')[2]}")
        handles, labels = ax.get_legend_handles_labels()
        if labels:
            unique = dict(zip(labels, handles, strict=True))
            ax.legend(unique.values(), unique.keys(), fontsize=7, loc="upper right")
        unit = record.unit(name)
        ax.set_ylabel(f"{name.partition(':')[2]}" + (f" [{unit}]" if unit else ""),
                      fontsize=9)
        ax.grid(True, lw=0.3, alpha=0.6)
        ax.set_title(f"{group} {name.partition(':')[2]}", fontsize=9, loc="left")
        if lo is not None or hi is not None:
            ax.set_title(f"range {_bound(lo)} .. {_bound(hi)} {unit}", fontsize=8,
                         loc="right", color=BAND)
    last = axes[len(panels) - 1]
    last.set_xlabel("plant time [s]")
    last.xaxis.set_tick_params(labelbottom=True)
    fig.tight_layout(rect=(0, 0, 1, 0.97))
    return fig


def _bound(value: float | None) -> str:
    return "-inf" if value is None else f"{value:g}"


def _limit_page(record: RunRecord, t: NDArray[np.float64], names: list[str]) -> Any:
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=PAGE)
    for name in names:
        tt, vv = _envelope(t, record[name])
        ax.plot(tt, vv, lw=1.0, label=name.partition(":")[2])
    ax.axhline(1.0, color=BAND, ls="--", lw=0.9, label="at the limit")
    ax.set_title("Limit use (fraction of each limit; above 1 is beyond it)", fontsize=11)
    ax.set_xlabel("plant time [s]")
    ax.legend(fontsize=7)
    ax.grid(True, lw=0.3, alpha=0.6)
    fig.tight_layout(rect=(0, 0.5, 1, 1))
    return fig


def _timeline(record: RunRecord) -> Any:
    import matplotlib.pyplot as plt

    kinds = sorted({ev["kind"] for ev in record.events})
    fig, ax = plt.subplots(figsize=PAGE)
    for i, kind in enumerate(kinds):
        times = [ev["time"] for ev in record.events if ev["kind"] == kind]
        ax.scatter(times, [i] * len(times), marker="|", s=300, color=LIMIT if kind != "error"
                   else BAND)
    ax.set_yticks(range(len(kinds)), kinds, fontsize=8)
    ax.set_ylim(-0.7, len(kinds) - 0.3)
    if len(record.rows):
        lo, hi = float(record.t[0]), float(record.t[-1])
        ax.set_xlim(lo - 0.02 * (hi - lo), hi + 0.02 * (hi - lo) + 1e-9)
    ax.set_xlabel("plant time [s]")
    ax.set_title("Event timeline", fontsize=11)
    ax.grid(True, axis="x", lw=0.3, alpha=0.6)
    fig.tight_layout(rect=(0, 1 - min(0.9, 0.2 + 0.03 * len(kinds)), 1, 1))
    return fig


def _timing_page(record: RunRecord) -> Any:
    import matplotlib.pyplot as plt

    fig, (a, b) = plt.subplots(2, 1, figsize=PAGE)
    late = record["lateness"] * 1e6 if "lateness" in record else np.zeros(0)
    work = record["exec_time"] * 1e6 if "exec_time" in record else np.zeros(0)
    for ax, values, what in ((a, late, "lateness"), (b, work, "work time")):
        if values.size and values.any():
            ax.hist(values, bins=80, color=INK)
            ax.set_yscale("log")
            for q, style in ((50, ":"), (99, "--")):
                p = float(np.percentile(values, q))
                ax.axvline(p, color=BAND, ls=style, lw=1, label=f"p{q} {p:.1f} us")
            ax.legend(fontsize=8)
            ax.set_xlabel(f"{what} per tick [us]")
            ax.set_ylabel("ticks")
        else:
            ax.text(0.5, 0.5, f"no {what} recorded (fast mode)", ha="center",
                    va="center", transform=ax.transAxes)
            ax.set_xticks([])
            ax.set_yticks([])
        ax.set_title(f"Tick {what}", fontsize=11)
    fig.tight_layout(rect=(0, 0.35, 1, 1))
    return fig


# -- output --------------------------------------------------------------------------------

def _text_pages(sections: list[Section]) -> list[Any]:
    """All text sections flowed over as many A4 pages as they need."""
    import textwrap

    import matplotlib.pyplot as plt

    lines: list[tuple[str, bool]] = []     # (text, is a heading)
    for title, rows in sections:
        if lines:
            lines.append(("", False))
        lines.append((title, True))
        for key, value in rows:
            wrapped = textwrap.wrap(value, 70) or [""]
            lines.append((f"{key[:26]:<28}{wrapped[0]}", False))
            lines += [(" " * 28 + w, False) for w in wrapped[1:]]
    pages = []
    for start in range(0, len(lines), TEXT_LINES_PER_PAGE):
        fig = plt.figure(figsize=PAGE)
        y = 0.96
        for text, heading in lines[start:start + TEXT_LINES_PER_PAGE]:
            fig.text(0.06, y, text, va="top", fontsize=10 if heading else 7,
                     weight="bold" if heading else "normal",
                     family="sans-serif" if heading else "monospace")
            y -= 0.92 / TEXT_LINES_PER_PAGE
        pages.append(fig)
    return pages


def _mark_draft(fig: Any) -> None:
    """The draft mark at the top and bottom of a page and across it."""
    for x, y, ha, va in ((0.97, 0.998, "right", "top"), (0.5, 0.004, "center", "bottom")):
        fig.text(x, y, DRAFT_MARK, ha=ha, va=va, fontsize=9, weight="bold", color=DRAFT_INK)
    fig.text(0.5, 0.5, DRAFT_MARK, ha="center", va="center", rotation=55, fontsize=44,
             weight="bold", color=DRAFT_INK, alpha=0.13)


def _png(fig: Any) -> str:
    with tempfile.SpooledTemporaryFile(max_size=1 << 24) as buf:   # no name "io" here:
        fig.savefig(buf, format="png", dpi=90)                      # ./io shadows it for
        buf.seek(0)                                                 # type checkers
        return base64.b64encode(buf.read()).decode("ascii")


def _html(record: RunRecord, sections: list[Section], figures: list[tuple[str, Any]],
          draft: bool) -> str:
    """One page; a draft has a bar fixed at the top (printed on every sheet) and the
    mark again before every section and image."""
    esc = html.escape
    mark = f"<p class='draft'>{DRAFT_MARK}</p>" if draft else ""
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{DRAFT_MARK + ': ' if draft else ''}plantrig run "
        f"{esc(record.folder.name)}</title><style>",
        "body{font-family:sans-serif;max-width:60em;margin:2em auto;color:#1d2630}",
        "table{border-collapse:collapse;margin-bottom:1.5em;width:100%}",
        "td{border-bottom:1px solid #d5dbe1;padding:2px 8px;vertical-align:top;"
        "font-size:0.9em}td:first-child{white-space:nowrap;color:#4a5866;width:14em}",
        "td.hash{font-family:monospace;font-size:0.8em}img{max-width:100%}",
        "h1{font-size:1.5em}h2{font-size:1.15em;border-bottom:2px solid #1f3b57}",
        f".draft,.draft-bar{{text-align:center;font-weight:bold;color:{DRAFT_INK};"
        f"background:#fdecea;border:2px solid {DRAFT_INK};padding:4px}}",
        ".draft-bar{position:fixed;top:0;left:0;right:0}body.draft-page{padding-top:3em}",
        "</style></head>",
        f"<body class='draft-page'><div class='draft-bar'>{DRAFT_MARK}</div>" if draft
        else "<body>",
        f"<h1>{DRAFT_MARK + ': ' if draft else ''}Run record: {esc(record.folder.name)}</h1>",
    ]
    for title, rows in sections:
        parts.append(f"{mark}<h2>{esc(title)}</h2><table>")
        cls = " class='hash'" if title.startswith("Manifest") else ""
        for key, value in rows:
            parts.append(f"<tr><td>{esc(key)}</td><td{cls}>{esc(value)}</td></tr>")
        parts.append("</table>")
    for title, fig in figures:
        parts.append(f"{mark}<h2>{esc(title)}</h2><img alt='{esc(title)}' "
                     f"src='data:image/png;base64,{_png(fig)}'>")
    parts.append("</body></html>\n")
    return "\n".join(parts)


def _close(fig: Any) -> None:
    import matplotlib.pyplot as plt

    plt.close(fig)
