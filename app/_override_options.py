"""The ``--set KEY=VALUE``, ``--duration`` and ``--seed`` options of run and rerun."""

from __future__ import annotations

import argparse

from plantrig.sim import shortcut_assignments

SET_HELP = ("change one rig-file value for this run (repeatable): a key path with list "
            "indices and a TOML value, e.g. --set plant.params.k=1.2 --set "
            "'controller.loops[0].kp=3' --set 'references[0].to=0.5'; checked like the "
            "file itself; the run folder's rig.toml records the effective values")


def add_override_options(p: argparse.ArgumentParser) -> None:
    """Add --set, --duration and --seed to a command's parser."""
    p.add_argument("--set", dest="overrides", action="append", default=[],
                   metavar="KEY=VALUE", help=SET_HELP)
    p.add_argument("--duration", type=float, metavar="S",
                   help="run for S seconds of plant time (same as --set rig.duration=S)")
    p.add_argument("--seed", type=int, metavar="N",
                   help="seed for noise and random faults (same as --set rig.seed=N)")


def overrides_of(args: argparse.Namespace) -> list[str]:
    """Every assignment the options ask for, the shortcuts last (they win)."""
    return [*args.overrides, *shortcut_assignments(args.duration, args.seed)]
