"""What each kind of tick-record signal is called where people read it.

The record's column prefixes stay short (``y:belt_speed``); everything a person reads
(dashboard legends and table, report panels, export descriptions, docs) uses these
words, so the true plant value and the value the controller sees are never confused.
With a stuck sensor, "plant output (true)" moves while "controller reads" stays put.
"""

from __future__ import annotations

SIGNAL_LABELS = {
    "ref": "reference",
    "cmd": "controller command",
    "u": "plant input (applied)",
    "y": "plant output (true)",
    "sent": "controller reads",
    "x": "plant state (true)",
    "d": "disturbance",
}
"""Column prefix -> the label shown for its signals (followed by the signal's name)."""

SIGNAL_MEANINGS = {
    "ref": "the value the loop is asked to reach",
    "cmd": "the command as the link let it through (clamped to the input's range in "
           "clamp mode), before the actuator chain",
    "u": "what the plant got: the command after the actuator chain and safety",
    "y": "what the plant really puts out, before the sensor chain",
    "sent": "the sensor value the controller receives: the plant output after the "
            "sensor chain (scaling, noise, delay, sensor faults)",
    "x": "the plant's state at the start of the tick",
    "d": "an extra plant input from a disturbance (a load step, say)",
}
"""Column prefix -> one line saying what the value is (docs, exports, glossary)."""
