"""The rig's checked signal conditioning as the engine's signal chains.

Every way of running a rig (the Python API, `plantrig run`, campaigns, rerun, the
dashboard) builds its chains here from the rig's typed channels, so they all condition
the signals the same way.
"""

from __future__ import annotations

from plantrig.sim.config._rigfile import Rig
from plantrig.sim.engine._conditioning import ActuatorChain, SensorChain
from plantrig.sim.engine._contracts import SignalChain


def build_chains(rig: Rig) -> tuple[SignalChain | None, SignalChain | None]:
    """(actuator chain, sensor chain) for ``rig``; None where the file asks for none."""
    actuators = ActuatorChain(rig.actuators, rig.tick) if rig.actuators else None
    sensors = SensorChain(rig.sensors, rig.seed) if rig.sensors else None
    return actuators, sensors
