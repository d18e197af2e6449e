"""The rig files plantrig ships: the demo rigs (and the tank's ODE module), rehearsals and
a campaign. They are package data of plantrig.configs, so `plantrig demo` finds its rig
in an installed copy as well as in a checkout (where this is the configs/ folder)."""

from pathlib import Path

CONFIGS = Path(__file__).resolve().parent

__all__ = ["CONFIGS"]
