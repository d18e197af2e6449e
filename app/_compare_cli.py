"""``plantrig compare RUN_A RUN_B``: the console summary and the comparison folder.

The folder holds comparison.json (everything below, machine-readable), deviations.csv
(one row per signal), events.csv, plots/<signal>.png (A and B on the same axes, |A - B|
below; each usable on its own) and index.html, which shows them all with the tables.
"""

from __future__ import annotations

import argparse
import csv
import datetime as _dt
import html
import json
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from plantrig.sim import DRAFT_MARK, DRAFT_PREFIX, RigFileError, verify_problem

EXIT_AGREE, EXIT_DIFFER, EXIT_USAGE = 0, 1, 2
EXIT_NOT_INTACT = 1         # as report and export: a folder that fails verify
HELP = """exit codes:
  0  the runs agree: every signal within tolerance, the same events (within the event
     time tolerance) and the same outcome and verdicts
  1  the runs differ: a signal beyond tolerance, an event in one run only or too far
     apart in time, or a different outcome or verdict; also (nothing compared, as
     report and export) a folder that fails plantrig verify, without --draft
  2  usage mistake: a folder that is not a finished run folder, runs of rigs that are
     not compatible (the message says what differs), a bad tolerance"""


def add_parser(sub: Any) -> None:
    p = sub.add_parser(
        "compare",
        description="Put two run folders side by side: align them by plant time (tick by "
                    "tick when the ticks are equal, otherwise on the coarser grid with the "
                    "finer run held at its latest sample), then per signal the largest "
                    "absolute and relative deviation and when it happened, the RMS "
                    "deviation and the first tick beyond tolerance; events, outcomes, "
                    "acceptance rules and verdicts side by side. Writes a comparison "
                    "folder (comparison.json, deviations.csv, events.csv, plots/*.png, "
                    "index.html). Tolerances default to 0 (bit for bit). A folder that "
                    "fails plantrig verify is refused, unless --draft. docs/compare.md.",
        epilog=HELP, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("run_a", help="run folder A (the reference, e.g. the rehearsal)")
    p.add_argument("run_b", help="run folder B (e.g. the bench run)")
    p.add_argument("--abs", type=float, default=None, metavar="X",
                   help="absolute tolerance for every signal (default 0)")
    p.add_argument("--rel", type=float, default=None, metavar="X",
                   help="relative tolerance for every signal, as a share of the signal's "
                        "largest |value| in A (default 0)")
    p.add_argument("--tol", action="append", default=[], metavar="SIGNAL=ABS[,REL]",
                   help="tolerance for the signals matching SIGNAL (a column name such as "
                        "y:belt_speed, or a pattern such as 'x:*'); repeatable, later wins")
    p.add_argument("--event-time", type=float, default=None, metavar="S",
                   help="largest allowed time difference between paired events (default 0)")
    p.add_argument("--tolerances", metavar="FILE",
                   help="tolerance file (TOML: [default], [signals.\"PATTERN\"], [events]); "
                        "command-line options apply on top of it")
    p.add_argument("--out", default="comparisons",
                   help="folder for comparison folders (default: comparisons)")
    p.add_argument("--no-plots", action="store_true", help="skip the PNG plots and HTML")
    p.add_argument("--draft", action="store_true",
                   help="compare even a folder that fails plantrig verify: the console, "
                        "comparison.json and index.html say which and why, and the "
                        "comparison folder is named DRAFT-*")
    p.set_defaults(func=cmd_compare)


def _tolerances(args: argparse.Namespace) -> Any:
    from plantrig.sim import Tolerance, Tolerances, load_tolerances, parse_tolerance_option
    tol = load_tolerances(args.tolerances) if args.tolerances else Tolerances()
    for name in ("abs", "rel", "event_time"):
        value = getattr(args, name)
        if value is not None and not (value >= 0):
            raise ValueError(f"--{name.replace('_', '-')}: expected a number >= 0, "
                             f"found {value}")
    if args.abs is not None or args.rel is not None:
        tol.default = Tolerance(args.abs if args.abs is not None else tol.default.abs,
                                args.rel if args.rel is not None else tol.default.rel)
    tol.signals += [parse_tolerance_option(t) for t in args.tol]
    if args.event_time is not None:
        tol.event_time = args.event_time
    return tol


def cmd_compare(args: argparse.Namespace) -> int:
    from plantrig.sim import NotComparable, compare_runs, iter_lines
    try:
        tol = _tolerances(args)
    except RigFileError as exc:
        for issue in exc.issues:
            print(f"error: {issue}", file=sys.stderr)
        return EXIT_USAGE
    except ValueError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    untrusted = _untrusted(args.run_a, args.run_b)
    if untrusted and not args.draft:
        for line in untrusted:
            print(f"error: {line}", file=sys.stderr)
        print("nothing was compared: the record is not what was recorded (plantrig verify "
              "FOLDER says more; --draft compares it anyway, marked)", file=sys.stderr)
        return EXIT_NOT_INTACT
    try:
        result = compare_runs(args.run_a, args.run_b, tol, envelopes=not args.no_plots)
    except NotComparable as exc:
        print(f"error: {exc}; nothing was compared", file=sys.stderr)
        return EXIT_USAGE
    folder = write_comparison(result, Path(args.out), plots=not args.no_plots,
                              untrusted=untrusted)
    for line in untrusted:
        print(f"{DRAFT_MARK}: {line}")
    for line in iter_lines(result):
        print(line)
    print(f"comparison folder: {folder}")
    code = EXIT_AGREE if result.agree else EXIT_DIFFER
    print(f"exit code {code}: {'the runs agree' if code == 0 else 'the runs differ'}")
    return code


def _untrusted(run_a: str, run_b: str) -> list[str]:
    """One line per folder that fails verify ("A: fails verification: ..."); a folder
    with a summary but no manifest (a record never finished) only gets a warning."""
    from plantrig.sim import MANIFEST
    lines = []
    for label, path in (("A", Path(run_a)), ("B", Path(run_b))):
        problem = verify_problem(path)
        if problem:
            lines.append(f"{label}: fails verification: {problem} ({path})")
        elif (path / "summary.json").is_file() and not (path / MANIFEST).is_file():
            print(f"warning: {label}: {path}: no {MANIFEST}, so its record cannot be "
                  "verified", file=sys.stderr)
    return lines


def _new_folder(out: Path, a: Path, b: Path, prefix: str = "") -> Path:
    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y%m%d-%H%M%S")
    base = out / f"{prefix}{a.name}--vs--{b.name}"[:180]
    folder, n = base.with_name(f"{base.name}-{stamp}"), 1
    while folder.exists():
        n += 1
        folder = base.with_name(f"{base.name}-{stamp}-{n}")
    folder.mkdir(parents=True)
    return folder


def write_comparison(result: Any, out: Path, plots: bool = True,
                     untrusted: Sequence[str] = ()) -> Path:
    """Write the comparison folder under ``out``; returns its path. ``untrusted``: why a
    folder compared fails verify (then the folder is named DRAFT-*, comparison.json
    lists them under "fails_verification" and index.html shows them under the mark)."""
    folder = _new_folder(out, result.a, result.b, DRAFT_PREFIX if untrusted else "")
    doc = {**result.as_dict(), **({"fails_verification": list(untrusted)} if untrusted else {})}
    (folder / "comparison.json").write_text(json.dumps(doc, indent=2) + "\n")
    fields = ["signal", "unit", "within", "bit_identical", "max_abs", "t_max_abs", "max_rel",
              "rms", "scale", "abs_tol", "rel_tol", "first_beyond_t", "first_beyond_tick",
              "ticks_beyond"]
    with open(folder / "deviations.csv", "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=fields, extrasaction="ignore")
        w.writeheader()
        for s in result.signals:
            w.writerow(vars(s))
    with open(folder / "events.csv", "w", newline="") as f:
        rows = csv.writer(f)
        rows.writerow(["kind", "what", "t_a", "t_b", "dt", "within"])
        for e in result.events:
            rows.writerow([e.kind, e.what, e.t_a, e.t_b, e.dt, e.within])
    if plots:
        images = _plots(result, folder / "plots")
        (folder / "index.html").write_text(_html(result, images, untrusted), encoding="utf-8")
    return folder


def _plots(result: Any, where: Path) -> dict[str, str]:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    where.mkdir()
    names = {}
    by_signal = {s.signal: s for s in result.signals}
    for column, env in result.envelopes.items():
        s = by_signal[column]
        fig, (top, bottom) = plt.subplots(2, 1, sharex=True, figsize=(8, 4.2),
                                          gridspec_kw={"height_ratios": [2, 1]})
        for lo, hi, label, colour in ((env.a_lo, env.a_hi, "A", "tab:blue"),
                                      (env.b_lo, env.b_hi, "B", "tab:orange")):
            top.plot(env.t, hi, color=colour, lw=1.0, label=label,
                     ls="-" if label == "A" else "--")
            if (lo != hi).any():
                top.fill_between(env.t, lo, hi, color=colour, alpha=0.25, lw=0)
        top.set_ylabel(f"{column}" + (f" [{s.unit}]" if s.unit else ""))
        top.legend(loc="upper right", fontsize=8)   # "best" searches every point
        top.set_title(f"{column}: max |A - B| {s.max_abs:.4g} at "
                      f"{s.t_max_abs if s.t_max_abs is not None else 0:g} s, "
                      f"{'within' if s.within else 'BEYOND'} tolerance", fontsize=9)
        bottom.plot(env.t, env.d_hi, color="tab:red", lw=1.0)
        limit = s.abs_tol + s.rel_tol * s.scale
        if limit > 0:
            bottom.axhline(limit, color="k", ls=":", lw=0.8)
        bottom.set_ylabel("|A - B|")
        bottom.set_xlabel("plant time [s]")
        fig.subplots_adjust(left=0.11, right=0.98, top=0.92, bottom=0.12, hspace=0.12)
        name = column.replace(":", "_").replace("/", "_") + ".png"
        fig.savefig(where / name, dpi=90)
        plt.close(fig)
        names[column] = f"plots/{name}"
    return names


def _html(result: Any, images: dict[str, str], untrusted: Sequence[str] = ()) -> str:
    e = html.escape
    oa, ob = result.outcomes["a"], result.outcomes["b"]
    rows = "".join(
        f"<tr class={'bad' if not s.within else 'ok'}><td>{e(s.signal)}</td><td>{e(s.unit)}"
        f"</td><td>{'yes' if s.within else 'NO'}</td><td>{s.max_abs:.4g}</td>"
        f"<td>{s.t_max_abs if s.t_max_abs is not None else ''}</td><td>{s.max_rel:.3%}</td>"
        f"<td>{s.rms:.4g}</td><td>{'' if s.first_beyond_t is None else s.first_beyond_t}"
        f"</td></tr>" for s in result.signals)
    events = "".join(
        f"<tr class={'ok' if ev.within else 'bad'}><td>{e(ev.kind)}</td><td>{e(ev.what)}</td>"
        f"<td>{'' if ev.t_a is None else f'{ev.t_a:g}'}</td>"
        f"<td>{'' if ev.t_b is None else f'{ev.t_b:g}'}</td>"
        f"<td>{'' if ev.dt is None else f'{ev.dt:+.6g}'}</td></tr>" for ev in result.events)
    rules = "".join(
        f"<tr><td>{e(r)}</td><td>{oa['acceptance'].get(r, '-')}</td>"
        f"<td>{ob['acceptance'].get(r, '-')}</td></tr>"
        for r in dict.fromkeys([*oa["acceptance"], *ob["acceptance"]]))
    verdicts = "".join(
        f"<tr><td>verdict {e(str(v))}</td><td>{oa['verdicts'].get(v, '-')}</td>"
        f"<td>{ob['verdicts'].get(v, '-')}</td></tr>"
        for v in dict.fromkeys([*oa["verdicts"], *ob["verdicts"]]))
    figures = "".join(f"<figure><img src='{e(p)}' alt='{e(c)}'></figure>"
                      for c, p in images.items())
    notes = "".join(f"<li>{e(n)}</li>" for n in [*untrusted, *result.notes])
    verdict = "The runs agree within tolerance." if result.agree else "The runs DIFFER."
    if untrusted:
        verdict = f"{DRAFT_MARK}: a folder fails verification. {verdict}"
    return f"""<!doctype html><html><head><meta charset="utf-8">
<title>plantrig comparison</title><style>
body {{ font-family: sans-serif; margin: 1.5em; }} table {{ border-collapse: collapse; }}
td, th {{ border: 1px solid #bbb; padding: 2px 6px; font-size: 90%; }}
tr.bad td {{ background: #fde0dc; }} img {{ max-width: 100%; }}
</style></head><body>
<h1>{e(verdict)}</h1>
<p>A: {e(str(result.a))}<br>B: {e(str(result.b))}<br>Aligned {e(result.alignment)};
{result.ticks_compared} ticks compared.</p><ul>{notes}</ul>
<h2>Outcomes</h2><table><tr><th></th><th>A</th><th>B</th></tr>
<tr><td>outcome</td><td>{e(str(oa['ended']))} ({e(str(oa['reason']))})</td>
<td>{e(str(ob['ended']))} ({e(str(ob['reason']))})</td></tr>
<tr><td>exit code</td><td>{oa['exit_code']}</td><td>{ob['exit_code']}</td></tr>
{rules}{verdicts}</table>
<h2>Signals</h2><table><tr><th>signal</th><th>unit</th><th>within</th><th>max |A-B|</th>
<th>at [s]</th><th>max rel</th><th>RMS</th><th>first beyond [s]</th></tr>{rows}</table>
<h2>Events</h2><table><tr><th>kind</th><th>what</th><th>A [s]</th><th>B [s]</th>
<th>B - A [s]</th></tr>{events}</table>
<h2>Plots</h2>{figures}
</body></html>
"""
