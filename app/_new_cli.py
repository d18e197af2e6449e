"""``plantrig new KIND FILE``: write a commented starter rig file that passes `check`.

Kinds: ``lti`` (matrices), ``transfer_function`` (num/den, zpk shown), ``ode`` (a
Python module with f and h written beside it), ``fmu`` (from an FMU the user has:
``--fmu FILE``; its inputs, outputs and states are read from modelDescription.xml and
each input is driven open-loop by a constant reference to edit). The plants in the
starters are examples of our own; the templates live in app/starters/.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path
from typing import Any

STARTERS = Path(__file__).resolve().parent / "starters"
KINDS = ("lti", "transfer_function", "ode", "fmu")
EXIT_OK, EXIT_USAGE = 0, 2
EXIT_CODES = """exit codes:
  0  the starter was written (then: plantrig check FILE)
  2  usage mistake: an unknown kind, FILE (or the ODE module beside it) exists and
     --force was not given, fmu without --fmu or with an FMU that cannot be read,
     a file that cannot be written (then nothing is written)"""


def add_parser(sub: Any) -> None:
    p = sub.add_parser("new", description=__doc__.split("\n\n")[0], epilog=EXIT_CODES,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("kind", choices=KINDS, help="the kind of plant")
    p.add_argument("file", help="the rig file to write (.toml)")
    p.add_argument("--fmu", help="fmu: the FMU file the rig runs (the starter names it "
                                  "relative to FILE)")
    p.add_argument("--force", action="store_true", help="overwrite existing files")
    p.set_defaults(func=cmd_new)


def cmd_new(args: argparse.Namespace) -> int:
    path = Path(args.file)
    if path.suffix != ".toml":
        path = path.with_suffix(".toml")
    name = path.stem
    files: dict[Path, str] = {}
    if args.kind == "fmu":
        if not args.fmu:
            print("error: new fmu: --fmu FILE names the FMU the rig runs", file=sys.stderr)
            return EXIT_USAGE
        try:
            files[path] = fmu_starter(name, Path(args.fmu), path.parent)
        except ValueError as exc:
            print(f"error: --fmu {args.fmu}: {exc}", file=sys.stderr)
            return EXIT_USAGE
    else:
        module = f"{name}_model.py"
        files[path] = (STARTERS / f"{args.kind}.toml").read_text(encoding="utf-8") \
            .replace("{name}", name).replace("{module}", module)
        if args.kind == "ode":
            files[path.parent / module] = (STARTERS / "ode_model.py").read_text(encoding="utf-8")
    existing = [str(p) for p in files if p.exists()]
    if existing and not args.force:
        print(f"error: {', '.join(existing)} already exist(s); --force overwrites",
              file=sys.stderr)
        return EXIT_USAGE
    written: list[Path] = []
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        for target, text in files.items():
            target.write_text(text, encoding="utf-8")
            written.append(target)
    except OSError as exc:
        for done in written:           # no half a starter (a rig file without its module)
            done.unlink(missing_ok=True)
        print(f"error: cannot write {exc.filename or path}: {exc.strerror or exc}; "
              "nothing was written", file=sys.stderr)
        return EXIT_USAGE
    for target in written:
        print(f"wrote {target}")
    print(f"next: plantrig check {path}")
    return EXIT_OK


def fmu_starter(name: str, fmu: Path, folder: Path) -> str:
    """A rig file for ``fmu``: its signals from modelDescription.xml, model exchange when
    the FMU offers it, each input driven by a constant reference of 0 to edit."""
    try:
        import fmpy
    except ImportError:
        raise ValueError("reading an FMU needs fmpy (pip install 'plantrig[fmu]')") from None
    try:
        md = fmpy.read_model_description(str(fmu))
    except Exception as exc:  # fmpy raises many kinds for a bad archive or XML
        raise ValueError(f"not a readable FMU: {type(exc).__name__}: {exc}") from None
    inputs = [v.name for v in md.modelVariables if v.causality == "input"]
    outputs = [v.name for v in md.modelVariables if v.causality == "output"]
    exchange = md.modelExchange is not None
    states = [d.variable.derivative.name for d in md.derivatives] if exchange else []
    if not inputs or not outputs:
        raise ValueError(f"expected inputs and outputs, found {len(inputs)} input(s) and "
                         f"{len(outputs)} output(s)")
    where = Path(os.path.relpath(fmu.resolve(), folder.resolve())).as_posix()  # portable
    lines = [
        f"# A starter rig file written by `plantrig new fmu` for {fmu.name}: set each",
        "# signal's unit and range, the tick and the references, then `plantrig check` it.",
        "# Keys and their meaning: docs/rigfile.md. Caution: a virtual plant proves a",
        "# controller against a model only; defer to your site's safety rules.",
        "",
        "[rig]",
        f'name = "{name}"',
        'description = "FMU plant (starter)"',
        "tick = 0.001",
        "duration = 1.0",
        'mode = "fast"',
        "",
        "[plant]",
        'kind = "fmu"',
        f'file = "{where}"',
        f'interface = "{"model_exchange" if exchange else "co_simulation"}"',
    ]
    if exchange:
        lines += ['method = "rk4"', "substeps = 1", f"x0 = [{', '.join('0.0' for _ in states)}]",
                  "states = [", "\n".join(f'  {{ name = "{s}" }},' for s in states), "]"]
    lines += ["inputs = [", "\n".join(f'  {{ name = "{s}", safe = 0.0 }},' for s in inputs), "]",
              "outputs = [", "\n".join(f'  {{ name = "{s}" }},' for s in outputs), "]", ""]
    for s in inputs:
        lines += ["[[references]]", f'name = "{s}_demand"', 'kind = "constant"', "value = 0.0",
                  ""]
    lines += ["[controller]", 'kind = "open_loop"   # or "pid", or "external" with a [link]',
              "drive = { " + ", ".join(f'{s} = "{s}_demand"' for s in inputs) + " }", ""]
    return "\n".join(lines)
