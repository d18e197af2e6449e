"""Verdict metrics against python-control's step_info and textbook closed forms."""

from __future__ import annotations

import math

import control
import numpy as np
import pytest

from plantrig.sim.scenario._metrics import (
    BandCheck,
    StepMetrics,
    band_check,
    overshoot,
    peak,
    rise_time,
    settling_time,
    steady_state_error,
    step_metrics,
    tracking_error,
)


def second_order(zeta: float, wn: float = 2.0) -> control.TransferFunction:
    return control.tf([wn**2], [1.0, 2.0 * zeta * wn, wn**2])


SYSTEMS = {
    "first_order_tau0.5": control.tf([1.0], [0.5, 1.0]),
    "first_order_gain3": control.tf([3.0], [2.0, 1.0]),
    "second_order_zeta0.2": second_order(0.2),
    "second_order_zeta0.5": second_order(0.5),
    "second_order_zeta0.7": second_order(0.7),
    "third_order": control.tf([8.0], [1.0, 2.4, 4.8, 8.0]) * control.tf([1.0], [0.25, 1.0]),
    "nonminimum_phase": control.tf([-1.0, 1.0], [1.0, 1.0, 1.0]),
    "negative_gain": control.tf([-2.0], [1.0, 0.6, 1.0]),
}


# --- against control.step_info (python-control 0.10, control/timeresp.py) ------------


@pytest.mark.parametrize("name", list(SYSTEMS))
def test_matches_step_info_on_its_own_simulation(name: str) -> None:
    sys = SYSTEMS[name]
    info = control.step_info(sys)  # simulates with step_response's default time grid
    resp = control.step_response(sys)
    t, y = resp.time, np.squeeze(resp.outputs)
    m = step_metrics(t, y, final=float(control.dcgain(sys)))
    assert m.rise_time == info["RiseTime"]
    assert m.settling_time == info["SettlingTime"]
    assert m.overshoot == info["Overshoot"]
    assert m.peak_time == info["PeakTime"]
    assert abs(m.peak) == info["Peak"]
    assert m.steady_state_value == info["SteadyStateValue"]


@pytest.mark.parametrize("name", ["second_order_zeta0.2", "third_order", "first_order_gain3"])
@pytest.mark.parametrize(("band", "limits"), [(0.05, (0.05, 0.95)), (0.01, (0.2, 0.8))])
def test_matches_step_info_on_data_with_other_thresholds(
    name: str, band: float, limits: tuple[float, float]
) -> None:
    t = np.linspace(0.0, 30.0, 3001)
    resp = control.step_response(SYSTEMS[name], T=t)
    y = np.squeeze(resp.outputs)
    # given data and no final value, step_info takes the last sample as final
    info = control.step_info(y, T=t, SettlingTimeThreshold=band, RiseTimeLimits=limits)
    m = step_metrics(t, y, band_pct=band * 100, rise_pct=(limits[0] * 100, limits[1] * 100))
    assert m.rise_time == info["RiseTime"]
    assert m.settling_time == info["SettlingTime"]
    assert m.overshoot == info["Overshoot"]
    assert (m.peak, m.peak_time) == (info["Peak"], info["PeakTime"])
    assert m.steady_state_value == info["SteadyStateValue"]


# --- textbook closed forms ------------------------------------------------------


@pytest.mark.parametrize("zeta", [0.2, 0.5, 0.7])
def test_second_order_overshoot_and_peak_time(zeta: float) -> None:
    # Ogata, Modern Control Engineering, 5th ed., section 5-3: for the standard
    # second-order system wn^2 / (s^2 + 2 zeta wn s + wn^2), Mp = exp(-zeta pi / sqrt(1 -
    # zeta^2)) and tp = pi / (wn sqrt(1 - zeta^2)).
    wn = 2.0
    dt = 5e-4
    t = np.arange(0.0, 8.0 + dt / 2, dt)  # the peak comes before 2.2 s for these zetas
    y = np.squeeze(control.step_response(second_order(zeta, wn), T=t).outputs)
    wd = wn * math.sqrt(1 - zeta**2)
    mp = math.exp(-zeta * math.pi / math.sqrt(1 - zeta**2))
    m = step_metrics(t, y, final=1.0)
    assert m.overshoot == pytest.approx(100 * mp, rel=1e-4)
    assert m.peak == pytest.approx(1 + mp, rel=1e-6)
    assert m.peak_time == pytest.approx(math.pi / wd, abs=dt)


