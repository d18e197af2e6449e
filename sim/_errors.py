"""Errors about rig files: each names the file, the key path, what was expected and found."""

from __future__ import annotations

import difflib
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class RigIssue:
    """One mistake in a rig file."""

    file: str
    key: str
    message: str

    def __str__(self) -> str:
        return f"{self.file}: {self.key}: {self.message}" if self.key else (
            f"{self.file}: {self.message}")


class RigFileError(ValueError):
    """All the mistakes found in one rig file, reported together."""

    def __init__(self, issues: list[RigIssue]) -> None:
        self.issues = list(issues)
        super().__init__("\n".join(str(i) for i in self.issues))


def describe_value(value: Any) -> str:
    """What was found, for a message: 'string 'x'', 'a list of 3', 'boolean true', ..."""
    if isinstance(value, bool):
        return f"boolean {str(value).lower()}"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return f"a list of {len(value)}"
    if isinstance(value, str):
        return f"string {value!r}"
    return f"{type(value).__name__} {value!r}"


def one_of(options: tuple[str, ...]) -> Callable[[Any], str | None]:
    """A check: None when the value is one of ``options``, else a message with a
    did-you-mean for a close spelling."""
    def check(value: Any) -> str | None:
        if value in options:
            return None
        close = difflib.get_close_matches(str(value), options, n=1)
        hint = f"; did you mean '{close[0]}'?" if close else ""
        return f"expected one of {', '.join(options)}, found {value!r}{hint}"
    return check
