"""Drained, heated tank: an open tank filled by a pump, drained through a bottom
orifice, and warmed by an immersion heater. Our own demo plant (invented numbers).

State x = [level h (m), temperature T (degC)]; input u = [inflow q (m3/s), heater P (W)].

    A dh/dt = q - a sqrt(2 g h)                            Torricelli outflow
    dT/dt   = (q (T_in - T) + P / (rho c) - k (T - T_amb) / (rho c)) / (A h)

The outflow follows Torricelli's law (outflow speed sqrt(2 g h)); the energy balance
mixes inflow at T_in into a well-stirred volume A h.
"""

import math

import numpy as np

G = 9.81  # m/s2, standard gravity


def dynamics(t, x, u, p):
    h = max(x[0], 0.0)
    temp = x[1]
    q = max(u[0], 0.0)
    heat = max(u[1], 0.0)
    outflow = p["orifice_area"] * math.sqrt(2.0 * G * h)
    dh = (q - outflow) / p["area"]
    volume = max(p["area"] * h, p["min_volume"])
    rho_c = p["rho_c"]
    d_temp = (q * (p["inlet_temp"] - temp) + heat / rho_c
              - p["loss_coeff"] * (temp - p["ambient_temp"]) / rho_c) / volume
    return np.array([dh, d_temp])


def output(t, x, u, p):
    return np.array([x[0], x[1]])
