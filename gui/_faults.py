"""The fault catalogue offered in the inject form.

plantrig.sim is the authority on which faults a run can take (a ``FAULT_KINDS`` name,
when the fault work provides one); until then the form offers plain sensor faults,
which the engine answers with a "command_refused" event if it cannot apply them.
"""

from __future__ import annotations

import plantrig.sim

PLAIN_SENSOR_FAULTS = (
    "stuck",       # the sensor holds its last value
    "offset",      # a constant added to the reading
    "drift",       # an offset growing at a constant rate per second
    "noise",       # extra white noise of the given standard deviation
    "dropout",     # the reading is not sent (the controller sees silence)
)


def fault_catalogue() -> tuple[str, ...]:
    """Fault kinds to list: sim's own catalogue if it has one, else plain sensor faults."""
    kinds = getattr(plantrig.sim, "FAULT_KINDS", None)
    if callable(kinds):
        kinds = kinds()
    if kinds:
        return tuple(str(k) for k in kinds)
    return PLAIN_SENSOR_FAULTS
