"""Sensor and actuator chains: converter transfer, noise, delay, limits, NaN guard."""

from __future__ import annotations

import math
import tracemalloc

import numpy as np
import pytest
from scipy import stats

from plantrig.sim.engine import _conditioning as cond
from plantrig.sim.engine._conditioning import (
    ActuatorChain,
    ChainSpecError,
    SensorChain,
    build_actuator_chain,
    build_sensor_chain,
    counts_to_eng,
    eng_to_counts,
)
from plantrig.sim.engine._contracts import SignalChain


def run(chain: SignalChain, inputs: np.ndarray) -> np.ndarray:
    """Feed rows of ``inputs`` tick by tick; return the rows written to dst."""
    out = np.empty_like(inputs, dtype=np.float64)
    dst = np.empty(inputs.shape[1])
    for k, row in enumerate(inputs):
        chain.apply(k, np.ascontiguousarray(row, dtype=np.float64), dst)
        out[k] = dst
    return out


# --- converter transfer function --------------------------------------------------
# Convention (common practice for a unipolar straight-binary converter with its end
# codes on the range ends): counts = round((v - vmin) / (vmax - vmin) * (2^bits - 1)).


@pytest.mark.parametrize(
    ("v", "bits", "lo", "hi", "counts"),
    [
        # worked by hand from the formula above
        (0.0, 12, 0.0, 10.0, 0),
        (10.0, 12, 0.0, 10.0, 4095),
        (2.5, 12, 0.0, 10.0, 1024),  # 0.25 * 4095 = 1023.75
        (-5.0, 16, -5.0, 5.0, 0),
        (0.0, 16, -5.0, 5.0, 32768),  # 0.5 * 65535 = 32767.5, ties to even
        (1.0, 8, 0.0, 4.0, 64),  # 0.25 * 255 = 63.75
        (-1.0, 12, 0.0, 10.0, 0),  # below range: clipped
        (11.0, 12, 0.0, 10.0, 4095),  # above range: clipped
    ],
)
def test_eng_to_counts_hand_values(v: float, bits: int, lo: float, hi: float, counts: int) -> None:
    assert eng_to_counts(v, bits, lo, hi) == counts


def test_eng_to_counts_matches_formula_with_python_round() -> None:
    rng = np.random.default_rng(7)
    for bits, lo, hi in [(8, 0.0, 5.0), (10, -3.3, 3.3), (12, 4.0, 20.0), (16, -10.0, 10.0)]:
        v = rng.uniform(lo, hi, 2000)
        top = 2**bits - 1
        # Python's round() also rounds ties to even
        want = [round((x - lo) / (hi - lo) * top) for x in v.tolist()]
        got = eng_to_counts(v, bits, lo, hi)
        np.testing.assert_array_equal(got, want)
        assert got.min() >= 0 and got.max() <= top


@pytest.mark.parametrize(("bits", "lo", "hi"), [(8, 0.0, 5.0), (12, -10.0, 10.0), (16, 0.0, 1.0)])
def test_adc_round_trip_error_within_half_lsb(bits: int, lo: float, hi: float) -> None:
    # quantization error of a rounding converter is at most half an LSB (common practice)
    lsb = (hi - lo) / (2**bits - 1)
    v = np.random.default_rng(1).uniform(lo, hi, 5000)
    err = counts_to_eng(eng_to_counts(v, bits, lo, hi), bits, lo, hi) - v
    assert np.max(np.abs(err)) <= lsb / 2 * (1 + 1e-9)
    assert counts_to_eng(0, bits, lo, hi) == lo
    assert counts_to_eng(2**bits - 1, bits, lo, hi) == pytest.approx(hi, rel=0, abs=1e-12)


def test_converter_rejects_bad_arguments() -> None:
    with pytest.raises(ValueError, match="bits"):
        eng_to_counts(1.0, 0, 0.0, 1.0)
    with pytest.raises(ValueError, match="lo < hi"):
        counts_to_eng(1.0, 8, 1.0, 1.0)


# --- sensor chain --------------------------------------------------------------


def test_step_quantization_error_within_half_step() -> None:
    step = 0.25
    chain = build_sensor_chain([{"step": step}], seed=0)
    v = np.random.default_rng(3).uniform(-100, 100, (4000, 1))
    q = run(chain, v)
    assert np.max(np.abs(q - v)) <= step / 2 * (1 + 1e-12)
    np.testing.assert_array_equal(q / step, np.round(q / step))


