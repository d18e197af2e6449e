"""Numeric libraries' thread pools at one thread, for `plantrig campaign`.

A campaign runs one case per core. Its local workers fork from the command's process
and inherit its thread pools, which numpy's BLAS sizes from these settings when numpy
first loads; so this module is imported before anything that loads numpy. Two plain
processes running cases side by side on the 2-core machine took 88-124 ms a case with
the default pools, 35 ms with one thread each.
"""

import os

for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")
