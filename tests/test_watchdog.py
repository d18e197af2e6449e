"""One watchdog rule for the serial link, the MQTT link and rehearsed link faults:
lost at the first tick whose silence exceeds the timeout (sim/engine/_watchdog.py). The serial
link's real-time check is in test_safety_link.py; the MQTT link's in test_mqtt_link.py."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from plantrig.sim import load_rig, load_scenario, silent_ticks_allowed, simulate

REHEARSALS = Path(__file__).resolve().parents[1] / "configs" / "rehearsals"


@pytest.mark.parametrize(("timeout", "tick", "allowed"), [
    (0.05, 0.001, 50),       # 49.99999999999999 in floating point: still 50
    (0.1, 0.002, 50),        # 50.000000000000001
    (0.05, 0.0125, 4),       # 4 ticks = 50 ms do not exceed the timeout; the 5th does
    (0.06, 0.0125, 4),       # 4.8: the 5th silent tick (62.5 ms) exceeds it
    (0.0001, 0.001, 1),      # a timeout shorter than a tick still allows one
])
def test_silent_ticks_allowed(timeout: float, tick: float, allowed: int) -> None:
    assert silent_ticks_allowed(timeout, tick) == allowed
    assert allowed * tick <= timeout + 1e-12 or allowed == 1
    assert (allowed + 1) * tick > timeout


def test_a_rehearsed_link_fault_is_lost_at_the_same_tick_as_a_real_link() -> None:
    rig = load_rig(REHEARSALS / "conveyor_guarded.toml")
    data = simulate(rig, scenario=load_scenario(REHEARSALS / "link_lost.toml", rig))
    lost = next(e for e in data.outcome.events if e.kind == "link_lost")
    fresh = data["fresh"]
    last_fresh = int(np.flatnonzero(fresh[:lost.tick] == 1)[-1])
    assert lost.tick - last_fresh == silent_ticks_allowed(0.05, rig.tick) + 1 == 51
