"""A run folder's own copy of what defined the run: rig file, scenario and model module.

Run folders travel (to a reviewer, to another bench PC), so the folder's rig.toml must
name its model module by the copy beside it, not by a path that only exists on the
machine that ran it. Only the ``module`` value under ``[plant]`` is rewritten; every other
byte of the rig file is kept. ``sources.json`` (covered by the manifest) records where
each copy came from and the SHA-256 of the original bytes. A secret given inline
(sim/records/_secrets.py) is replaced by a marker in the copy, and then the original's SHA-256
is not recorded either (it would let anyone test guesses of the secret).
"""

from __future__ import annotations

import hashlib
import json
import re
import tomllib
from pathlib import Path
from typing import Any

from plantrig.sim.config._checker import RigFileError, RigIssue
from plantrig.sim.config._rigfile import Rig
from plantrig.sim.records._secrets import redact_assignments, redact_rig_text
from plantrig.sim.scenario._scenario import Scenario

SOURCES = "sources.json"
RIG_COPY = "rig.toml"
SCENARIO_COPY = "scenario.toml"
PARTS_COPY = "sources"     # a composed rig's files as written (sim/config/_rig_document.py)

# A table header line: [plant], [ plant ] # comment, [[limits]].
_HEADER = re.compile(r"^\s*\[\[?\s*([^\[\]]*?)\s*\]\]?\s*(#.*)?$")
# The model key inside [plant] (or as a dotted key at the top): one string value.
_MODULE_PATTERN = (r"""^(?P<lead>\s*(?:plant\s*\.\s*)?KEY\s*=\s*)"""
                   r"""(?P<value>"(?:[^"\\\r\n]|\\.)*"|'[^'\r\n]*')""")
_MODULE = re.compile(_MODULE_PATTERN.replace("KEY", "module"))
_MODEL_KEYS = {"ode": "module", "fmu": "file"}   # plant kind -> the key naming its code


def copy_sources(rig: Rig, scenario: Scenario | None, folder: Path) -> dict[str, Any]:
    """Copy the rig file, the scenario and an ODE model's module into ``folder``.

    The copied rig.toml points at the module copy in the folder, so check and rerun
    work from the folder alone. Writes sources.json and returns its content.
    """
    folder = Path(folder)
    original = rig.path.read_bytes()
    files: dict[str, dict[str, Any]] = {}
    rig_bytes = original
    named, module = _module_source(rig)
    key = "file" if module is not None and module.suffix.lower() == ".fmu" else "module"
    if module is not None:
        rig_bytes = point_module_at(original, module.name, rig.path, key)
        data = module.read_bytes()
        (folder / module.name).write_bytes(data)
        files[module.name] = _entry("model", module, data)
    if rig.overrides or rig.parts:  # the effective document: what really ran
        from plantrig.sim.config._overrides import effective_copy
        rig_bytes = effective_copy(rig, module.name if module is not None else None, key)
    redacted, secrets = redact_rig_text(rig_bytes.decode("utf-8"))
    rig_bytes = redacted.encode("utf-8")
    (folder / RIG_COPY).write_bytes(rig_bytes)
    files[RIG_COPY] = _entry("rig", rig.path, original)
    secrets = sorted({*secrets, *redact_rig_text(original.decode("utf-8"))[1]})
    if secrets:   # the original's hash would let anyone test guesses of the secret
        files[RIG_COPY].update(sha256=None, bytes=None)
        files[RIG_COPY]["copy_sha256"] = hashlib.sha256(rig_bytes).hexdigest()
        files[RIG_COPY]["secrets_not_recorded"] = secrets
    if rig.overrides:
        files[RIG_COPY]["copy_sha256"] = hashlib.sha256(rig_bytes).hexdigest()
        files[RIG_COPY]["overrides"] = redact_assignments(rig.overrides)
    if rig.parts:
        files[RIG_COPY]["copy_sha256"] = hashlib.sha256(rig_bytes).hexdigest()
        files.update(_copy_parts(rig, folder))
    if module is not None and rig_bytes != original:
        files[RIG_COPY]["copy_sha256"] = hashlib.sha256(rig_bytes).hexdigest()
        files[RIG_COPY]["rewritten"] = {f"plant.{key}": {"from": named, "to": module.name}}
    if scenario is not None:
        path = Path(scenario.path)
        data = path.read_bytes() if path.is_file() else scenario.text.encode("utf-8")
        (folder / SCENARIO_COPY).write_bytes(data)
        files[SCENARIO_COPY] = _entry("scenario", path, data)
    doc = {"format": "plantrig sources", "version": 1, "files": files}
    (folder / SOURCES).write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")
    return doc


