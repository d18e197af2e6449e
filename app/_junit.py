"""JUnit XML: the open test-report format continuous-integration systems read.

One test case per rehearsal (a campaign case, or one ``plantrig run --scenario``): it
fails when the run did not complete or a verdict failed (the failure text lists what
failed, in the words of ``plantrig run``), and is an error when the rehearsal could not
be judged at all (it raised). Written with the standard library only.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from plantrig.sim import verdict_lines, write_atomic


@dataclass(frozen=True)
class JUnitCase:
    """One test case: ``failure`` and ``error`` are (message, text) or None."""

    suite: str
    classname: str
    name: str
    time_s: float
    failure: tuple[str, str] | None = None
    error: tuple[str, str] | None = None
    output: str = ""


def judged_case(suite: str, classname: str, name: str, time_s: float, outcome: str,
                reason: str, verdicts: list[dict[str, Any]], error: str = "",
                output: str = "") -> JUnitCase:
    """A test case from a rehearsal's outcome and verdicts (dicts as in summary.json)."""
    if error:
        return JUnitCase(suite, classname, name, time_s, error=(error.splitlines()[0], error),
                         output=output)
    failed = [v for v in verdicts if not v["passed"]]
    if outcome == "completed" and not failed:
        return JUnitCase(suite, classname, name, time_s, output=output)
    parts = []
    if outcome != "completed":
        parts.append(f"ended {outcome}: {reason}")
    if failed:
        parts.append(f"{len(failed)} of {len(verdicts)} verdicts failed: "
                     + "; ".join(v["name"] for v in failed))
    text = "\n".join([f"outcome: {outcome} ({reason})", *verdict_lines(verdicts)])
    return JUnitCase(suite, classname, name, time_s, failure=("; ".join(parts), text),
                     output=output)


def write_junit(path: Path, title: str, cases: list[JUnitCase]) -> Path:
    """Write ``cases`` grouped into one <testsuite> per suite name (in first-seen order)."""
    suites: dict[str, list[JUnitCase]] = {}
    for case in cases:
        suites.setdefault(case.suite, []).append(case)
    root = ET.Element("testsuites", {"name": title, **_counts(cases)})
    for suite_name, members in suites.items():
        suite = ET.SubElement(root, "testsuite", {"name": suite_name, **_counts(members)})
        for case in members:
            node = ET.SubElement(suite, "testcase", classname=case.classname, name=case.name,
                                 time=f"{case.time_s:.3f}")
            if case.error is not None:
                ET.SubElement(node, "error", message=case.error[0],
                              type="error").text = case.error[1]
            elif case.failure is not None:
                ET.SubElement(node, "failure", message=case.failure[0],
                              type="failed").text = case.failure[1]
            if case.output:
                ET.SubElement(node, "system-out").text = case.output
    ET.indent(root)
    write_atomic(path, ET.tostring(root, encoding="utf-8", xml_declaration=True) + b"\n")
    return path


def _counts(cases: list[JUnitCase]) -> dict[str, str]:
    return {"tests": str(len(cases)),
            "failures": str(sum(c.failure is not None and c.error is None for c in cases)),
            "errors": str(sum(c.error is not None for c in cases)),
            "time": f"{sum(c.time_s for c in cases):.3f}"}
