"""The sign-off report of a run: report.html (self-contained) and report.pdf.

Both carry the same content in the same order (app/_report_text.py): page 1 is the
result at a glance, the run's identity (rig, scenario, run id, the UTC time of tick 0,
the device under test and the link used), the acceptance rules and the verdicts; then
the signature block, the software and the hashes; then the manifest, the record, the
limits, the model, the events, link and timing. The plots follow (app/_plots.py, the
same code as ``plantrig plot``): an event timeline, every signal with its reference,
limit lines, trips, faults and disturbances, the limit-use page and, for a real-time
run only, the timing histograms. Every PDF page says "page N of M" and the run id.

A report is written beside the record (``derived/``), never into what the manifest
covers, so making one never changes the manifest or voids a signature; it names the
manifest's SHA-256 instead, which ties it to exactly one state of the record. A draft
(a folder that is still being written, not finished or fails verify) is named
``DRAFT-report.*`` and says so on every page and in every image.
"""

from __future__ import annotations

import base64
import html
import tempfile
import textwrap
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from plantrig import CAUTION, __version__
from plantrig._console import human_duration
from plantrig._limit_use import limit_use
from plantrig._plots import (
    ALARM,
    ATTENTION,
    GRID,
    INK,
    INK_SOFT,
    PLANT_BLUE,
    PlotContext,
    context,
    draw_panel,
    label,
    legend_beside,
    mark_trips,
    shade_windows,
    standard_panels,
)
from plantrig._report_text import (
    Section,
    event_word,
    passed,
    result_line,
    run_facts,
    sections,
)
from plantrig.sim import (
    DRAFT_MARK,
    DRAFT_PREFIX,
    Readiness,
    RunRecord,
    check_folder,
    column_parts,
)

PAGE = (8.27, 11.69)         # A4 portrait, inches
PANELS_PER_PAGE = 4
LIMITS_PER_PAGE = 4
DRAFT_INK = "#c0392b"
PASS_FILL, FAIL_FILL = "#e4e9e2", "#f6dcdc"
# text layout, in inches from the top-left corner of the page
LEFT, KEY_W, VALUE_X, RIGHT = 0.6, 2.15, 2.9, 7.75
TOP, BOTTOM = 0.75, 11.0
BODY_PT, HEAD_PT = 7.5, 10.5
LINE_IN = BODY_PT * 1.4 / 72


