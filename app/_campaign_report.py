"""The campaign report (report.html): one self-contained page a test engineer reads
after a campaign, to see what failed and why.

It shows the counts, a pass/fail matrix (each rig and scenario against its
variations), the cases that did not pass and the passing ones closest to a limit, a
histogram of every verdict's measured values against its limit, and, for each varied
key, how far apart its values lie in passing and failing cases (standardized mean
difference, common practice: |mean_fail - mean_pass| / pooled standard deviation), so
the parameters that separate pass from fail come first. Standard library only; the
figures are inline SVG.
"""

from __future__ import annotations

import html
import math
import statistics
from pathlib import Path
from typing import Any

from plantrig.sim import write_atomic

PASS_INK, FAIL_INK, ERROR_INK, RULE_INK = "#33557a", "#b8332b", "#8a6d00", "#222222"
STYLE = """
body{font:14px/1.45 system-ui,sans-serif;margin:2em auto;max-width:72em;color:#1d1d1d;
background:#fbfaf7}
h1{font-size:1.5em;margin-bottom:.2em}h2{font-size:1.15em;margin-top:2em;
border-bottom:1px solid #ccc}
table{border-collapse:collapse}td,th{padding:.2em .6em;text-align:left;
border-bottom:1px solid #e4e2dc;vertical-align:top}
.m td{padding:0;border:0}.m th{font-weight:normal;padding-right:1em;white-space:nowrap}
.c{display:inline-block;width:14px;height:14px;margin:1px}
.passed{background:#33557a}.failed{background:#b8332b}.error{background:#8a6d00}
.missing{background:#fff;outline:1px dashed #999;outline-offset:-2px}
.small{color:#555;font-size:.9em}figure{display:inline-block;margin:.5em 1.5em .5em 0}
figcaption{font-size:.9em;max-width:300px}code{font-size:.92em}
"""


def write_report(folder: Path, summary: dict[str, Any], rows: list[dict[str, Any]]) -> Path:
    rows = sorted(rows, key=lambda r: r["index"])
    name = html.escape(summary["campaign"]["name"])
    n = summary["cases"]
    parts = [f"<!doctype html><html lang=en><meta charset=utf-8><title>Campaign {name}</title>"
             f"<style>{STYLE}</style><h1>Campaign {name}</h1>",
             f"<p>{html.escape(summary['campaign']['description'])}</p>",
             f"<p><b>{n['passed']} of {n['planned']} cases passed</b>; {n['failed']} failed, "
             f"{n['error']} errors" + (f", {n['missing']} missing" if n["missing"] else "")
             + f". Exit code {summary['exit_code']}."
             + ("" if summary["complete"] else " <b>Incomplete: resume the campaign.</b>")
             + "</p>",
             f"<p class=small>Campaign file {html.escape(summary['campaign']['file'])} "
             f"(SHA-256 {summary['campaign']['sha256'][:16]}...), seed "
             f"{summary['campaign']['seed']}; started {summary['started_utc']}.</p>",
             _matrix(rows), _not_passed(rows), _closest(rows), _histograms(rows),
             _separation(rows), "</html>"]
    path = folder / "report.html"
    write_atomic(path, "\n".join(parts).encode("utf-8"))
    return path


def _title(row: dict[str, Any]) -> str:
    values = ", ".join(f"{k} = {_num(v)}" for k, v in row["values"])
    failed = "; ".join(v["name"] for v in row["verdicts"] if not v["passed"])
    text = f"case {row['case_id']} ({row['status']})" + (f": {values}" if values else "")
    return text + (f"; failed: {failed}" if failed else "") + (
        f"; {row['error']}" if row["error"] else "")


def _num(value: Any) -> str:
    return f"{value:.4g}" if isinstance(value, float) else str(value)


def _matrix(rows: list[dict[str, Any]]) -> str:
    """Rig/scenario down, variation across; one square per case."""
    groups: dict[str, dict[str, dict[str, Any]]] = {}
    variations: dict[str, list[str]] = {}
    for r in rows:
        groups.setdefault(f"{r['rig']} / {r['scenario'] or '(rig alone)'}", {})[
            r["variation"]] = r
        variations.setdefault(r["rig"], [])
        if r["variation"] not in variations[r["rig"]]:
            variations[r["rig"]].append(r["variation"])
    body = []
    for group, cells in groups.items():
        rig = group.split(" / ", 1)[0]
        squares = "".join(
            f'<span class="c {cells[v]["status"]}" title="{html.escape(_title(cells[v]))}">'
            "</span>" if v in cells else '<span class="c missing" title="missing"></span>'
            for v in variations[rig])
        passed = sum(c["status"] == "passed" for c in cells.values())
        body.append(f"<tr><th>{html.escape(group)}</th><td>{squares}</td>"
                    f"<td class=small>&nbsp;{passed}/{len(cells)}</td></tr>")
    return ("<h2>Pass/fail matrix</h2><p class=small>One square per case: rig and scenario "
            "down, variation (v000, v001, ... of that rig) across. Blue passed, red failed, "
            "ochre error; hover for the values.</p><table class=m>" + "".join(body)
            + "</table>")


