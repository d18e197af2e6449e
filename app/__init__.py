"""plantrig: a virtual plant on the controller test bench."""

import os
import sys

__version__ = "0.1.0"
CAUTION_SHOWN = "PLANTRIG_CAUTION_SHOWN"   # set once a command has shown the caution

CAUTION = (
    "CAUTION: plantrig is a test tool, not a safety function. Its limits and interlocks "
    "protect a simulated plant and the rehearsal you run on it; they do not protect "
    "people or equipment. A controller under test may also be wired to real power stages, "
    "motors, heaters or valves: keep every hardware interlock, E-stop and protective "
    "device of the bench independent of plantrig, wired and tested to your site's safety "
    "rules and local codes. Where the machine or process falls under functional-safety "
    "standards (IEC 61508 and its sector standards, ISO 13849 or IEC 62061 for machinery "
    "control systems), its safety functions must be specified, verified and validated to "
    "those standards by competent people and signed off by licensed practice where the "
    "law requires it; a plantrig run is not such a validation."
)


_shown = False


def show_caution() -> None:
    """Print the caution to stderr, once per command: once per process, and not at all
    in a process a command started after showing it (started with ``shown_env()``)."""
    global _shown
    if _shown or os.environ.get(CAUTION_SHOWN) == "1":
        return
    _shown = True
    print(CAUTION, file=sys.stderr, flush=True)


def shown_env() -> dict[str, str]:
    """The environment for a child process of a command that has shown the caution."""
    return {**os.environ, CAUTION_SHOWN: "1"}