def test_adc_channel_sends_counts_or_reconstructed_value() -> None:
    spec = {"adc_bits": 12, "adc_lo": 0.0, "adc_hi": 10.0}
    chain = build_sensor_chain([spec, {**spec, "send_counts": True}], seed=0)
    v = np.random.default_rng(4).uniform(-1.0, 11.0, (500, 1))
    out = run(chain, np.hstack([v, v]))
    counts = eng_to_counts(v[:, 0], 12, 0.0, 10.0)
    np.testing.assert_array_equal(out[:, 1], counts)
    np.testing.assert_array_equal(out[:, 0], counts_to_eng(counts, 12, 0.0, 10.0))


def test_noise_statistics_and_reproducibility() -> None:
    sigma, n_ch, n_ticks = 0.5, 500, 400
    spec = [{"noise_std": sigma, "offset": 3.0}] * n_ch
    zeros = np.zeros((n_ticks, n_ch))
    a = run(build_sensor_chain(spec, seed=42), zeros) - 3.0
    n = a.size
    # sample mean: 5-sigma bound on the standard error sigma / sqrt(n)
    assert abs(a.mean()) < 5 * sigma / math.sqrt(n)
    # sample variance: (n-1) s^2 / sigma^2 follows chi-square(n-1); two-sided p = 1e-6
    chi = (n - 1) * a.var(ddof=1) / sigma**2
    assert stats.chi2.ppf(5e-7, n - 1) < chi < stats.chi2.isf(5e-7, n - 1)
    # same seed -> bit-for-bit the same stream; a reset starts it again
    chain = build_sensor_chain(spec, seed=42)
    np.testing.assert_array_equal(run(chain, zeros) - 3.0, a)
    chain.reset()
    np.testing.assert_array_equal(run(chain, zeros) - 3.0, a)
    other = run(build_sensor_chain(spec, seed=43), zeros) - 3.0
    assert not np.array_equal(other, a)


def test_noise_free_channels_are_exact_next_to_noisy_ones() -> None:
    chain = build_sensor_chain([{"gain": 2.0, "offset": -1.0}, {"noise_std": 1.0}], seed=1)
    y = np.random.default_rng(5).normal(size=(50, 2))
    out = run(chain, y)
    np.testing.assert_array_equal(out[:, 0], 2.0 * y[:, 0] - 1.0)


@pytest.mark.parametrize("n", [0, 1, 3, 17])
def test_delay_shifts_by_exactly_n_ticks(n: int) -> None:
    chain = build_sensor_chain([{"delay_ticks": n}], seed=0)
    x = np.random.default_rng(n).normal(size=(100, 1))
    out = run(chain, x)
    np.testing.assert_array_equal(out[n:, 0], x[: len(x) - n, 0])
    # before n ticks have passed the line repeats the first value
    np.testing.assert_array_equal(out[:n, 0], np.full(n, x[0, 0]))


def test_channels_keep_their_own_delays_and_reset_empties_the_line() -> None:
    delays = [0, 2, 5]
    chain = build_sensor_chain([{"delay_ticks": d} for d in delays], seed=0)
    x = np.arange(1.0, 31.0)[:, None] * np.array([1.0, 10.0, 100.0])
    out = run(chain, x)
    for j, d in enumerate(delays):
        np.testing.assert_array_equal(out[d:, j], x[: 30 - d, j])
    chain.reset()
    again = run(chain, x[::-1].copy())
    np.testing.assert_array_equal(again[:5, 2], np.full(5, x[-1, 2]))


def test_sensor_order_gain_noise_delay_saturate_quantize() -> None:
    # gain before saturation, quantization after it: 0.6 * 2 = 1.2 -> clip 1.0 -> 0.9
    chain = build_sensor_chain([{"gain": 2.0, "lo": 0.0, "hi": 1.0, "step": 0.3}], seed=0)
    out = run(chain, np.array([[0.6], [-0.2], [0.2]]))
    np.testing.assert_allclose(out[:, 0], [0.9, 0.0, 0.3], rtol=0, atol=1e-15)


