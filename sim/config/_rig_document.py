"""Reading a rig file into one document, taking sections from the part files it names.

A bench keeps one plant, one link and one safety section and shares them between rig
files: a rig file lists them at its top, and its own sections add to them::

    parts = ["parts/conveyor_plant.toml", "parts/bench_serial.toml"]

    [rig]
    name = "conveyor_hil"
    ...
    [link]
    port = "/dev/ttyACM0"    # a local override of the bench file's [link]

Rules (docs/rigfile.md, "Parts"): paths are relative to the file that names them; a
part may name parts of its own; the parts are taken in order, and two parts giving the
same section is a mistake naming both; the rig file's own tables are merged over what
the parts give, key by key (its arrays of tables replace theirs whole); a part that leads
back to a file already being read is a cycle, named with the whole chain. Paths to
files inside a part (plant module or FMU, TLS files) are rewritten relative to the rig
file, so the resolved document stands on its own; the run folder keeps it as rig.toml.
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import tomli_w

from plantrig.sim.config._checker import RigFileError, RigIssue, describe_value

PARTS_KEY = "parts"
# keys whose value names a file, relative to the file that writes it
FILE_KEYS = (("plant", "module"), ("plant", "file"), ("link", "tls", "ca_file"),
             ("link", "tls", "cert_file"), ("link", "tls", "key_file"))


@dataclass
class RigDocument:
    """A rig file's document with its parts taken in."""

    doc: dict[str, Any]
    text: str                                  # the file's text, or the resolved TOML
    parts: tuple[Path, ...] = ()               # every part file read, in order
    origin: dict[str, Path] = field(default_factory=dict)   # section -> part giving it
    local: dict[str, Any] = field(default_factory=dict)     # the rig file's own sections
    set_here: tuple[str, ...] = ()    # key paths set on top (``--set`` assignments)

    def blame(self, issues: list[RigIssue]) -> list[RigIssue]:
        """Issues about a key a part gave (and the rig file did not set) name the part
        file instead of the rig file."""
        return [RigIssue(str(self.origin[issue.key.split(".", 1)[0]]), issue.key,
                         issue.message) if self._from_part(issue.key) else issue
                for issue in issues]

    def _from_part(self, key: str) -> bool:
        steps = key.split(".")
        if steps[0] not in self.origin or any(key == k or key.startswith(f"{k}.")
                                              for k in self.set_here):
            return False
        table: Any = self.local
        for step in steps:
            if not isinstance(table, dict) or step not in table:
                return True
            table = table[step]
        return False


def read_toml(path: Path, named_by: tuple[str, str] | None = None) -> tuple[str, dict[str, Any]]:
    """A TOML file's text and document; RigFileError names the file (or, for a part, the
    file and key naming it) and the reason."""
    file, key = named_by or (str(path), "")
    where = "" if named_by is None else f"{path}: "
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise RigFileError([RigIssue(file, key, f"{where}cannot read: "
                                                f"{exc.strerror or exc}")]) from None
    except UnicodeDecodeError as exc:
        raise RigFileError([RigIssue(file, key, f"{where}not UTF-8 text: "
                                                f"{exc.reason}")]) from None
    try:
        return text, tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RigFileError([RigIssue(file, key, f"{where}not valid TOML: {exc}")]) from None


def read_rig_document(path: str | Path) -> RigDocument:
    """The rig file at ``path`` with its parts taken in (RigFileError lists every mistake
    in the parts list; a rig file without parts comes back as written)."""
    path = Path(path)
    text, doc = read_toml(path)
    if PARTS_KEY not in doc:
        return RigDocument(doc, text)
    issues: list[RigIssue] = []
    merged, origin, parts = _take_parts(path, doc, (path.resolve(),), issues)
    if issues:
        raise RigFileError(issues)
    return RigDocument(merged, tomli_w.dumps(merged), tuple(parts), origin, doc)


def _take_parts(path: Path, doc: dict[str, Any], chain: tuple[Path, ...],
                issues: list[RigIssue]) -> tuple[dict[str, Any], dict[str, Path], list[Path]]:
    """``doc``'s sections over those of its parts: (document, section -> part, parts)."""
    names = doc.get(PARTS_KEY, [])
    if not isinstance(names, list) or not all(isinstance(n, str) for n in names):
        issues.append(RigIssue(str(path), PARTS_KEY, "expected a list of file names, found "
                                                     f"{describe_value(names)}"))
        names = []
    merged: dict[str, Any] = {}
    origin: dict[str, Path] = {}
    used: list[Path] = []
    for i, name in enumerate(names):
        part = (path.parent / name).resolve()
        key = f"{PARTS_KEY}[{i}]"
        if part in chain:
            loop = " -> ".join(str(p) for p in (*chain[chain.index(part):], part))
            issues.append(RigIssue(str(path), key, f"a cycle: {loop}"))
            continue
        try:
            _, part_doc = read_toml(part, (str(path), key))
        except RigFileError as exc:
            issues.extend(exc.issues)
            continue
        sub, sub_origin, sub_used = _take_parts(part, part_doc, (*chain, part), issues)
        _rebase_files(sub, part.parent, path.parent)
        for section, value in sub.items():
            if section in merged:
                issues.append(RigIssue(str(path), key, f"[{section}] is given by both "
                                                       f"{origin[section]} and "
                                                       f"{sub_origin.get(section, part)}"))
            else:
                merged[section] = value
                origin[section] = sub_origin.get(section, part)
        used += [part, *sub_used]
    for section, value in doc.items():
        if section == PARTS_KEY:
            continue
        if isinstance(value, dict) and isinstance(merged.get(section), dict):
            merged[section] = _merge(merged[section], value)
        else:
            merged[section] = value
            origin.pop(section, None)
    return merged, origin, used


def _merge(base: dict[str, Any], local: dict[str, Any]) -> dict[str, Any]:
    """``base`` with ``local`` over it, key by key through nested tables."""
    out = dict(base)
    for key, value in local.items():
        out[key] = _merge(out[key], value) if isinstance(value, dict) and isinstance(
            out.get(key), dict) else value
    return out


def _rebase_files(doc: dict[str, Any], old: Path, new: Path) -> None:
    """Rewrite FILE_KEYS values written relative to ``old`` to be relative to ``new``."""
    for keys in FILE_KEYS:
        table = doc
        for key in keys[:-1]:
            table = table.get(key) if isinstance(table, dict) else None  # type: ignore[assignment]
        last = keys[-1]
        if isinstance(table, dict) and isinstance(table.get(last), str) \
                and not Path(table[last]).is_absolute():
            table[last] = os.path.relpath(old / table[last], new)