def _not_passed(rows: list[dict[str, Any]]) -> str:
    bad = [r for r in rows if r["status"] != "passed"]
    if not bad:
        return "<h2>Cases that did not pass</h2><p>None.</p>"
    body = []
    for r in bad[:50]:
        why = html.escape(r["error"]) if r["error"] else "<br>".join(
            [f"ended {html.escape(r['outcome'])}: {html.escape(r['reason'])}"]
            * (r["outcome"] != "completed")
            + [f"{html.escape(v['name'])}: {_num(v['measured'])} {html.escape(v['unit'])} "
               f"(limit {_num(v['limit'])})" for v in r["verdicts"] if not v["passed"]])
        values = "<br>".join(f"<code>{html.escape(k)}</code> = {_num(v)}" for k, v in r["values"])
        body.append(f"<tr><td><code>{r['case_id']}</code><br>{r['status']}</td>"
                    f"<td>{html.escape(r['rig'])} / {html.escape(r['scenario'] or '-')} "
                    f"{r['variation']}</td><td>{values}</td><td>{why}</td></tr>")
    more = f"<p class=small>... and {len(bad) - 50} more (cases.csv).</p>" if len(bad) > 50 else ""
    return (f"<h2>Cases that did not pass ({len(bad)})</h2><table><tr><th>case</th>"
            "<th>rig / scenario</th><th>varied values</th><th>why</th></tr>"
            + "".join(body) + "</table>" + more)


def _closest(rows: list[dict[str, Any]]) -> str:
    """Passing cases nearest an upper limit (measured / limit, limits > 0 only)."""
    near = []
    for r in rows:
        if r["status"] != "passed":
            continue
        for v in r["verdicts"]:
            m, lim = v["measured"], v["limit"]
            if isinstance(m, float) and math.isfinite(m) and math.isfinite(lim) and lim > 0 \
                    and m <= lim:
                near.append((m / lim, r, v))
    near.sort(key=lambda t: -t[0])
    if not near:
        return ""
    body = "".join(f"<tr><td><code>{r['case_id']}</code></td><td>{html.escape(r['rig'])} / "
                   f"{html.escape(r['scenario'] or '-')} {r['variation']}</td>"
                   f"<td>{html.escape(v['name'])}</td><td>{_num(v['measured'])} of "
                   f"{_num(v['limit'])} {html.escape(v['unit'])} ({share:.0%})</td></tr>"
                   for share, r, v in near[:10])
    return ("<h2>Passing, but closest to a limit</h2><table><tr><th>case</th><th>rig / "
            "scenario</th><th>verdict</th><th>measured of limit</th></tr>" + body + "</table>")


def _histograms(rows: list[dict[str, Any]]) -> str:
    by_name: dict[str, list[tuple[float, bool]]] = {}
    limits: dict[str, float] = {}
    for r in rows:
        for v in r["verdicts"]:
            if isinstance(v["measured"], float) and math.isfinite(v["measured"]):
                by_name.setdefault(v["name"], []).append((v["measured"], v["passed"]))
                limits.setdefault(v["name"], v["limit"])
    figures = [_histogram(name, points, limits[name]) for name, points in by_name.items()
               if len(points) >= 2]
    if not figures:
        return ""
    return ("<h2>Measured values</h2><p class=small>Each verdict's measured value over the "
            "cases (blue passed, red failed); the dark line is the limit.</p>"
            + "".join(figures))