def write_report(record: RunRecord, out_dir: Path, operator: str = "", witness: str = "",
                 readiness: Readiness | None = None, draft: bool = False,
                 reviewer: str = "") -> list[Path]:
    """Write report.html and report.pdf (DRAFT-report.* for a draft) into ``out_dir``;
    return their paths. ``readiness``: what check_folder found (checked here if None)."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.backends.backend_pdf import PdfPages

    readiness = readiness if readiness is not None else check_folder(record.folder)
    ctx = context(record)
    people = {"operator": operator, "witness": witness, "reviewer": reviewer}
    content = sections(record, ctx, readiness, draft, people)
    facts = run_facts(record)
    figures = _figures(ctx, facts)
    text_pages = _text_pages(record, facts, content)
    pages = text_pages + [fig for _title, fig in figures]
    run_id = record.folder.name
    for number, page in enumerate(pages, start=1):
        _frame(page, run_id, number, len(pages), draft)
    out_dir.mkdir(parents=True, exist_ok=True)
    name = f"{DRAFT_PREFIX if draft else ''}report"
    html_path, pdf_path = out_dir / f"{name}.html", out_dir / f"{name}.pdf"
    html_path.write_text(_html(record, facts, content, figures, draft), encoding="utf-8")
    title = f"{'DRAFT ' if draft else ''}plantrig run {run_id}"
    with PdfPages(pdf_path, metadata={"Title": title,
                                      "Creator": f"plantrig {__version__}"}) as pdf:
        for page in pages:
            pdf.savefig(page)
    for page in pages:
        _close(page)
    return [html_path, pdf_path]


# -- text pages ------------------------------------------------------------------------------

class _Flow:
    """Lays text out down A4 pages, starting a new page when one is full."""

    def __init__(self) -> None:
        self.pages: list[Any] = []
        self.y = BOTTOM          # forces a new page on the first line

    def need(self, inches: float) -> None:
        if self.y + inches > BOTTOM:
            import matplotlib.pyplot as plt

            self.pages.append(plt.figure(figsize=PAGE))
            self.y = TOP

    def text(self, x: float, text: str, **kw: Any) -> None:
        self.pages[-1].text(x / PAGE[0], 1 - self.y / PAGE[1], text, va="top", **kw)

    def heading(self, title: str) -> None:
        self.need(LINE_IN * 3.2)
        self.y += LINE_IN * 0.6
        self.text(LEFT, title, fontsize=HEAD_PT, weight="bold", color=INK)
        self.y += LINE_IN * 1.25
        self.pages[-1].add_artist(_rule(self.y - LINE_IN * 0.3))

    def row(self, key: str, value: str, mono: bool = False) -> None:
        keys = _wrap(key, KEY_W, BODY_PT)
        values = _wrap(value, RIGHT - VALUE_X, BODY_PT, mono)
        for i in range(max(len(keys), len(values))):
            self.need(LINE_IN)
            if i < len(keys):
                self.text(LEFT, keys[i], fontsize=BODY_PT, color=INK_SOFT)
            if i < len(values):
                self.text(VALUE_X, values[i], fontsize=BODY_PT, color=INK,
                          family="monospace" if mono else "sans-serif")
            self.y += LINE_IN
        self.y += LINE_IN * 0.1


def _rule(y_in: float) -> Any:
    from matplotlib.lines import Line2D

    y = 1 - y_in / PAGE[1]
    return Line2D([LEFT / PAGE[0], RIGHT / PAGE[0]], [y, y], lw=0.8, color=INK_SOFT)


def _wrap(text: str, width_in: float, size_pt: float, mono: bool = False) -> list[str]:
    """Lines of ``text`` that fit ``width_in`` (average glyph width, DejaVu Sans about
    0.56 em, monospace 0.6 em: common practice for estimating, with a margin)."""
    chars = max(8, int(width_in * 72 / (size_pt * (0.62 if mono else 0.58))))
    lines: list[str] = []
    for part in str(text).split("\n"):
        lines += textwrap.wrap(part, chars, break_long_words=True,
                               break_on_hyphens=False) or [""]
    return lines


def _text_pages(record: RunRecord, facts: dict[str, Any], content: list[Section]) -> list[Any]:
    flow = _Flow()
    flow.need(1.6)
    flow.text(LEFT, "Run record for sign-off", fontsize=17, weight="bold", color=INK)
    flow.y += 0.34
    rig = facts.get("rig", {}).get("name", "?")
    flow.text(LEFT, f"rig {rig} — run {record.folder.name}", fontsize=10, color=INK_SOFT)
    flow.y += 0.32
    ok = passed(facts)
    fill, ink = (PASS_FILL, INK) if ok else (FAIL_FILL, ALARM)
    from matplotlib.patches import Rectangle

    # every line of the result (a long trip reason wraps, never cut), in a box that
    # holds them all; bold glyphs are wider than _wrap's average, so wrap narrower
    lines = _wrap(result_line(facts), (RIGHT - LEFT - 0.3) * 0.93, 11)
    height = 0.1 + 0.22 * len(lines)
    flow.pages[-1].add_artist(Rectangle(
        (LEFT / PAGE[0], 1 - (flow.y + height) / PAGE[1]), (RIGHT - LEFT) / PAGE[0],
        height / PAGE[1], transform=flow.pages[-1].transFigure, facecolor=fill,
        edgecolor=ink, lw=1.4))
    flow.y += 0.06
    for line in lines:
        flow.text(LEFT + 0.12, line, fontsize=11, weight="bold", color=ink)
        flow.y += 0.22
    flow.y += 0.14
    for title, rows in content:
        flow.heading(title)
        mono = title.startswith("Manifest")
        for key, value in rows:
            flow.row(key, value, mono=mono and len(value) == 64)
    flow.heading("Caution")
    flow.row("", CAUTION)
    return flow.pages


# -- figures -----------------------------------------------------------------------------

def _figures(ctx: PlotContext, facts: dict[str, Any]) -> list[tuple[str, Any]]:
    record = ctx.record
    out: list[tuple[str, Any]] = []
    if not len(record.rows):
        return out
    if record.events:
        out.append(("Event timeline", _timeline(ctx)))
    panels = standard_panels(ctx)
    pages = (len(panels) + PANELS_PER_PAGE - 1) // PANELS_PER_PAGE
    for page in range(pages):
        chunk = panels[page * PANELS_PER_PAGE:(page + 1) * PANELS_PER_PAGE]
        title = f"Signals ({page + 1} of {pages})"
        out.append((title, _signal_page(ctx, chunk, title)))
    limits = [lim for lim in ctx.limits if lim.column in record]
    for start in range(0, len(limits), LIMITS_PER_PAGE):
        out.append(("Limit use", _limit_page(ctx, limits[start:start + LIMITS_PER_PAGE])))
    if facts.get("mode") == "realtime":
        out.append(("Timing", _timing_page(record)))
    return out


def _signal_page(ctx: PlotContext, panels: list[Any], title: str) -> Any:
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(PANELS_PER_PAGE, 1, figsize=PAGE, sharex=True)
    fig.suptitle(title, fontsize=12, x=0.07, y=0.955, ha="left")
    for ax in axes[len(panels):]:
        ax.set_visible(False)
    for ax, panel in zip(axes, panels, strict=False):
        draw_panel(ax, ctx, panel)
    last = axes[len(panels) - 1]
    last.set_xlabel("plant time [s]", fontsize=8)
    last.xaxis.set_tick_params(labelbottom=True)
    fig.tight_layout(rect=(0.02, 0.04, 0.98, 0.94))
    return fig


def _limit_page(ctx: PlotContext, limits: list[Any]) -> Any:
    """Each limit's watched signal as a fraction of its trip band (app/_limit_use.py)."""
    import matplotlib.pyplot as plt

    record = ctx.record
    fig, axes = plt.subplots(LIMITS_PER_PAGE, 1, figsize=PAGE, sharex=True)
    fig.suptitle("Limit use: each watched signal as a fraction of its trip band "
                 "(1 = trip bound)", fontsize=11, x=0.07, y=0.955, ha="left")
    for ax in axes[len(limits):]:
        ax.set_visible(False)
    for ax, lim in zip(axes, limits, strict=False):
        use = limit_use(record, lim)
        ax.plot(use.t, np.minimum(use.use, 10.0), color=PLANT_BLUE, lw=1.4,
                label=f"{label(lim.column)} (use)")
        if use.rate_use is not None:
            ax.plot(use.rate_t, np.minimum(use.rate_use, 10.0), color=INK_SOFT, lw=0.8,
                    label="rate of change (use)")
        ax.axhline(1.0, color=ALARM, lw=1.1, label="trip bound")
        for w in sorted(set(round(w, 9) for w in use.warn_fractions)):
            ax.axhline(w, color=ATTENTION, lw=1.0, ls=(0, (5, 3)), label=f"warn {w:.3g}")
        shade_windows(ax, ctx)
        mark_trips(ax, ctx)
        top = max(1.15, min(float(np.max(use.use)) if len(use.use) else 1.0, 10.0) * 1.08)
        ax.set_ylim(min(0.0, float(np.min(use.use)) if len(use.use) else 0.0), top)
        _note_peak(ax, use.peak, use.peak_time, top)
        ax.set_title("\n".join(_wrap(f"{lim.name}: {use.bands_text}", 6.6, 7.5)),
                     fontsize=7.5, loc="left")
        ax.set_ylabel("fraction of trip band", fontsize=7.5)
        ax.grid(True, lw=0.4, color=GRID)
        ax.tick_params(labelsize=7)
        legend_beside(ax)
    axes[len(limits) - 1].set_xlabel("plant time [s]", fontsize=8)
    axes[len(limits) - 1].xaxis.set_tick_params(labelbottom=True)
    fig.tight_layout(rect=(0.02, 0.04, 0.98, 0.94))
    return fig


