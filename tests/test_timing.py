"""The bounded timing histogram against numpy's percentiles (nearest rank, numpy's
``inverted_cdf`` method: Hyndman and Fan, Sample quantiles in statistical packages,
The American Statistician 50 (1996), definition 1)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from plantrig.sim.engine._timing import COARSE_NS, FINE_LIMIT_NS, FINE_NS, DurationHistogram


@pytest.mark.parametrize("scale_ns", [3_000, 400_000, 40_000_000])
def test_quantiles_are_within_one_bin_above_numpy(scale_ns: int) -> None:
    rng = np.random.default_rng(11)
    values = rng.lognormal(0.0, 1.2, 20_000) * scale_ns
    values = np.append(values, [0, 12 * 10**9]).astype(np.int64)  # a zero and a 12 s stall
    hist = DurationHistogram()
    for v in values.tolist():
        hist.add(v)
    assert hist.count == values.size and hist.max_ns == values.max()
    for q in (1, 50, 90, 99, 99.9):
        exact = float(np.percentile(values, q, method="inverted_cdf"))
        got = hist.quantile_s(q) * 1e9
        bin_ns = FINE_NS if exact < FINE_LIMIT_NS else COARSE_NS
        assert exact <= got <= exact + bin_ns, (q, exact, got)
    assert hist.quantile_s(100) == hist.max_s == 12.0


def test_memory_does_not_grow_with_the_count() -> None:
    hist = DurationHistogram()
    sizes = (len(hist.fine), len(hist.coarse))
    for v in range(0, 50_000_000, 997):
        hist.add(v)
    assert (len(hist.fine), len(hist.coarse)) == sizes
    assert DurationHistogram().quantile_s(50) == 0.0


def test_counting_many_at_once_equals_one_by_one() -> None:
    values = np.random.default_rng(3).lognormal(0, 2.0, 5000).astype(np.int64) * 997
    one, many = DurationHistogram(), DurationHistogram()
    for v in values.tolist():
        one.add(v)
    many.add_many(values[:1234])
    many.add_many(values[1234:])
    assert (one.fine, one.coarse, one.beyond, one.count, one.max_ns) == \
        (many.fine, many.coarse, many.beyond, many.count, many.max_ns)


def test_the_spin_window_follows_the_measured_wake_up_jitter() -> None:
    from plantrig.sim.engine._clock import SPIN_MAX_NS, SPIN_NS, spin_window_ns

    jittery = [3_000] * 990 + [300_000] * 10       # p99 is the 991st of 1000: 300 us
    assert spin_window_ns(jittery) == 450_000       # 1.5 x p99
    assert spin_window_ns([1_000] * 100) == SPIN_NS           # never below the floor
    assert spin_window_ns([5_000_000] * 100) == SPIN_MAX_NS
    assert spin_window_ns([]) == SPIN_NS
    assert spin_window_ns(jittery, tick_ns=1_000_000) == 250_000        # a quarter tick
    assert spin_window_ns([1_000] * 100, tick_ns=100_000) == 25_000     # 10 kHz


def test_a_real_time_run_measures_and_records_its_spin_window() -> None:
    from plantrig.sim import Engine, MemoryTape, build_rig, tick_columns

    rig = build_rig({
        "rig": {"name": "spin", "tick": 0.001, "duration": 0.05, "mode": "realtime"},
        "plant": {"kind": "lti", "A": [[-1.0]], "B": [[1.0]], "C": [[1.0]],
                  "states": [{"name": "x"}], "inputs": [{"name": "u"}],
                  "outputs": [{"name": "y"}]},
        "references": [{"name": "r", "kind": "constant", "value": 0.5}],
        "controller": {"kind": "open_loop", "drive": {"u": "r"}},
    }, Path("spin.toml"))
    engine = Engine(rig, MemoryTape(tick_columns(rig)[0], rig.n_ticks))
    outcome = engine.run()
    spin = outcome.timing(rig.tick)["spin_window_s"]
    assert isinstance(spin, float) and 200e-6 <= spin <= 250e-6    # floor .. a quarter tick
    assert engine.clock.spin_ns == round(spin * 1e9)   # type: ignore[attr-defined]