def test_sensor_saturation() -> None:
    chain = build_sensor_chain([{"lo": -1.0, "hi": 2.0}, {"hi": 0.5}], seed=0)
    y = np.linspace(-5, 5, 101)
    out = run(chain, np.column_stack([y, y]))
    np.testing.assert_array_equal(out[:, 0], np.clip(y, -1.0, 2.0))
    np.testing.assert_array_equal(out[:, 1], np.minimum(y, 0.5))


# --- actuator chain ------------------------------------------------------------


def test_rate_limit_turns_a_step_into_a_ramp_of_slope_limit() -> None:
    rate, dt = 2.0, 0.01
    chain = build_actuator_chain([{"rate": rate}, {"rate": rate, "initial": 10.0}], dt=dt)
    cmd = np.tile([10.0, 0.0], (700, 1))
    u = run(chain, cmd)
    for j, (start, end) in enumerate([(0.0, 10.0), (10.0, 0.0)]):
        path = np.concatenate([[start], u[:, j]])
        slope = np.diff(path) / dt
        moving = np.abs(path[1:] - end) > 1e-9
        np.testing.assert_allclose(np.abs(slope[moving]), rate, rtol=1e-6)
        # reaches the target after (10 / 2) s = 500 ticks and stays there
        assert np.count_nonzero(moving) == 499
        np.testing.assert_allclose(u[499:, j], end, rtol=0, atol=1e-9)


def test_actuator_counts_to_engineering_then_saturate() -> None:
    chain = build_actuator_chain(
        [{"dac_bits": 10, "dac_lo": -10.0, "dac_hi": 10.0, "hi": 5.0}, {"gain": 0.5, "offset": 1}]
    )
    cmd = np.array([[0.0, 4.0], [1023.0, -2.0], [511.0, 0.0], [2000.0, 0.0], [700.0, 0.0]])
    u = run(chain, cmd)
    want0 = np.minimum(counts_to_eng(np.clip(cmd[:, 0], 0, 1023), 10, -10.0, 10.0), 5.0)
    np.testing.assert_array_equal(u[:, 0], want0)
    np.testing.assert_array_equal(u[:, 1], 0.5 * cmd[:, 1] + 1.0)
    assert u[1, 0] == 5.0 and u[0, 0] == -10.0


def test_non_finite_commands_never_reach_the_plant() -> None:
    chain = build_actuator_chain([{"initial": 0.5}, {"rate": 1.0, "lo": -1, "hi": 1}], dt=0.1)
    nan, inf = math.nan, math.inf
    cmd = np.array([[nan, inf], [1.0, 1.0], [inf, nan], [-inf, -inf], [2.0, -1.0]])
    u = run(chain, cmd)
    assert np.all(np.isfinite(u))
    np.testing.assert_array_equal(u[:, 0], [0.5, 1.0, 1.0, 1.0, 2.0])
    np.testing.assert_allclose(u[:, 1], [0.0, 0.1, 0.1, 0.1, 0.0], atol=1e-15)
    assert chain.non_finite_count == 6
    chain.reset()
    assert chain.non_finite_count == 0


def test_overflow_to_infinity_is_held_out_too() -> None:
    chain = build_actuator_chain([{"gain": 1e300}])
    with np.errstate(over="ignore"):
        u = run(chain, np.array([[1e-300], [1e10], [2e-300]]))
    np.testing.assert_array_equal(u[:, 0], [1.0, 1.0, 2.0])
    assert chain.non_finite_count == 1


