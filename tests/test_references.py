"""Reference waveforms against numpy and their closed forms."""

from __future__ import annotations

import math

import numpy as np
import pytest

from plantrig.sim import Ramp, Sine, Step, Table

POINTS = [(0.0, 0.0), (0.2, 0.8), (1.6, 0.4), (2.5, 0.4), (3.0, -1.0)]
TIMES = np.linspace(-1.0, 4.0, 1001)


def test_linear_table_equals_numpy_interp() -> None:
    # reference: numpy.interp (holds the end values outside the points, as the table does)
    table = Table(POINTS, "linear")
    xs, ys = [p[0] for p in POINTS], [p[1] for p in POINTS]
    for t in TIMES:
        assert table.value(float(t)) == pytest.approx(float(np.interp(t, xs, ys)), abs=1e-12)


def test_hold_table_equals_the_last_point_at_or_before_t() -> None:
    table = Table(POINTS, "hold")
    xs = np.array([p[0] for p in POINTS])
    for t in TIMES:
        index = max(int(np.searchsorted(xs, t, side="right")) - 1, 0)
        assert table.value(float(t)) == POINTS[index][1]
    assert table.value(0.2) == 0.8 and table.value(0.1999) == 0.0


def test_step_ramp_sine_closed_forms() -> None:
    step = Step(at=1.0, from_=2.0, to=5.0)
    assert step.value(0.999) == 2.0 and step.value(1.0) == 5.0
    ramp = Ramp(at=1.0, from_=1.0, rate=2.0, to=4.0)
    assert [ramp.value(t) for t in (0.5, 1.0, 2.0, 3.0)] == [1.0, 1.0, 3.0, 4.0]
    down = Ramp(at=0.0, from_=5.0, rate=-2.0, to=1.0)
    assert [down.value(t) for t in (-1.0, 0.0, 1.0, 2.0, 9.0)] == [5.0, 5.0, 3.0, 1.0, 1.0]
    assert Ramp(rate=-1.0).value(100.0) == -100.0          # no 'to': it never stops
    # between -1 and 3 at 0.5 Hz, a quarter period ahead: 1 + 2 cos(pi t)
    sine = Sine(low=-1.0, high=3.0, hz=0.5, phase_deg=90.0)
    for t in (0.0, 0.3, 1.7):
        assert sine.value(t) == pytest.approx(1.0 + 2.0 * math.cos(math.pi * t), abs=1e-12)
    assert Sine(low=0.2, high=0.6, hz=2.0).value(0.125) == pytest.approx(0.6, abs=1e-12)


def test_table_refuses_decreasing_times() -> None:
    with pytest.raises(ValueError, match="must not decrease"):
        Table([(1.0, 0.0), (0.5, 1.0)])
