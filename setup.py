"""The one compiled part: the C kernel of plain fast-mode ticks (sim/engine/_stretch.c).

It is a plain shared library loaded with ctypes (no Python headers); -ffp-contract=off
keeps every multiply and add as its own IEEE operation, as in the Python tick it matches.
Everything else is in pyproject.toml.
"""

from setuptools import Extension, setup

setup(ext_modules=[Extension(
    "plantrig.sim.engine._stretch_kernel", sources=["sim/engine/_stretch.c"],
    extra_compile_args=["-O2", "-std=c99", "-ffp-contract=off", "-fno-fast-math"])])