def test_apply_allocates_nothing_after_warm_up() -> None:
    # Wide chains, so any per-call temporary array (8 kB at 1000 channels) would show in
    # the traced peak, while Python's own small objects stay far below it.
    n = 1000
    sensor_specs = [
        {"gain": 2.0, "noise_std": 0.1, "delay_ticks": 3, "lo": -5, "hi": 5, "step": 0.01},
        {"adc_bits": 12, "adc_lo": 0.0, "adc_hi": 10.0, "send_counts": True},
    ]
    actuator_specs = [
        {"dac_bits": 12, "dac_lo": 0, "dac_hi": 5, "rate": 3.0},
        {"gain": 2.0, "lo": 0},
    ]
    sensors = build_sensor_chain(sensor_specs * (n // 2), seed=9)
    actuators = build_actuator_chain(actuator_specs * (n // 2), dt=1e-3)
    src = np.random.default_rng(0).uniform(-1, 6, n)
    src[::7] = math.nan
    dst = np.zeros(n)

    def ticks(count: int) -> None:
        for k in range(count):
            sensors.apply(k, src, dst)
            actuators.apply(k, src, dst)

    tracemalloc.start()
    try:
        ticks(200)  # warm up under tracing: numpy fills its small-block caches once
        base = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        ticks(1000)
        now, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert now - base < 1024
    assert peak - base < 4096


# --- specs ---------------------------------------------------------------------


@pytest.mark.parametrize(
    ("spec", "key"),
    [
        ({"delay": 1}, "delay"),
        ({"gain": "2"}, "gain"),
        ({"gain": True}, "gain"),
        ({"noise_std": -1.0}, "noise_std"),
        ({"noise_std": math.nan}, "noise_std"),
        ({"delay_ticks": 1.5}, "delay_ticks"),
        ({"delay_ticks": -1}, "delay_ticks"),
        ({"lo": 2.0, "hi": 1.0}, "hi"),
        ({"step": 0.0}, "step"),
        ({"adc_bits": 12}, "adc_lo"),
        ({"adc_bits": 0, "adc_lo": 0, "adc_hi": 1}, "adc_bits"),
        ({"adc_bits": 12, "adc_lo": 1, "adc_hi": 1}, "adc_hi"),
        ({"adc_lo": 0.0}, "adc_lo"),
        ({"adc_bits": 8, "adc_lo": 0, "adc_hi": 1, "step": 0.1}, "step"),
        ({"send_counts": True}, "send_counts"),
        ({"send_counts": 1}, "send_counts"),
        ({"name": ""}, "name"),
    ],
)
def test_bad_sensor_spec_names_the_key(spec: dict, key: str) -> None:
    with pytest.raises(ValueError, match=rf"sensors\[1\]\.{key}:") as info:
        build_sensor_chain([{}, spec], seed=0)
    assert isinstance(info.value, ChainSpecError)
    assert (info.value.index, info.value.key) == (1, key)


@pytest.mark.parametrize(
    ("spec", "key"),
    [
        ({"slew": 1.0}, "slew"),
        ({"rate": 0.0}, "rate"),
        ({"rate": -2.0}, "rate"),
        ({"dac_bits": 12, "dac_lo": 0, "dac_hi": 5, "gain": 2.0}, "gain"),
        ({"dac_bits": 40, "dac_lo": 0, "dac_hi": 5}, "dac_bits"),
        ({"dac_hi": 5}, "dac_hi"),
        ({"lo": 0.0, "hi": 1.0, "initial": 2.0}, "initial"),
        ({"offset": math.inf}, "offset"),
    ],
)
def test_bad_actuator_spec_names_the_key(spec: dict, key: str) -> None:
    with pytest.raises(ValueError, match=rf"actuators\[0\]\.{key}:"):
        build_actuator_chain([spec], dt=0.01)


def test_rate_limit_needs_the_tick_length() -> None:
    with pytest.raises(ValueError, match=r"actuators\[1\]\.rate: needs the tick length"):
        build_actuator_chain([{}, {"rate": 1.0}])
    assert isinstance(build_actuator_chain([{"hi": 1.0}]), ActuatorChain)


@pytest.mark.parametrize("spec", [{}, "gain", [], ["x"]])
def test_bad_channel_lists_are_refused(spec: object) -> None:
    with pytest.raises(ValueError, match=r"sensors\[0\]"):
        build_sensor_chain(spec, seed=0)  # type: ignore[arg-type]


def test_bad_seed_is_refused() -> None:
    with pytest.raises(ValueError, match="seed"):
        build_sensor_chain([{}], seed=-1)


def test_sim_package_exports_the_chains() -> None:
    import plantrig.sim as psim

    for name in (
        "SensorChain",
        "ActuatorChain",
        "SensorChannel",
        "ActuatorChannel",
        "ChainSpecError",
        "build_sensor_chain",
        "build_actuator_chain",
        "eng_to_counts",
        "counts_to_eng",
    ):
        assert name in psim.__all__
        assert getattr(psim, name) is getattr(cond, name)
    assert isinstance(psim.build_sensor_chain([{}], seed=0), SensorChain)