def _note_peak(ax: Any, peak: float, when: float, top: float) -> None:
    """"peak P at T s" beside the peak, on the side that keeps it inside the axes (a
    peak at the run's end or near 0 wrote it past the frame)."""
    lo, hi = ax.get_xlim()
    right = when > (lo + hi) / 2
    low = min(peak, 10.0) < 0.5 * top
    ax.annotate(f"peak {peak:.3f} at {when:.4g} s", (when, min(peak, 10.0)),
                xytext=(-4 if right else 4, 4 if low else -4), textcoords="offset points",
                ha="right" if right else "left", va="bottom" if low else "top",
                fontsize=7, color=INK)


def _timeline(ctx: PlotContext) -> Any:
    import matplotlib.pyplot as plt

    record = ctx.record
    kinds = sorted({ev["kind"] for ev in record.events})
    fig, ax = plt.subplots(figsize=PAGE)
    for i, kind in enumerate(kinds):
        times = [ev["time"] for ev in record.events if ev["kind"] == kind]
        # above the grid: a mark on a grid line (an event at 1.0 s, the run's end) was
        # drawn under it and all but vanished at print resolution
        ax.scatter(times, [i] * len(times), marker="|", s=300, zorder=3,
                   color=ALARM if kind in ("trip", "estop", "error", "rule_failed") else INK)
    ax.set_yticks(range(len(kinds)), [event_word(k) for k in kinds], fontsize=8)
    ax.set_ylim(-0.7, len(kinds) - 0.3)
    shade_windows(ax, ctx)
    lo, hi = float(record.t[0]), float(record.t[-1])
    ax.set_xlim(lo - 0.02 * (hi - lo), hi + 0.02 * (hi - lo) + 1e-9)
    ax.set_xlabel("plant time [s]")
    ax.set_title("Event timeline (faults and disturbances shaded)", fontsize=11, loc="left")
    ax.grid(True, axis="x", lw=0.4, color=GRID)
    fig.tight_layout(rect=(0.02, 1 - min(0.9, 0.2 + 0.03 * len(kinds)), 0.98, 0.94))
    return fig


