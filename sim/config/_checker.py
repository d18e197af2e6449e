"""The one checker of plantrig's TOML files: rig files, scenarios, campaigns.

Every section of a file is read through a Checker, which records each mistake with its
key path and goes on, so one `plantrig check` lists every mistake at once. All messages
share one wording: "expected <what>, found <what was there>", with "; did you mean 'x'?"
when a close spelling exists. Imports neither numpy nor scipy.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Callable, Collection, Iterable
from dataclasses import dataclass
from typing import Any

Check = Callable[[Any], "str | None"]   # None when the value is fine, else the message


@dataclass(frozen=True)
class RigIssue:
    """One mistake in a file, at a key path."""

    file: str
    key: str
    message: str

    def __str__(self) -> str:
        return f"{self.file}: {self.key}: {self.message}" if self.key else (
            f"{self.file}: {self.message}")


class RigFileError(ValueError):
    """All the mistakes found in one file, reported together."""

    def __init__(self, issues: Iterable[RigIssue]) -> None:
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


def did_you_mean(word: Any, options: Iterable[Any], *, known: bool = False) -> str:
    """"; did you mean 'x'?" for the closest of ``options``; with ``known`` and no close
    one, the list of what is known instead; else ""."""
    names = sorted({str(o) for o in options}) if known else [str(o) for o in options]
    close = difflib.get_close_matches(str(word), names, n=1, cutoff=0.6)
    if close:
        return f"; did you mean '{close[0]}'?"
    return f"; known keys: {', '.join(names)}" if known else ""


def is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def not_one_of(value: Any, options: Iterable[Any], what: str = "") -> str:
    """The message for a value that is none of ``options`` (``what`` names them)."""
    options = list(options)
    listed = ", ".join(str(o) for o in options) or "none defined"
    expected = f"one of the {what} ({listed})" if what else f"one of {listed}"
    return f"expected {expected}, found {describe_value(value)}{did_you_mean(value, options)}"


def one_of(options: tuple[Any, ...], what: str = "") -> Check:
    """A check: the value is one of ``options`` (``what`` names them in the message)."""
    def check(value: Any) -> str | None:
        if value in options and not isinstance(value, bool) or (
                isinstance(value, bool) and any(o is value for o in options)):
            return None
        return not_one_of(value, options, what)
    return check


def finite_number(value: Any) -> str | None:
    if is_number(value) and math.isfinite(value):
        return None
    return f"expected a finite number, found {describe_value(value)}"


def positive_number(value: Any) -> str | None:
    if is_number(value) and math.isfinite(value) and value > 0:
        return None
    return f"expected a positive number, found {describe_value(value)}"


def positive_int(value: Any) -> str | None:
    if isinstance(value, int) and not isinstance(value, bool) and value > 0:
        return None
    return f"expected a positive whole number, found {describe_value(value)}"


def whole_number(lo: int, hi: int, what: str = "a whole number") -> Check:
    def check(value: Any) -> str | None:
        if isinstance(value, int) and not isinstance(value, bool) and lo <= value <= hi:
            return None
        return f"expected {what} {lo}..{hi}, found {describe_value(value)}"
    return check


def boolean(value: Any) -> str | None:
    return None if isinstance(value, bool) else (
        f"expected true or false, found {describe_value(value)}")


def text(value: Any) -> str | None:
    if isinstance(value, str) and value:
        return None
    return f"expected a non-empty string, found {describe_value(value)}"


def string(value: Any) -> str | None:
    return None if isinstance(value, str) else (
        f"expected a string, found {describe_value(value)}")


KIND_TEXT = {
    "number": "a number", "int": "a whole number", "str": "a string", "bool": "true or false",
    "matrix": "a matrix (list of rows of numbers)", "vector": "a list of numbers",
    "list": "a list", "table": "a table", "any": "a value",
}


def _kind_problem(kind: str, value: Any) -> str | None:
    expected = f"expected {KIND_TEXT[kind]}, found {describe_value(value)}"
    if kind == "number":
        if not is_number(value):
            return expected
        if not math.isfinite(value):
            return f"expected a finite number, found {value!r}"
        return None
    if kind == "matrix":
        if isinstance(value, list) and value and all(is_number(v) for v in value):
            return _not_finite(value)  # one row: a 1-row (or 1-column) matrix
        if not isinstance(value, list) or not all(
                isinstance(r, list) and all(is_number(v) for v in r) for r in value):
            return expected
        if len({len(r) for r in value}) > 1:
            return f"rows have different lengths {[len(r) for r in value]}"
        return next(filter(None, (_not_finite(r, f"[{i}]") for i, r in enumerate(value))),
                    None)
    if kind == "vector" and isinstance(value, list) and all(is_number(x) for x in value):
        return _not_finite(value)
    fits = {
        "int": lambda v: isinstance(v, int) and not isinstance(v, bool),
        "str": lambda v: isinstance(v, str),
        "bool": lambda v: isinstance(v, bool),
        "vector": lambda v: isinstance(v, list) and all(is_number(x) for x in v),
        "list": lambda v: isinstance(v, list),
        "table": lambda v: isinstance(v, dict),
        "any": lambda v: True,
    }[kind]
    return None if fits(value) else expected


def _not_finite(numbers: list[Any], row: str = "") -> str | None:
    """The first NaN or infinite entry of a list of numbers, as a mistake (a matrix, a
    table's points or a state vector has no use for one; it would reach the plant)."""
    for i, v in enumerate(numbers):
        if not math.isfinite(v):
            return f"expected finite numbers, found {v!r} at {row}[{i}]"
    return None


MISSING: Any = object()


def join(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


class Checker:
    """Walks a parsed TOML document, recording every mistake with its key path."""

    def __init__(self, file: str) -> None:
        self.file = file
        self.issues: list[RigIssue] = []

    def add(self, key: str, message: str) -> None:
        self.issues.append(RigIssue(self.file, key, message))

    def raise_if_any(self) -> None:
        if self.issues:
            raise RigFileError(self.issues)

    def table(self, doc: dict[str, Any], key: str, path: str,
              required: bool = False) -> dict[str, Any]:
        """``doc[key]`` as a table ({} when absent or not a table)."""
        value = doc.get(key, MISSING)
        if value is MISSING:
            if required:
                self.add(join(path, key), "missing table")
            return {}
        if not isinstance(value, dict):
            self.add(join(path, key), f"expected a table, found {describe_value(value)}")
            return {}
        return value

    def tables(self, doc: dict[str, Any], key: str, path: str = "") -> list[dict[str, Any]]:
        """``doc[key]`` as an array of tables ([[key]]); [] when absent or wrong."""
        value = doc.get(key, [])
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            self.add(join(path, key), f"expected an array of tables ([[{key}]]), found "
                                      f"{describe_value(value)}")
            return []
        return value

    def take(self, table: dict[str, Any], key: str, path: str, kind: str,
             default: Any = MISSING, check: Check | None = None) -> Any:
        """``table[key]`` as ``kind`` ('number', 'int', 'str', 'bool', 'matrix', 'vector',
        'list', 'table', 'any') passing ``check``; None (after recording why) when wrong,
        ``default`` when absent (a missing key without a default is a mistake)."""
        if key not in table:
            if default is MISSING:
                self.add(join(path, key), f"missing (expected {KIND_TEXT[kind]})")
                return None
            return default
        value = table[key]
        problem = _kind_problem(kind, value)
        if problem is None and check is not None:
            problem = check(value)
        if problem:
            self.add(join(path, key), problem)
            return None
        return value

    def value(self, table: dict[str, Any], key: str, path: str, default: Any,
              check: Check) -> Any:
        """``table[key]`` if ``check`` passes, else ``default`` (after recording why);
        ``default`` when absent."""
        if key not in table:
            return default
        problem = check(table[key])
        if problem:
            self.add(join(path, key), problem)
            return default
        return table[key]

    def no_unknown(self, table: dict[str, Any], known: Collection[str], path: str,
                   renamed: dict[str, str] | None = None) -> None:
        """Every key not in ``known`` is a mistake; ``renamed`` maps keys of earlier
        versions to the text naming what replaced them."""
        for key in table:
            if key in known:
                continue
            if renamed and key in renamed:
                self.add(join(path, key), f"old key name, no longer read; did you mean "
                                          f"{renamed[key]}?")
            else:
                self.add(join(path, key), f"unknown key{did_you_mean(key, known, known=True)}")
