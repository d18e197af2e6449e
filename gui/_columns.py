"""Which tick-record columns exist, grouped by their prefix, with units and ranges.

The tape names its columns ``<prefix>:<name>`` ("y:belt_speed", "trip:overspeed");
the dashboard finds its panels by prefix, so columns added later (limits, trips,
faults) appear without changes here.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from plantrig.sim import Rig

# prefixes whose names are rig signals, with the rig group that gives their range
SIGNAL_PREFIXES = {"ref": "references", "cmd": "inputs", "u": "inputs", "y": "outputs",
                   "sent": "outputs", "x": "states"}


@dataclass(frozen=True)
class Column:
    """One tick-record column: where it is in a row and what it means."""

    index: int
    key: str          # full column name, "y:belt_speed"
    prefix: str       # "y" ("" for t, lateness, ...)
    name: str         # "belt_speed"
    unit: str
    low: float = -math.inf
    high: float = math.inf

    @property
    def has_range(self) -> bool:
        return math.isfinite(self.low) and math.isfinite(self.high) and self.high > self.low


class ColumnGroups:
    """The columns of one tape, looked up by full name or by prefix."""

    def __init__(self, columns: list[str], units: list[str], rig: Rig | None = None) -> None:
        ranges: dict[tuple[str, str], tuple[float, float]] = {}
        if rig is not None:
            for prefix, group in SIGNAL_PREFIXES.items():
                for signal in getattr(rig, group):
                    low = getattr(signal, "min", -math.inf)
                    high = getattr(signal, "max", math.inf)
                    ranges[(prefix, signal.name)] = (low, high)
        self.columns: list[Column] = []
        for i, key in enumerate(columns):
            prefix, _, name = key.partition(":") if ":" in key else ("", "", key)
            low, high = ranges.get((prefix, name), (-math.inf, math.inf))
            unit = units[i] if i < len(units) else ""
            self.columns.append(Column(i, key, prefix, name, unit, low, high))
        self._by_key = {c.key: c for c in self.columns}

    def __contains__(self, key: str) -> bool:
        return key in self._by_key

    def __getitem__(self, key: str) -> Column:
        return self._by_key[key]

    def index(self, key: str) -> int:
        return self._by_key[key].index

    def group(self, prefix: str) -> list[Column]:
        """Columns with this prefix, in tape order ("trip" -> every trip:<name>)."""
        return [c for c in self.columns if c.prefix == prefix]

    def prefixes(self) -> list[str]:
        seen: list[str] = []
        for c in self.columns:
            if c.prefix and c.prefix not in seen:
                seen.append(c.prefix)
        return seen