def test_first_order_reaches_63_percent_at_one_time_constant() -> None:
    # Ogata, Modern Control Engineering, 5th ed., section 5-2 (section number from
    # memory): the first-order response 1 - exp(-t / T) is at 1 - e^-1 = 63.2 % at t = T.
    # A rise from 0 % to 63.2 % therefore takes exactly T, up to one sample late.
    tau, dt = 0.8, 1e-3
    t = np.arange(0.0, 8.0, dt)
    y = np.squeeze(control.step_response(control.tf([5.0], [tau, 1.0]), T=t).outputs)
    r = rise_time(t, y, final=5.0, limits_pct=(0.0, 100 * (1 - math.exp(-1))))
    assert tau <= r < tau + dt
    # the same exponential gives 10-90 % rise tau*ln 9 and 2 % settling tau*ln 50
    assert rise_time(t, y, final=5.0) == pytest.approx(tau * math.log(9), abs=dt)
    assert settling_time(t, y, final=5.0) == pytest.approx(tau * math.log(50), abs=dt)
    assert overshoot(y, final=5.0) == 0.0


def test_steady_state_error_of_type_0_loop() -> None:
    # Ogata, 5th ed., section 5-8 (from memory): unity feedback around K / (s + 1) has
    # static position error constant Kp = K and unit-step error 1 / (1 + Kp).
    k = 4.0
    loop = control.feedback(control.tf([k], [1.0, 1.0]), 1)
    t = np.linspace(0.0, 10.0, 2001)
    y = np.squeeze(control.step_response(loop, T=t).outputs)
    assert steady_state_error(t, y, 1.0) == pytest.approx(1 / (1 + k), abs=1e-9)
    assert steady_state_error(t, y, 1.0, tail=2.0) == pytest.approx(1 / (1 + k), abs=1e-9)


def test_ramp_tracking_error_of_type_1_loop() -> None:
    # Ogata, 5th ed., section 5-8 (from memory): unity feedback around K / (s (s + 1))
    # follows a unit ramp with steady error 1 / Kv, Kv = K.
    k = 5.0
    loop = control.feedback(control.tf([k], [1.0, 1.0, 0.0]), 1)
    t = np.linspace(0.0, 40.0, 4001)
    y = np.squeeze(control.forced_response(loop, T=t, U=t).outputs)
    e = tracking_error(t, y, t, start=30.0)
    assert e.rms == pytest.approx(1 / k, rel=1e-6)
    assert e.max_abs == pytest.approx(1 / k, rel=1e-6)
    assert e.samples == np.count_nonzero(t >= 30.0)


def test_tracking_error_of_a_sine_over_whole_periods() -> None:
    # RMS of a sin over whole periods is amplitude / sqrt(2); its peak is the amplitude
    t = np.linspace(0.0, 2.0, 2001)
    err = 0.3 * np.sin(2 * np.pi * 2.0 * t)
    e = tracking_error(t, 1.0 + err, 1.0, stop=t[-2])  # drop the repeated end point
    assert e.rms == pytest.approx(0.3 / math.sqrt(2), rel=1e-12)
    assert e.max_abs == pytest.approx(0.3, rel=1e-12)
    assert e.time_of_max == pytest.approx(0.125, abs=1e-12)


# --- band, peaks and edge cases -----------------------------------------------


def test_band_check_reports_first_sample_outside() -> None:
    t = np.arange(6.0)
    y = np.array([0.0, 0.0, 1.0, 2.0, 1.0, -1.0])
    assert band_check(t, y, -0.5, 1.5) == BandCheck(inside=False, first_violation=3.0)
    assert band_check(t, y, -0.5, 1.5, stop=2.0) == BandCheck(inside=True, first_violation=None)
    assert band_check(t, y, -0.5, 1.5, start=4.0) == BandCheck(False, 5.0)
    assert band_check(t, y, -1.0, 2.0) == BandCheck(True, None)  # edges count as inside


