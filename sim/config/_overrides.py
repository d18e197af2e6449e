"""Overrides: ``KEY=VALUE`` assignments applied to a rig file before it is checked.

A test engineer changes one gain or one plant parameter for one run without editing
(and then forgetting to restore) the rig file. An assignment names a rig-file key path
with list indices (``plant.params.k=1.2``, ``controller.loops[0].kp=3``,
``references[0].to=0.5``); its value is a TOML literal (``1.2``, ``true``, ``"fast"``,
``[1, 2]``); anything that is not a TOML literal is taken as a string
(``rig.mode=fast``). The changed document goes through the one rig checker
(build_rig), so a wrong type or an unknown key gets the same message as in the file.

Paths must lead somewhere: every table and list entry on the way must exist (a
top-level table the file leaves out, such as ``[acceptance]``, may be created), and a
key missing from a free-form table (``plant.params``) is refused with a did-you-mean,
since nothing else would notice the typo. The run folder's rig.toml records the
effective document (written with tomli-w) and sources.json lists the assignments.
"""

from __future__ import annotations

import copy
import dataclasses
import re
import tomllib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import tomli_w

from plantrig.sim.config._checker import RigFileError, RigIssue, describe_value, did_you_mean
from plantrig.sim.config._rig_document import read_rig_document
from plantrig.sim.config._rigfile import TOP_KEYS, Rig, build_rig_document, load_rig

FREE_FORM_TABLES = {"plant.params"}      # any key is accepted there, so typos must stop here
_SEGMENT = re.compile(r"([A-Za-z0-9_-]+)((?:\[\d+\])*)")
_INDEX = re.compile(r"\[(\d+)\]")


def shortcut_assignments(duration: float | None = None, seed: int | None = None) -> list[str]:
    """The assignments the ``--duration`` and ``--seed`` shortcuts stand for."""
    out = []
    if duration is not None:
        out.append(f"rig.duration={duration!r}")
    if seed is not None:
        out.append(f"rig.seed={seed!r}")
    return out


def parse_path(key: str) -> list[str | int] | None:
    """``controller.loops[0].kp`` -> ['controller', 'loops', 0, 'kp']; None if malformed."""
    out: list[str | int] = []
    for part in key.split("."):
        match = _SEGMENT.fullmatch(part)
        if match is None:
            return None
        out.append(match.group(1))
        out.extend(int(i) for i in _INDEX.findall(match.group(2)))
    return out


def path_text(path: Sequence[str | int]) -> str:
    text = ""
    for step in path:
        text += f"[{step}]" if isinstance(step, int) else (f".{step}" if text else step)
    return text


def parse_value(raw: str) -> Any:
    """The TOML literal ``raw``; anything else is taken as a string (the checker then
    says what it expected, exactly as for the same value in the file)."""
    try:
        return tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        return raw


def apply_overrides(doc: dict[str, Any], assignments: Sequence[str],
                    file: str) -> dict[str, Any]:
    """A copy of the parsed rig document ``doc`` with every ``KEY=VALUE`` applied.

    Raises RigFileError naming ``file``, the key and the reason for every assignment
    that cannot be applied (all of them at once). The result still has to pass the
    rig checker (load_rig_with_overrides does both).
    """
    out = copy.deepcopy(doc)
    issues: list[RigIssue] = []
    for text in assignments:
        key, sep, raw = text.partition("=")
        key, raw = key.strip(), raw.strip()
        path = parse_path(key) if sep else None
        if path is None or not raw:
            issues.append(RigIssue(file, key if sep else "", f"cannot read override "
                                   f"{text!r}: write KEY=VALUE with a rig-file key path, "
                                   "e.g. plant.params.k=1.2 or controller.loops[0].kp=3"))
            continue
        problem = _assign(out, path, raw)
        if problem:
            issues.append(RigIssue(file, key, f"{problem} (override {text!r})"))
    if issues:
        raise RigFileError(issues)
    return out


def _assign(doc: dict[str, Any], path: list[str | int], raw: str) -> str | None:
    """Set ``path`` in ``doc`` to the value ``raw``; the reason when it cannot be done."""
    node: Any = doc
    for depth, step in enumerate(path):
        last = depth == len(path) - 1
        where = path_text(path[:depth]) or "the rig file"
        if isinstance(step, int):
            if not isinstance(node, list):
                return f"{where} is {describe_value(node)}, not a list"
            if step >= len(node):
                return (f"no entry [{step}] in {where}: it has {len(node)} "
                        f"(indices 0 to {len(node) - 1})" if node else f"{where} is empty")
            if last:
                node[step] = parse_value(raw)
                return None
            node = node[step]
            continue
        if not isinstance(node, dict):
            return f"{where} is {describe_value(node)}, not a table"
        here = path_text(path[:depth + 1])
        missing = step not in node
        if missing and (not last or path_text(path[:depth]) in FREE_FORM_TABLES):
            if depth == 0 and step in TOP_KEYS and not last:
                node[step] = {}          # a table the file leaves out, e.g. [acceptance]
            else:
                hint = did_you_mean(step, map(str, node), known=True).replace(
                    "; known keys:", "; it has") if node else ""
                return f"no key '{step}' in {where} ({here} does not exist){hint}"
        if last:
            node[step] = parse_value(raw)
            return None
        node = node[step]
    return None


def load_rig_with_overrides(path: str | Path, overrides: Sequence[str] = (), *,
                            duration: float | None = None, seed: int | None = None) -> Rig:
    """Read a rig file, apply ``overrides`` (and the shortcuts), check the result.

    Without any override this is load_rig. With them the Rig's ``text`` is the effective
    document (TOML written by tomli-w) and ``overrides`` lists the assignments, so the run
    folder records what really ran. Raises RigFileError like load_rig.
    """
    assignments = [*overrides, *shortcut_assignments(duration, seed)]
    rig = load_rig(path) if not assignments else None
    if rig is not None:
        return rig
    path = Path(path)
    document = read_rig_document(path)
    effective = apply_overrides(document.doc, assignments, str(path))
    set_here = tuple(a.split("=", 1)[0].strip() for a in assignments)
    rig = build_rig_document(dataclasses.replace(
        document, doc=effective, text=effective_text(effective), set_here=set_here), path)
    return dataclasses.replace(rig, overrides=tuple(assignments))


def effective_text(doc: dict[str, Any]) -> str:
    """The rig document as TOML (the run folder's record of what ran)."""
    return tomli_w.dumps(doc)


def effective_copy(rig: Rig, module_copy: str | None, key: str = "module") -> bytes:
    """The run folder's rig.toml for a rig built with overrides: its effective document,
    with ``plant.module`` (an FMU's ``plant.file``) naming the copy beside it (when there
    is one)."""
    doc = tomllib.loads(rig.text)
    if module_copy is not None:
        doc.setdefault("plant", {})[key] = module_copy
    return effective_text(doc).encode("utf-8")
