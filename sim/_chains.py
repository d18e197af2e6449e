"""The rig's checked signal conditioning as the engine's signal chains.

Every way of running a rig (the Python API, `plantrig run`, campaigns, rerun, the
dashboard) builds its chains here from the rig's typed channels, so they all condition
the signals the same way.
"""

from __future__ import annotations

from plantrig.sim._conditioning import ActuatorChain, SensorChain
from plantrig.sim._contracts import SignalChain
from plantrig.sim._rigfile import Rig


def build_chains(rig: Rig) -> tuple[SignalChain | None, SignalChain | None]:
    """(actuator chain, sensor chain) for ``rig``; None where the file asks for none."""
    actuators = ActuatorChain(rig.actuators, rig.tick) if rig.actuators else None
    sensors = SensorChain(rig.sensors, rig.seed) if rig.sensors else None
    return actuators, sensors