def _histogram(record: RunRecord, column: str, bins: int = 80
               ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """(counts, bin edges in us) of one timing column over every tick, read a part at a
    time in two passes (never the whole run); empty when every value is 0."""
    top = 0.0
    for part in column_parts(record.folder, column):
        top = max(top, float(np.nanmax(part)) * 1e6 if part.size else 0.0)
    if not top > 0.0:
        return np.zeros(0), np.zeros(0)
    edges = np.linspace(0.0, top, bins + 1)
    counts = np.zeros(bins)
    for part in column_parts(record.folder, column):
        counts += np.histogram(part * 1e6, bins=edges)[0]
    return counts, edges


def _timing_page(record: RunRecord) -> Any:
    """Histograms of every tick's lateness and work time, with the p50 and p99 the
    summary holds (the engine's own timing histogram, as the console says them)."""
    import matplotlib.pyplot as plt

    fig, (a, b) = plt.subplots(2, 1, figsize=PAGE)
    timing = record.summary.get("timing") or {}
    for ax, column, key, what in ((a, "lateness", "lateness", "lateness"),
                                  (b, "exec_time", "exec", "work time")):
        counts, edges = _histogram(record, column) if column in record else \
            (np.zeros(0), np.zeros(0))
        if counts.size:
            # microseconds, or milliseconds once a stall stretches the axis past 5 ms
            unit, per_us = ("ms", 1e-3) if edges[-1] > 5000.0 else ("us", 1.0)
            ax.stairs(counts, edges * per_us, fill=True, color=PLANT_BLUE)
            ax.set_yscale("log")
            marks = [(q, style, timing.get(f"{key}_p{q}_s"))
                     for q, style in ((50, ":"), (99, "--"))]
            for q, style, value in marks:
                if value is not None:
                    ax.axvline(value * 1e6 * per_us, color=ALARM, ls=style, lw=1,
                               label=f"p{q} {human_duration(value)}")
            if any(value is not None for _, _, value in marks):
                ax.legend(fontsize=8)
            ax.set_xlabel(f"{what} per tick [{unit}]")
            ax.set_ylabel("ticks")
        else:
            ax.text(0.5, 0.5, f"no {what} recorded", ha="center", va="center",
                    transform=ax.transAxes)
            ax.set_xticks([])
            ax.set_yticks([])
        ax.set_title(f"Tick {what}", fontsize=11, loc="left")
    fig.tight_layout(rect=(0.02, 0.35, 0.98, 0.94))
    return fig


# -- output --------------------------------------------------------------------------------

def _frame(fig: Any, run_id: str, number: int, total: int, draft: bool) -> None:
    """The run id and "page N of M" on every page (and the draft mark on a draft's)."""
    fig.text(0.07, 0.985, f"plantrig run record — {run_id}", ha="left", va="top",
             fontsize=7, color=INK_SOFT)
    fig.text(0.93, 0.012, f"run {run_id} — page {number} of {total}", ha="right",
             va="bottom", fontsize=7.5, color=INK)
    if draft:
        _mark_draft(fig)


def _mark_draft(fig: Any) -> None:
    """The draft mark at the top and bottom of a page and across it."""
    for x, y, ha, va in ((0.97, 0.998, "right", "top"), (0.07, 0.012, "left", "bottom")):
        fig.text(x, y, DRAFT_MARK, ha=ha, va=va, fontsize=9, weight="bold", color=DRAFT_INK)
    fig.text(0.5, 0.5, DRAFT_MARK, ha="center", va="center", rotation=55, fontsize=44,
             weight="bold", color=DRAFT_INK, alpha=0.13)


def _png(fig: Any) -> str:
    with tempfile.SpooledTemporaryFile(max_size=1 << 24) as buf:   # no name "io" here:
        fig.savefig(buf, format="png", dpi=90)                      # ./io shadows it for
        buf.seek(0)                                                 # type checkers
        return base64.b64encode(buf.read()).decode("ascii")


def _html(record: RunRecord, facts: dict[str, Any], content: list[Section],
          figures: list[tuple[str, Any]], draft: bool) -> str:
    """One page; a draft has a bar fixed at the top (printed on every sheet) and the
    mark again before every section and image."""
    esc = html.escape
    mark = f"<p class='draft'>{DRAFT_MARK}</p>" if draft else ""
    ok = passed(facts)
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{DRAFT_MARK + ': ' if draft else ''}plantrig run "
        f"{esc(record.folder.name)}</title><style>",
        f"body{{font-family:sans-serif;max-width:60em;margin:2em auto;color:{INK}}}",
        "table{border-collapse:collapse;margin-bottom:1.5em;width:100%}",
        "td{border-bottom:1px solid #d5dbe1;padding:2px 8px;vertical-align:top;"
        "font-size:0.9em}td:first-child{color:#4a5866;width:16em}",
        "td.hash{font-family:monospace;font-size:0.8em;word-break:break-all}"
        "img{max-width:100%}",
        f"h1{{font-size:1.6em}}h2{{font-size:1.15em;border-bottom:2px solid {PLANT_BLUE}}}",
        f".result{{font-weight:bold;font-size:1.2em;padding:8px 12px;border:2px solid "
        f"{INK if ok else ALARM};background:{PASS_FILL if ok else FAIL_FILL};"
        f"color:{INK if ok else ALARM}}}",
        f".draft,.draft-bar{{text-align:center;font-weight:bold;color:{DRAFT_INK};"
        f"background:#fdecea;border:2px solid {DRAFT_INK};padding:4px}}",
        ".draft-bar{position:fixed;top:0;left:0;right:0}body.draft-page{padding-top:3em}",
        "</style></head>",
        f"<body class='draft-page'><div class='draft-bar'>{DRAFT_MARK}</div>" if draft
        else "<body>",
        f"<h1>{DRAFT_MARK + ': ' if draft else ''}Run record for sign-off: "
        f"{esc(record.folder.name)}</h1>",
        f"<p class='result'>{esc(result_line(facts))}</p>",
    ]
    for title, rows in [*content, ("Caution", [("", CAUTION)])]:
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
