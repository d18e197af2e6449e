"""Is a run folder fit to be reported, exported or signed? One answer for all three.

A folder is fit only when its run is over (no rig or recorder process still writing it),
its record is finished (summary.json and manifest.json written, no journal left for
``plantrig recover`` to turn into the record) and it passes ``verify``. The manifest is a
run's last write, so a folder that has one is no longer being written even while the
process that made it lives on (a run made from Python, a campaign worker): anything
written after it fails verify. Anything less may only be reported or exported as a
marked draft, never into what the manifest covers.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

from plantrig.sim.records._manifest import MANIFEST, ManifestError, Verification, verify_folder
from plantrig.sim.records._records import RUN_START, _alive

JOURNAL = "ticks.journal"
DRAFT_MARK = "DRAFT - NOT FOR SIGN-OFF"
DRAFT_PREFIX = "DRAFT-"           # file names of draft reports and exports


@dataclass
class Readiness:
    """Why a folder is not fit for sign-off: ``unfinished`` (still being written, or its
    record never finished) or ``not_intact`` (fails verify); both empty when it is fit."""

    unfinished: list[str] = field(default_factory=list)
    not_intact: list[str] = field(default_factory=list)
    verification: Verification | None = None

    @property
    def ok(self) -> bool:
        return not (self.unfinished or self.not_intact)

    @property
    def problems(self) -> list[str]:
        return self.unfinished + self.not_intact


def check_folder(folder: Path, public_key: Path | None = None) -> Readiness:
    """Check ``folder`` for sign-off (``public_key``: also check the signature with it)."""
    folder = Path(folder)
    out = Readiness()
    start = _json(folder / RUN_START)
    sealed = (folder / MANIFEST).is_file()
    for role in ("rig", "recorder") if not sealed else ():
        identity = start.get(f"{role}_process") if isinstance(start, dict) else None
        if isinstance(identity, dict) and _alive(identity):
            out.unfinished.append(f"still being written: the {role} process (pid "
                                  f"{identity['pid']}) is running")
    if out.unfinished:
        return out          # a folder in motion: nothing more to say about it yet
    if not (folder / "summary.json").is_file():
        out.unfinished.append("not finished: no summary.json (the run died or is not "
                              "over); run plantrig recover")
    if (folder / JOURNAL).exists():
        out.unfinished.append(f"not finished: {JOURNAL} was never turned into the record "
                              "(disk full?); free space, then run plantrig recover")
    if not sealed:
        out.unfinished.append(f"not sealed: no {MANIFEST}")
        return out
    try:
        out.verification = verify_folder(folder, public_key)
    except ManifestError as exc:
        out.not_intact.append(f"fails verify: {exc}")
        return out
    if not out.verification.ok:
        out.not_intact.append(f"fails verify: {out.verification.problems()}")
    return out


def verify_problem(folder: Path, apart: frozenset[str] = frozenset()) -> str | None:
    """Why a run folder fails ``plantrig verify`` (no key: the signature's form only);
    None when it passes or has no manifest yet (a record never finished, which keeps its
    own messages). ``apart``: files judged by other rules and left out here (a rerun's
    model module, judged by --trust-model and --public-key)."""
    if not (folder / MANIFEST).is_file():
        return None
    try:
        found = verify_folder(folder)
    except ManifestError as exc:
        return str(exc)
    found.changed = [rel for rel in found.changed if rel not in apart]
    return None if found.ok else found.problems()


def _json(path: Path) -> object:
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return None
