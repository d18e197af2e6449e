"""``plantrig plot RUN SIGNAL... [--out FILE.png|.svg]``: chosen signals of a run, drawn
as the report draws them (app/_plots.py), without opening the dashboard.

Reads the folder as data (its model module is never imported) and writes nothing into
the record: the default output goes to RUN/derived/, which the manifest never covers.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from plantrig._plots import context, known_signals, panels_for, plot_signals
from plantrig._records_cli import into_record
from plantrig.sim import DERIVED, read_for_display

EXIT_OK, EXIT_USAGE = 0, 2
EXIT_CODES = """exit codes:
  0  the plot was written
  2  usage mistake: not a readable run folder, an unknown signal (the known ones are
     listed), an output that is not .png or .svg or lies in the run folder outside
     derived/ (the record must not change), or a file that cannot be written"""
SUFFIXES = (".png", ".svg")


def cmd_plot(args: argparse.Namespace) -> int:
    folder = Path(args.folder)
    try:
        record = read_for_display(folder)   # memory that does not grow with the run
    except (OSError, ValueError, KeyError) as exc:
        print(f"error: {folder}: not a readable run folder ({exc})", file=sys.stderr)
        return EXIT_USAGE
    if not len(record.rows):
        print(f"error: {folder}: the record holds no ticks", file=sys.stderr)
        return EXIT_USAGE
    out = Path(args.out) if args.out else folder / DERIVED / (
        "plot-" + "-".join(s.replace(":", "_").replace(",", "+") for s in args.signals)
        + ".png")
    if out.suffix.lower() not in SUFFIXES:
        print(f"error: --out {out}: expected a .png or .svg file", file=sys.stderr)
        return EXIT_USAGE
    if into_record(folder, out):
        return EXIT_USAGE
    ctx = context(record)
    try:
        panels = panels_for(ctx, args.signals)
    except KeyError as exc:
        print(f"error: {folder}: no signal {exc.args[0]!r}; known: "
              f"{', '.join(known_signals(record))}", file=sys.stderr)
        return EXIT_USAGE
    if ctx.rig_note:
        print(f"note: {ctx.rig_note}", file=sys.stderr)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        fig = plot_signals(ctx, panels, out, title=f"run {folder.resolve().name}")
    except OSError as exc:
        print(f"error: cannot write {out}: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_USAGE
    import matplotlib.pyplot as plt

    plt.close(fig)
    print(f"wrote {out}")
    return EXIT_OK


def add_parser(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Register ``plot`` on the main parser's subparsers."""
    p = sub.add_parser(
        "plot",
        description="Draw chosen signals of a run folder as the report does: limit warn "
                    "and trip lines, trips marked, injected faults and disturbances "
                    "shaded from the events. A SIGNAL is a name (belt_speed: the plant "
                    "output with what the controller read and its reference), a column "
                    "(x:belt_speed), or columns joined by commas on one panel "
                    "(cmd:voltage,u:voltage).",
        epilog=EXIT_CODES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("folder", help="run folder")
    p.add_argument("signals", nargs="+", metavar="SIGNAL", help="what to draw, one panel "
                                                               "each")
    p.add_argument("--out", metavar="FILE", help=f"a .png or .svg file (default: RUN/"
                                                 f"{DERIVED}/plot-SIGNALS.png)")
    p.set_defaults(func=cmd_plot)
