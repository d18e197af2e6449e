"""Secrets never enter a record: rig-file keys marked secret are replaced by a marker.

Run folders travel (to a reviewer, a supplier, an archive), and everything built from
them (run.h5's sources, reports, exports, the catalogue) copies what the folder holds.
So the run folder's rig.toml, the overrides listed in sources.json and a rerun's list
of changes carry ``SECRET_MARK`` where the rig file gave a secret inline. The run itself
used the real value; the record says only that one was given. ``password_env`` (the
name of an environment variable) keeps the secret out of the rig file altogether.
"""

from __future__ import annotations

import copy
import re
import tomllib
from collections.abc import Sequence
from typing import Any

# Key paths whose values are secrets (the rig-file schema's secret keys).
SECRET_KEYS: tuple[str, ...] = ("link.password",)
SECRET_MARK = "<secret given inline: not recorded; use password_env>"


def secret_keys_in(doc: dict[str, Any]) -> list[str]:
    """The secret key paths ``doc`` (a parsed rig file) gives a value for."""
    return [key for key in SECRET_KEYS if _lookup(doc, key) is not None]


def redact_document(doc: dict[str, Any]) -> dict[str, Any]:
    """A copy of ``doc`` with every secret value replaced by SECRET_MARK."""
    out = copy.deepcopy(doc)
    for key in secret_keys_in(out):
        *tables, name = key.split(".")
        node = out
        for table in tables:
            node = node[table]
        node[name] = SECRET_MARK
    return out


def redact_rig_text(text: str) -> tuple[str, list[str]]:
    """The rig file ``text`` with its secrets replaced, and the keys replaced.

    Each secret written as a plain one-line ``key = "..."`` is replaced in place, so
    every other byte (comments, layout) stays. Anything else (a multi-line string, an
    inline table) is caught by parsing the result: then the whole document is written
    again by tomli-w, comments lost but no secret kept.
    """
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return text, []      # not a rig file this version reads: nothing ran from it
    found = secret_keys_in(doc)
    if not found:
        return text, []
    expected = redact_document(doc)
    out = text
    for key in found:
        out = _replace_line_value(out, key)
    try:
        if tomllib.loads(out) == expected:
            return out, found
    except tomllib.TOMLDecodeError:
        pass
    import tomli_w
    return tomli_w.dumps(expected), found


def redact_assignments(assignments: Sequence[str]) -> list[str]:
    """``--set`` assignments with the value of any secret key replaced."""
    out = []
    for text in assignments:
        key = text.partition("=")[0].strip()
        out.append(f"{key}={SECRET_MARK}" if key in SECRET_KEYS else text)
    return out


def _lookup(doc: dict[str, Any], key: str) -> Any:
    node: Any = doc
    for part in key.split("."):
        if not isinstance(node, dict) or part not in node:
            return None
        node = node[part]
    return node


_HEADER = re.compile(r"^\s*\[\[?\s*([^\[\]]*?)\s*\]\]?\s*(#.*)?$")
_STRING = r"""(?P<value>"(?:[^"\\\r\n]|\\.)*"|'[^'\r\n]*')"""


def _replace_line_value(text: str, key: str) -> str:
    """``text`` with the one-line string value of ``key`` set to SECRET_MARK (as found
    under its table, or as a dotted key at the top); unchanged where not found."""
    *tables, name = key.split(".")
    table = ".".join(tables)
    in_table = re.compile(rf"^(?P<lead>\s*{re.escape(name)}\s*=\s*){_STRING}")
    dotted = re.compile(rf"^(?P<lead>\s*{re.escape(table)}\s*\.\s*{re.escape(name)}\s*=\s*)"
                        + _STRING)
    lines = text.splitlines(keepends=True)
    current = ""
    for i, line in enumerate(lines):
        header = _HEADER.match(line)
        if header:
            current = header.group(1)
            continue
        match = in_table.match(line) if current == table else (
            dotted.match(line) if current == "" else None)
        if match:
            lines[i] = (match.group("lead") + '"' + SECRET_MARK + '"'
                        + line[match.end("value"):])
    return "".join(lines)