def test_band_check_with_a_band_that_moves() -> None:
    t = np.linspace(0.0, 6.0, 601)
    y = 1 - np.exp(-t)
    assert band_check(t, y, 0.95, 1.05, start=3.0).inside is True  # 1 - e^-3 = 0.950
    assert band_check(t, y, 0.95, 1.05, start=2.0).first_violation == pytest.approx(2.0)
    env = np.exp(-t)  # y stays on the bound 1 - e^-t, inside the band [1 - e^-t, 1]
    assert band_check(t, y, 1 - env, 1.0).inside is True


def test_step_from_a_nonzero_level_downwards() -> None:
    # a 10 -> 4 step shaped like 1 - e^-t: same times as the unit step, no overshoot
    t = np.linspace(0.0, 10.0, 10001)
    unit = 1 - np.exp(-t)
    m = step_metrics(t, 10.0 - 6.0 * unit, final=4.0, initial=10.0)
    u = step_metrics(t, unit, final=1.0)
    assert m.rise_time == pytest.approx(u.rise_time, abs=1e-3)
    assert m.settling_time == pytest.approx(u.settling_time, abs=1e-3)
    assert m.overshoot == 0.0 and m.steady_state_value == 4.0 and m.initial == 10.0
    assert isinstance(m, StepMetrics)


def test_times_measured_from_the_step() -> None:
    t = np.linspace(5.0, 15.0, 10001)
    y = np.where(t < 6.0, 0.0, 1 - np.exp(-(t - 6.0)))
    m = step_metrics(t, y, final=1.0, t_step=6.0)
    assert m.settling_time == pytest.approx(math.log(50), abs=2e-3)
    assert m.rise_time == pytest.approx(math.log(9), abs=2e-3)
    value, when = peak(t, y, t_step=6.0)
    assert value == y[-1] and when == pytest.approx(9.0)


def test_unreached_levels_give_nan() -> None:
    t = np.linspace(0.0, 1.0, 101)
    y = 1 - np.exp(-t)  # reaches only 63 % of the final value 1.0
    assert math.isnan(rise_time(t, y, final=1.0))
    assert math.isnan(settling_time(t, y, final=1.0))
    assert not math.isnan(rise_time(t, y, final=1.0, limits_pct=(10.0, 50.0)))


@pytest.mark.parametrize(
    ("t", "y", "kwargs", "match"),
    [
        ([0.0, 1.0], [0.0, 0.0], {}, "step size is zero"),
        ([0.0, 1.0, 2.0], [0.0, 1.0], {}, "samples"),
        ([0.0, 1.0, 1.0], [0.0, 1.0, 1.0], {}, "increasing"),
        ([0.0, 1.0], [0.0, math.nan], {}, "finite"),
        ([0.0], [1.0], {}, "at least 2"),
        ([0.0, 1.0], [0.0, 1.0], {"band_pct": -2.0}, "band_pct"),
        ([0.0, 1.0], [0.0, 1.0], {"rise_pct": (90.0, 10.0)}, "limits_pct"),
        ([0.0, 1.0], [0.0, 1.0], {"final": math.inf}, "finite"),
    ],
)
def test_bad_input_is_refused(t: list, y: list, kwargs: dict, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        step_metrics(t, y, **kwargs)


def test_bad_windows_and_bands_are_refused() -> None:
    t, y = np.arange(3.0), np.zeros(3)
    with pytest.raises(ValueError, match="no samples"):
        tracking_error(t, y, 0.0, start=5.0)
    with pytest.raises(ValueError, match="lo <= hi"):
        band_check(t, y, 1.0, 0.0)
    with pytest.raises(ValueError, match="tail"):
        steady_state_error(t, y, 0.0, tail=-1.0)


def test_results_are_frozen() -> None:
    m = step_metrics([0.0, 1.0, 2.0], [0.0, 1.0, 1.0])
    with pytest.raises(AttributeError):
        m.overshoot = 3.0  # type: ignore[misc]