def _histogram(name: str, points: list[tuple[float, bool]], limit: float) -> str:
    values = [p for p, _ in points]
    lo, hi = min(values), max(values)
    if math.isfinite(limit) and abs(limit) < 1e300:
        lo, hi = min(lo, limit), max(hi, limit)
    if hi == lo:
        hi = lo + 1.0
    bins = 20
    counts = [[0, 0] for _ in range(bins)]
    for value, passed in points:
        counts[min(bins - 1, int((value - lo) / (hi - lo) * bins))][0 if passed else 1] += 1
    tallest = max(a + b for a, b in counts)
    w, h, bw = 280, 90, 280 / bins
    bars = []
    for i, (good, bad) in enumerate(counts):
        for count, base, ink in ((good, 0, PASS_INK), (bad, good, FAIL_INK)):
            if count:
                y = h - (base + count) / tallest * (h - 4)
                bars.append(f'<rect x="{i * bw + 0.5:.1f}" y="{y:.1f}" width="{bw - 1:.1f}" '
                            f'height="{count / tallest * (h - 4):.1f}" fill="{ink}"/>')
    if math.isfinite(limit) and lo <= limit <= hi:
        x = (limit - lo) / (hi - lo) * w
        bars.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="0" y2="{h}" stroke="{RULE_INK}" '
                    'stroke-width="2"/>')
    return (f'<figure><svg width="{w}" height="{h + 14}" role="img" aria-label="'
            f'{html.escape(name)}">{"".join(bars)}<text x="0" y="{h + 12}" font-size="10">'
            f'{lo:.4g}</text><text x="{w}" y="{h + 12}" font-size="10" text-anchor="end">'
            f'{hi:.4g}</text></svg><figcaption>{html.escape(name)} '
            f'(limit {_num(limit)}, {len(points)} cases)</figcaption></figure>')


def separation(rows: list[dict[str, Any]]) -> list[tuple[str, str, float, list[float],
                                                           list[float]]]:
    """(rig/scenario, key, standardized mean difference, passing values, failing values)
    for every numeric varied key with both passing and failing cases, largest first."""
    out = []
    groups: dict[str, list[dict[str, Any]]] = {}
    for r in rows:
        if r["status"] in ("passed", "failed"):
            groups.setdefault(f"{r['rig']} / {r['scenario'] or '-'}", []).append(r)
    for group, members in groups.items():
        keys = {k for r in members for k, v in r["values"]
                if isinstance(v, int | float) and not isinstance(v, bool)}
        for key in sorted(keys):
            good = [float(dict(r["values"])[key]) for r in members
                    if r["status"] == "passed" and key in dict(r["values"])]
            bad = [float(dict(r["values"])[key]) for r in members
                   if r["status"] == "failed" and key in dict(r["values"])]
            if not good or not bad:
                continue
            spread = [x for x in (statistics.pstdev(good), statistics.pstdev(bad)) if x > 0]
            pooled = math.sqrt(sum(s * s for s in spread) / len(spread)) if spread else 0.0
            gap = abs(statistics.fmean(bad) - statistics.fmean(good))
            d = gap / pooled if pooled > 0 else (math.inf if gap > 0 else 0.0)
            out.append((group, key, d, good, bad))
    out.sort(key=lambda t: -t[2])
    return out


def _separation(rows: list[dict[str, Any]]) -> str:
    found = separation(rows)
    if not found:
        return ("<h2>What separates pass from fail</h2><p>Nothing to compare: no rig and "
                "scenario has both passing and failing cases with a varied number.</p>")
    body = []
    for group, key, d, good, bad in found[:30]:
        lo, hi = min(good + bad), max(good + bad)
        span = (hi - lo) or 1.0
        dots = "".join(f'<circle cx="{4 + (x - lo) / span * 192:.1f}" cy="{cy}" r="2.5" '
                       f'fill="{ink}" fill-opacity=".7"/>'
                       for xs, cy, ink in ((good, 6, PASS_INK), (bad, 16, FAIL_INK))
                       for x in xs)
        body.append(f"<tr><td>{html.escape(group)}</td><td><code>{html.escape(key)}</code></td>"
                    f"<td>{'all apart' if math.isinf(d) else f'{d:.2f}'}</td>"
                    f"<td>{min(good):.4g} to {max(good):.4g}</td>"
                    f"<td>{min(bad):.4g} to {max(bad):.4g}</td>"
                    f'<td><svg width="200" height="22">{dots}</svg></td></tr>')
    return ("<h2>What separates pass from fail</h2><p class=small>For each varied number: "
            "the standardized mean difference between failing and passing cases "
            "(|mean fail - mean pass| / pooled standard deviation; larger means the key "
            "tells them apart better), the ranges, and each case as a dot (blue row passed, "
            "red row failed).</p><table><tr><th>rig / scenario</th><th>key</th><th>"
            "difference</th><th>passing values</th><th>failing values</th><th></th></tr>"
            + "".join(body) + "</table>")
