"""The campaign report (report.html): placeholder until the full report lands."""

from __future__ import annotations

import html
from pathlib import Path
from typing import Any

from plantrig.sim._manifest import write_atomic


def write_report(folder: Path, summary: dict[str, Any], rows: list[dict[str, Any]]) -> Path:
    n = summary["cases"]
    text = (f"<!doctype html><title>{html.escape(summary['campaign']['name'])}</title>"
            f"<p>{n['passed']} of {n['planned']} cases passed</p>")
    write_atomic(folder / "report.html", text.encode())
    return folder / "report.html"