def _copy_parts(rig: Rig, folder: Path) -> dict[str, dict[str, Any]]:
    """The rig file as written and every part it took, under sources/ (rig.toml beside
    them is the resolved document)."""
    (folder / PARTS_COPY).mkdir(exist_ok=True)
    files = {}
    for i, path in enumerate((rig.path, *rig.parts)):
        data = path.read_bytes()
        redacted = redact_rig_text(data.decode("utf-8"))[0].encode("utf-8")
        name = f"{PARTS_COPY}/{i:02d}_{path.name}"
        (folder / name).write_bytes(redacted)
        files[name] = _entry("rig as written" if i == 0 else "part", path, data)
        if redacted != data:
            files[name].update(sha256=None, bytes=None)
    return files


def point_module_at(text: bytes, name: str, file: Path, key: str = "module") -> bytes:
    """The rig file bytes with ``[plant] module`` (``key``: ``file`` for an FMU) set to
    ``name``, all else unchanged.

    Raises RigFileError when the key is not written as a plain ``module = "..."`` line
    (the copy would otherwise point nowhere).
    """
    pattern = _MODULE if key == "module" else re.compile(_MODULE_PATTERN.replace("KEY", key))
    lines = text.decode("utf-8").splitlines(keepends=True)
    table = ""
    hits = []
    for i, line in enumerate(lines):
        header = _HEADER.match(line)
        if header:
            table = header.group(1)
            continue
        match = pattern.match(line)
        dotted = "." in match.group("lead") if match else False
        if match and ((table == "plant" and not dotted) or (table == "" and dotted)):
            hits.append((i, match))
    if len(hits) == 1:
        i, match = hits[0]
        lines[i] = (match.group("lead") + json.dumps(name)
                    + lines[i][match.end("value"):])
        out = "".join(lines)
        if _same_apart_from_module(text.decode("utf-8"), out, name, key):
            return out.encode("utf-8")
    example = "model.fmu" if key == "file" else "file.py"
    raise RigFileError([RigIssue(str(file), f"plant.{key}",
                                 "cannot point the run folder's copy at its model; "
                                 f"write it on one line as {key} = \"{example}\" under "
                                 "[plant]")])


def _same_apart_from_module(before: str, after: str, name: str, key: str = "module") -> bool:
    try:
        old, new = tomllib.loads(before), tomllib.loads(after)
    except tomllib.TOMLDecodeError:
        return False
    if new.get("plant", {}).get(key) != name:
        return False
    old.setdefault("plant", {})[key] = name
    return old == new


def _module_source(rig: Rig) -> tuple[str, Path | None]:
    """The rig file's ``module`` (an FMU's ``file``) value and the file it names (resolved
    as load_rig does)."""
    if getattr(rig.plant, "f", None) is None and getattr(rig.plant, "fmu_file", None) is None:
        return "", None
    doc = tomllib.loads(rig.text or rig.path.read_text(encoding="utf-8"))
    plant = doc.get("plant", {})
    key = _MODEL_KEYS.get(plant.get("kind"))
    if key is None or not isinstance(plant.get(key), str):
        return "", None
    path = (rig.path.parent / plant[key]).resolve()
    return plant[key], path if path.is_file() else None


def _entry(role: str, path: Path, data: bytes) -> dict[str, Any]:
    return {"role": role, "original": str(Path(path).resolve()),
            "sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)}
