"""Errors about rig files: each names the file, the key path, what was expected and found."""

from __future__ import annotations

from dataclasses import dataclass


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
