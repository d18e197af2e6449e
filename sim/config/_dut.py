"""The device under test: which controller a run tested (the rig file's ``[dut]`` table).

A sign-off record must say what was tested, not only what it was tested against. The
rig file may name the device (it rarely changes on one bench); ``plantrig run --dut
NAME --firmware VERSION`` names it for one run and wins over the file. The run writes
what it used into ``run_start.json`` and ``summary.json`` under "dut".

    [dut]
    name = "belt drive controller, bench unit B"
    firmware = "2.4.1"
    serial = "SN 10442"        # optional
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from plantrig.sim.config._checker import Checker

DUT_KEYS = {"name", "firmware", "serial"}


@dataclass(frozen=True)
class DutSpec:
    """What was tested; empty strings where nothing was said."""

    name: str = ""
    firmware: str = ""
    serial: str = ""

    def with_overrides(self, name: str | None = None, firmware: str | None = None) -> DutSpec:
        """This device with the command line's --dut / --firmware, where given."""
        return DutSpec(name if name else self.name, firmware if firmware else self.firmware,
                       self.serial)

    def as_dict(self) -> dict[str, str]:
        return {"name": self.name, "firmware": self.firmware, "serial": self.serial}

    @property
    def named(self) -> bool:
        return bool(self.name or self.firmware or self.serial)


def _not_blank(value: Any) -> str | None:
    return None if value.strip() else "expected some text, found an empty string"


def parse_dut(c: Checker, doc: dict[str, Any]) -> DutSpec:
    """Check the optional ``[dut]`` table; every mistake goes to ``c`` with its key path."""
    t = c.table(doc, "dut", "", required=False)
    c.no_unknown(t, DUT_KEYS, "dut")
    values = {key: c.take(t, key, "dut", "str", default="", check=_not_blank) or ""
              for key in ("name", "firmware", "serial")}
    return DutSpec(**values)
