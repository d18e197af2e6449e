"""Golden records: every shipped rig and rehearsal, run fast, against the records they
gave before a change. They pin today's behaviour so that a rename or a redesign is shown
to change nothing it did not mean to.

Each golden file (tests/golden/NAME.npz) holds the column names, the row count, every
k-th tick record (at most about 200 rows, plus the last) and the (tick, kind) of every
event. Values are compared to 1e-9 relative: bit-for-bit equality is shown elsewhere
(test_scenario, test_records); here the point is that the behaviour stays, also across
numpy and scipy releases that round differently in the last bit.

To write them anew after an intended change of behaviour (say why in the commit):
    PLANTRIG_WRITE_GOLDEN=1 .venv/bin/python -m pytest tests/test_golden.py
"""

from __future__ import annotations

import dataclasses
import os
from pathlib import Path

import numpy as np
import pytest

from plantrig.sim import Rig, load_rig, load_scenario, simulate

REPO = Path(__file__).resolve().parents[1]
CONFIGS = REPO / "configs"
REHEARSALS = CONFIGS / "rehearsals"
GOLDEN = Path(__file__).resolve().parent / "golden"
MAX_SAMPLES = 200

# (golden name, rig file, scenario file or None); a rig on a link runs with the law of
# its [link.controller] built in, as its fast rehearsal does
CASES = [
    ("conveyor", CONFIGS / "conveyor.toml", None),
    ("conveyor_hil", CONFIGS / "conveyor_hil.toml", None),
    ("conveyor_mqtt", CONFIGS / "conveyor_mqtt.toml", None),
    ("tank", CONFIGS / "tank.toml", None),
    ("conveyor_guarded", REHEARSALS / "conveyor_guarded.toml", None),
    ("conveyor_guarded_hil", REHEARSALS / "conveyor_guarded_hil.toml", None),
    ("tank_guarded", REHEARSALS / "tank_guarded.toml", None),
    ("conveyor_guarded+belt_sensor_stuck", REHEARSALS / "conveyor_guarded.toml",
     REHEARSALS / "belt_sensor_stuck.toml"),
    ("conveyor_guarded+link_lost", REHEARSALS / "conveyor_guarded.toml",
     REHEARSALS / "link_lost.toml"),
    ("tank_guarded+heater_stuck_on", REHEARSALS / "tank_guarded.toml",
     REHEARSALS / "heater_stuck_on.toml"),
    ("conveyor_guarded_hil+belt_sensor_stuck", REHEARSALS / "conveyor_guarded_hil.toml",
     REHEARSALS / "belt_sensor_stuck.toml"),
]


def fast_twin(rig: Rig) -> Rig:
    """A rig on a link, with its reference controller's law built in instead."""
    if rig.link is None:
        return rig
    assert rig.link.controller is not None
    return dataclasses.replace(rig, controller=rig.link.controller, link=None)


def record_of(rig_path: Path, scenario_path: Path | None) -> dict[str, np.ndarray]:
    rig = fast_twin(load_rig(rig_path))
    scenario = load_scenario(scenario_path, rig) if scenario_path else None
    data = simulate(rig, scenario=scenario)
    n = data.rows.shape[0]
    every = max(1, n // MAX_SAMPLES)
    picks = np.unique(np.r_[np.arange(0, n, every), n - 1]) if n else np.arange(0)
    return {
        "columns": np.array(data.columns),
        "n_rows": np.array(n),
        "picks": picks,
        "rows": data.rows[picks],
        "event_ticks": np.array([e.tick for e in data.outcome.events], dtype=np.int64),
        "event_kinds": np.array([e.kind for e in data.outcome.events]),
    }


@pytest.mark.parametrize(("name", "rig_path", "scenario_path"), CASES,
                         ids=[c[0] for c in CASES])
def test_shipped_rig_gives_its_golden_record(name: str, rig_path: Path,
                                             scenario_path: Path | None) -> None:
    now = record_of(rig_path, scenario_path)
    path = GOLDEN / f"{name}.npz"
    if os.environ.get("PLANTRIG_WRITE_GOLDEN") == "1":
        GOLDEN.mkdir(exist_ok=True)
        np.savez_compressed(path, **now)
    assert path.exists(), f"no golden record {path.name}; write it (module docstring)"
    with np.load(path) as golden:
        assert now["columns"].tolist() == golden["columns"].tolist()
        assert int(now["n_rows"]) == int(golden["n_rows"])
        assert now["picks"].tolist() == golden["picks"].tolist()
        np.testing.assert_allclose(now["rows"], golden["rows"], rtol=1e-9, atol=1e-12)
        assert list(zip(now["event_ticks"].tolist(), now["event_kinds"].tolist(),
                        strict=True)) == \
            list(zip(golden["event_ticks"].tolist(), golden["event_kinds"].tolist(),
                     strict=True))
