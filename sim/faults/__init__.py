"""Injected faults and disturbances: sensors, actuators, the link and the plant.

Public names are read from plantrig.sim."""
