"""Thinning a long series for display without hiding its peaks (min-max decimation).

A plot a thousand pixels wide cannot show more than two values per pixel column, so
each bucket of samples is replaced by its minimum and its maximum: every spike survives
(common practice for oscilloscope-style displays). docs/platform.md: 8 plots of 10k
points render at ~20 fps under Mesa. One home for the report's and `plantrig plot`'s
traces, the comparison's bands and the dashboard's plots.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray

Vector = NDArray[np.float64]


def decimate_minmax(x: Vector, y: Vector, buckets: int) -> tuple[Vector, Vector]:
    """At most ``2 * buckets`` points of (x, y) keeping each bucket's extremes.

    Series short enough to draw as they are come back unchanged. NaN samples are
    ignored inside a bucket unless the whole bucket is NaN.
    """
    n = len(x)
    if buckets < 1:
        raise ValueError(f"buckets must be at least 1, got {buckets}")
    if n <= 2 * buckets:
        return x, y
    size = -(-n // buckets)                 # ceil: every sample lands in one bucket
    full = n // size
    head_y = y[:full * size].reshape(full, size)
    filled = np.where(np.isnan(head_y), np.inf, head_y)
    lo = np.argmin(filled, axis=1)
    filled = np.where(np.isnan(head_y), -np.inf, head_y)
    hi = np.argmax(filled, axis=1)
    base = np.arange(full) * size
    first = base + np.minimum(lo, hi)
    second = base + np.maximum(lo, hi)
    picks = np.empty(2 * full, dtype=np.int64)
    picks[0::2] = first
    picks[1::2] = second
    if full * size < n:                     # the short last bucket
        tail = np.arange(full * size, n)
        ty = y[tail]
        if np.isnan(ty).all():
            extra = np.array([tail[0], tail[-1]])
        else:
            extra = np.sort(np.array([tail[np.nanargmin(ty)], tail[np.nanargmax(ty)]]))
        picks = np.concatenate([picks, extra])
    return x[picks], y[picks]


def minmax_bands(v: Vector, size: int) -> tuple[Vector, Vector]:
    """Each ``size``-sample bucket's minimum and maximum of ``v``, for drawing a band;
    NaN samples are ignored, an all-NaN bucket gives NaN. The last bucket may be short.
    A long series can be banded a part at a time when each part is whole buckets."""
    n = len(v)
    full = n // size
    head = v[:full * size].reshape(full, size)
    lo, hi = np.fmin.reduce(head, axis=1), np.fmax.reduce(head, axis=1)  # NaN skipped
    if full * size < n:
        tail = v[full * size:]
        lo = np.append(lo, np.fmin.reduce(tail))
        hi = np.append(hi, np.fmax.reduce(tail))
    return lo, hi


def thin_rows(read: Callable[[int, int], Vector], first: int, stop: int, max_rows: int,
              t_index: int, part_rows: int = 1 << 17) -> Vector:
    """Tick rows ``first`` to ``stop`` (``read(a, b)`` gives rows a to b), thinned to at
    most about ``max_rows``: each bucket of rows becomes two, its per-column minimum and
    maximum (NaN ignored), with the bucket's first and last plant time in column
    ``t_index``, so time still runs forward. Read ``part_rows`` at a time at most."""
    if stop - first <= max_rows:
        return read(first, stop)
    size = -(-(stop - first) // max(1, max_rows // 2))     # rows per bucket
    part = max(1, part_rows // size) * size
    blocks = []
    for start in range(first, stop, part):
        rows = read(start, min(stop, start + part))
        full = len(rows) // size
        buckets = [rows[:full * size].reshape(full, size, -1)] if full else []
        if full * size < len(rows):
            buckets.append(rows[full * size:][np.newaxis])
        for bucket in buckets:
            low, high = np.fmin.reduce(bucket, axis=1), np.fmax.reduce(bucket, axis=1)
            low[:, t_index] = bucket[:, 0, t_index]
            high[:, t_index] = bucket[:, -1, t_index]
            pair = np.empty((2 * len(low), low.shape[1]))
            pair[0::2], pair[1::2] = low, high
            blocks.append(pair)
    return np.concatenate(blocks)
