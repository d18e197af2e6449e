"""A shipped rig file as one resolved TOML text (its parts taken in), for tests that
write an edited copy somewhere else."""

from __future__ import annotations

from pathlib import Path

from plantrig.sim import read_rig_document


def rig_text(path: Path) -> str:
    """The rig file's document with its parts taken in, as TOML."""
    return read_rig_document(path).text
