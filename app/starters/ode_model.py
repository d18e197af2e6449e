"""The model of a rig file written by `plantrig new ode`: a pendulum swung by a motor at
its pivot (an example of our own, invented numbers).

State x = [angle theta (rad, 0 hanging down), rate omega (rad/s)]; input u = [torque].

    m l^2 omega' = tau - b omega - m g l sin(theta)
"""

import math

import numpy as np


def dynamics(t, x, u, p):
    """dx/dt at time t (s) for state x, input u and the rig file's [plant.params] p."""
    theta, omega = x[0], x[1]
    inertia = p["mass"] * p["length"] ** 2
    torque = u[0] - p["damping"] * omega - p["mass"] * p["gravity"] * p["length"] * math.sin(theta)
    return np.array([omega, torque / inertia])


def output(t, x, u, p):
    """The measured outputs: the angle."""
    return np.array([x[0]])
