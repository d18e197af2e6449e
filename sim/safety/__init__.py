"""Limits and interlocks: warn and trip bounds on signals, latches and their actions, the
E-stop.

Public names are read from plantrig.sim."""
