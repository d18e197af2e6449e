"""The one min/max envelope (sim/records/_envelope.py): bands for the comparison's
plots, checked against each bucket's min and max taken one bucket at a time."""

from __future__ import annotations

import math

import numpy as np
import pytest

from plantrig.sim import minmax_bands


@pytest.mark.parametrize("n,size", [(1000, 10), (1003, 10), (7, 100), (5000, 1667)])
def test_bands_hold_each_buckets_extremes(n: int, size: int) -> None:
    rng = np.random.default_rng(n)
    v = rng.normal(size=n)
    v[n // 3] = 40.0                       # a one-sample spike survives
    v[rng.integers(0, n, size=n // 10)] = np.nan
    lo, hi = minmax_bands(v, size)
    assert len(lo) == len(hi) == math.ceil(n / size)
    for j in range(len(lo)):
        part = [x for x in v[j * size:(j + 1) * size] if not math.isnan(x)]
        if part:
            assert (lo[j], hi[j]) == (min(part), max(part))
        else:
            assert math.isnan(lo[j]) and math.isnan(hi[j])
    assert np.nanmax(hi) == 40.0


def test_an_all_nan_bucket_is_nan_and_infinities_stay() -> None:
    v = np.array([np.nan, np.nan, 1.0, np.inf, -np.inf, 2.0])
    lo, hi = minmax_bands(v, 2)
    assert np.isnan(lo[0]) and np.isnan(hi[0])
    assert (lo[1], hi[1]) == (1.0, np.inf) and (lo[2], hi[2]) == (-np.inf, 2.0)
