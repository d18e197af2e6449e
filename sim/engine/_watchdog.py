"""The one watchdog rule for every link, real or rehearsed.

A link is declared lost at the first tick whose silence exceeds the timeout: with the
last valid command at tick j, the link is lost at tick k when (k - j) * tick > timeout,
that is when k - j > silent_ticks_allowed(timeout, tick). With a 50 ms timeout at a
1 ms tick, 50 silent ticks are allowed and the loss is declared at the 51st. The serial
link, the MQTT link and a rehearsed link fault all use this function, so a fast
rehearsal trips in the same tick as the bench.
"""

from __future__ import annotations

import math


def silent_ticks_allowed(timeout_s: float, tick_s: float) -> int:
    """Whole ticks of silence that do not yet exceed ``timeout_s`` (at least 1). The
    small epsilon keeps 0.05 / 0.001 = 49.99999999999999 from losing a tick."""
    return max(1, math.floor(timeout_s / tick_s + 1e-9))
