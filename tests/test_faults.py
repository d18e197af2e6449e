"""Every fault of the catalogue against what it must do, computed independently.

The plant is the first-order lag x' = -2 x + 2 u (+ d), y = x, whose exact ZOH sample is
x_{k+1} = a x_k + b u_k with a = exp(-2 dt), b = 1 - a (Franklin, Powell & Workman,
Digital Control of Dynamic Systems, 3rd ed., section 4.3.3); y_k = x_k in every row.
Faults are injected by operator commands at tick K for W ticks (the live path).
"""

from __future__ import annotations

import math
import queue
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.signal
import scipy.stats

from plantrig.sim import (
    FAULT_KINDS,
    Command,
    CommandInbox,
    Engine,
    MemoryTape,
    build_rig,
    parse_fault,
    tick_columns,
)

DT = 0.01
K, W = 50, 30            # injected at tick 50 for 30 ticks
A = math.exp(-2 * DT)


def rig_for(tmp_path: Path, controller: dict | None = None, reference: dict | None = None,
            extra: dict | None = None, duration: float = 1.5) -> Any:
    doc: dict[str, Any] = {
        "rig": {"name": "lag", "tick": DT, "duration": duration, "seed": 5},
        "plant": {"kind": "lti", "A": [[-2.0]], "B": [[2.0]], "C": [[1.0]],
                  "states": [{"name": "x"}], "inputs": [{"name": "u", "safe": 0.0}],
                  "outputs": [{"name": "y"}]},
        "references": [reference or {"name": "r", "kind": "sine", "low": -0.8, "high": 1.2,
                                     "hz": 1.3}],
        "controller": controller or {"kind": "open_loop", "drive": {"u": "r"}},
    }
    doc.update(extra or {})
    return build_rig(doc, tmp_path / "lag.toml")


class AtTicks:
    def __init__(self, tape: MemoryTape, script: dict[int, list[Command]]) -> None:
        self.tape, self.script, self.waiting = tape, dict(script), []

    def get_nowait(self) -> Command:
        k = self.tape.written
        self.waiting += self.script.pop(k, [])
        if self.waiting:
            return self.waiting.pop(0)
        raise queue.Empty


class Run:
    """A run's columns by name, its events and its outcome."""

    def __init__(self, rig: Any, script: dict[int, list[Command]]) -> None:
        self.columns = tick_columns(rig)[0]
        tape = MemoryTape(self.columns, rig.n_ticks)
        self.engine = Engine(rig, tape, commands=CommandInbox(AtTicks(tape, script)))
        self.outcome = self.engine.run()
        self.rows = tape.rows

    def __getitem__(self, name: str) -> np.ndarray:
        return self.rows[:, self.columns.index(name)]

    def kinds(self) -> list[str]:
        return [e.kind for e in self.outcome.events]


def inject(tmp_path: Path, kind: str, target: str, rig: Any = None, at: int = K,
           lasting: int | None = W, **params: Any) -> Run:
    """Inject ``kind`` on ``target`` at tick ``at`` for ``lasting`` ticks (None: no duration)."""
    args = {"kind": kind, "target": target, "name": "f", **params}
    if lasting is not None:
        args["duration"] = lasting * DT
    return Run(rig or rig_for(tmp_path), {at: [Command("inject_fault", args)]})


def window(n: int, start: int = K, length: int = W) -> np.ndarray:
    mask = np.zeros(n, dtype=bool)
    mask[start:start + length] = True
    return mask


# -- sensor faults: on the values sent to the controller ----------------------------------
@pytest.mark.parametrize(("kind", "params", "expected"), [
    ("sensor_bias", {"bias": 0.25}, lambda y, t, s: y + 0.25),
    ("sensor_gain", {"gain": 1.1}, lambda y, t, s: y * 1.1),
    ("sensor_drift", {"rate": 2.0}, lambda y, t, s: y + 2.0 * (t - K * DT)),
    ("sensor_stuck", {}, lambda y, t, s: np.full_like(y, s[K - 1])),
    ("sensor_stuck", {"value": 0.7}, lambda y, t, s: np.full_like(y, 0.7)),
    ("sensor_dropout", {"value": -1.0}, lambda y, t, s: np.full_like(y, -1.0)),
])
def test_sensor_fault_acts_on_sent_values_exactly(tmp_path: Path, kind: str, params: dict,
                                                  expected: Any) -> None:
    run = inject(tmp_path, kind, "y", **params)
    y, sent, t = run["y:y"], run["sent:y"], run["t"]
    inside = window(len(y))
    np.testing.assert_allclose(sent[inside], expected(y, t, sent)[inside], rtol=0, atol=1e-15)
    np.testing.assert_array_equal(sent[~inside], y[~inside])
    # the plant is untouched: open loop, so y is the unfaulted response
    clean = Run(rig_for(tmp_path), {})
    np.testing.assert_array_equal(y, clean["y:y"])
    assert run.kinds()[:2] == ["fault_injected", "fault_cleared"]
    assert run.outcome.events[1].tick == K + W


def test_sensor_bias_adds_exactly_b(tmp_path: Path) -> None:
    run = inject(tmp_path, "sensor_bias", "y", bias=0.125)
    inside = window(len(run["y:y"]))
    assert np.array_equal(run["sent:y"][inside], run["y:y"][inside] + 0.125)


def test_sensor_spike_lasts_one_tick_by_default(tmp_path: Path) -> None:
    run = inject(tmp_path, "sensor_spike", "y", lasting=None, amplitude=5.0)
    diff = run["sent:y"] - run["y:y"]
    assert np.flatnonzero(diff).tolist() == [K] and diff[K] == 5.0


def test_sensor_noise_is_seeded_and_has_its_standard_deviation(tmp_path: Path) -> None:
    n, std = 400, 0.1
    rig = rig_for(tmp_path, duration=5.0)
    a = inject(tmp_path, "sensor_noise", "y", rig=rig, lasting=n, std=std, seed=3)
    b = inject(tmp_path, "sensor_noise", "y", rig=rig, lasting=n, std=std, seed=3)
    c = inject(tmp_path, "sensor_noise", "y", rig=rig, lasting=n, std=std, seed=4)
    noise = (a["sent:y"] - a["y:y"])[K:K + n]
    assert np.array_equal(a.rows, b.rows)                 # same seed: the same run
    assert not np.array_equal(a["sent:y"], c["sent:y"])
    # (n-1) s^2 / sigma^2 follows chi-square with n-1 degrees of freedom for Gaussian
    # samples (any statistics text; bounds from scipy.stats.chi2): a 99.9 % interval
    s2 = noise.var(ddof=1)
    lo, hi = scipy.stats.chi2.ppf([0.0005, 0.9995], n - 1)
    assert lo <= (n - 1) * s2 / std**2 <= hi
    assert abs(noise.mean()) < 4 * std / math.sqrt(n)


# -- actuator faults: on u after the actuator chain ------------------------------------
@pytest.mark.parametrize(("kind", "params", "expected"), [
    ("actuator_effectiveness", {"factor": 0.6}, lambda c, u: 0.6 * c),
    ("actuator_saturation", {"low": -0.1, "high": 0.2}, lambda c, u: np.clip(c, -0.1, 0.2)),
    ("actuator_stuck", {}, lambda c, u: np.full_like(c, u[K - 1])),
    ("actuator_stuck", {"value": 0.3}, lambda c, u: np.full_like(c, 0.3)),
])
def test_actuator_fault_acts_on_the_plant_input(tmp_path: Path, kind: str, params: dict,
                                                expected: Any) -> None:
    run = inject(tmp_path, kind, "u", **params)
    cmd, u, y = run["cmd:u"], run["u:u"], run["y:y"]
    inside = window(len(u))
    np.testing.assert_allclose(u[inside], expected(cmd, u)[inside], rtol=0, atol=1e-15)
    np.testing.assert_array_equal(u[~inside], cmd[~inside])
    # the plant moves with the faulted input: y_{k+1} = a y_k + b u_k
    np.testing.assert_allclose(y[1:], A * y[:-1] + (1 - A) * u[:-1], rtol=1e-12, atol=1e-15)


def test_actuator_delay_shifts_the_input(tmp_path: Path) -> None:
    d = 5
    run = inject(tmp_path, "actuator_delay", "u", ticks=d)
    cmd, u = run["cmd:u"], run["u:u"]
    assert np.all(u[K:K + d] == u[K - 1])                 # the ring starts with u at injection
    np.testing.assert_array_equal(u[K + d:K + W], cmd[K:K + W - d])


# -- link faults: at the boundary between controller and plant ----------------------------
P = {"kind": "pid", "loops": [{"measure": "y", "drive": "u", "reference": "r", "kp": 2.0}]}
STEP = {"name": "r", "kind": "step", "at": 0.0, "to": 1.0}


def test_link_drop_from_controller_holds_the_last_command(tmp_path: Path) -> None:
    run = inject(tmp_path, "link_drop", "from_controller", rig=rig_for(tmp_path, P, STEP))
    cmd, fresh = run["cmd:u"], run["fresh"]
    inside = window(len(cmd))
    assert np.all(cmd[inside] == cmd[K - 1]) and not fresh[inside].any()
    assert fresh[~inside].all()
    # P control: outside the window u_k = 2 (1 - y_{k-1})
    k = np.flatnonzero(~inside)[1:]
    np.testing.assert_allclose(cmd[k], 2 * (1 - run["sent:y"][k - 1]), rtol=1e-12)


def test_link_drop_to_controller_freezes_what_it_sees(tmp_path: Path) -> None:
    run = inject(tmp_path, "link_drop", "to_controller", rig=rig_for(tmp_path, P, STEP))
    cmd, sent = run["cmd:u"], run["sent:y"]
    # the last values through were those of tick K - 1; the controller keeps using them
    np.testing.assert_allclose(cmd[K:K + W], 2 * (1 - sent[K - 1]), rtol=1e-12)
    assert cmd[K + W] == pytest.approx(2 * (1 - sent[K + W - 1]), rel=1e-12)
    assert run.engine.faults.counts["frames_dropped"] == W


def test_link_delay_to_controller(tmp_path: Path) -> None:
    d = 3
    run = inject(tmp_path, "link_delay", "to_controller", rig=rig_for(tmp_path, P, STEP),
                 ticks=d)
    cmd, sent = run["cmd:u"], run["sent:y"]
    # tick j hands over the values of j - d; the controller at k reads those of k - 1
    k = np.arange(K + d + 1, K + W)
    np.testing.assert_allclose(cmd[k], 2 * (1 - sent[k - 1 - d]), rtol=1e-12)
    np.testing.assert_allclose(cmd[K + 1:K + d + 1], 2 * (1 - sent[K - 1]), rtol=1e-12)


def test_link_delay_from_controller(tmp_path: Path) -> None:
    d = 4
    delayed = inject(tmp_path, "link_delay", "from_controller",
                     rig=rig_for(tmp_path), ticks=d)
    cmd, fresh, r = delayed["cmd:u"], delayed["fresh"], delayed["ref:r"]
    assert not fresh[K:K + d].any() and np.all(cmd[K:K + d] == cmd[K - 1])
    np.testing.assert_array_equal(cmd[K + d:K + W], r[K:K + W - d])   # open loop: cmd = r


def test_link_freeze_and_corrupt(tmp_path: Path) -> None:
    frozen = inject(tmp_path, "link_freeze", "from_controller", rig=rig_for(tmp_path))
    cmd = frozen["cmd:u"]
    assert np.all(cmd[K:K + W] == frozen["ref:r"][K]) and frozen["fresh"][K:K + W].all()
    n = 400
    rig = rig_for(tmp_path, duration=5.0)
    a = inject(tmp_path, "link_corrupt", "from_controller", rig=rig, lasting=n,
               probability=0.5, seed=1)
    b = inject(tmp_path, "link_corrupt", "from_controller", rig=rig, lasting=n,
               probability=0.5, seed=1)
    lost = int(n - a["fresh"][K:K + n].sum())
    assert a.engine.faults.counts["frames_corrupted"] == lost
    assert a.outcome.link_health["frames_corrupted"] == lost
    # binomial(400, 0.5): mean 200, sd 10; a 4.5 sd interval
    assert 155 <= lost <= 245
    assert np.array_equal(a.rows, b.rows)


# -- plant faults and disturbances ---------------------------------------------------------
def test_lti_parameter_step_rediscretises_exactly(tmp_path: Path) -> None:
    const = {"name": "r", "kind": "constant", "value": 1.0}
    run = Run(rig_for(tmp_path, reference=const), {
        K: [Command("inject_fault", {"kind": "plant_step", "target": "A[0,0]", "factor": 2.0,
                                     "name": "stiff"}),
            Command("inject_fault", {"kind": "plant_step", "target": "B[x,u]", "value": 3.0,
                                     "name": "strong"})],
        K + W: [Command("clear_fault", {"name": "stiff"}),
                Command("clear_fault", {"name": "strong"})]})
    y = run["y:y"]
    # the changed model x' = -4 x + 3 u, discretised by scipy for the check
    ad, bd, *_ = scipy.signal.cont2discrete(
        tuple(np.array(m) for m in ([[-4.0]], [[3.0]], [[1.0]], [[0.0]])), DT)
    k = np.arange(K, K + W)
    np.testing.assert_allclose(y[k + 1], ad[0, 0] * y[k] + bd[0, 0] * 1.0, rtol=1e-12)
    k = np.arange(K + W, len(y) - 1)                      # cleared: the model as given
    np.testing.assert_allclose(y[k + 1], A * y[k] + (1 - A) * 1.0, rtol=1e-12)


def test_lti_parameter_drift_updates_in_steps(tmp_path: Path) -> None:
    const = {"name": "r", "kind": "constant", "value": 1.0}
    run = inject(tmp_path, "plant_drift", "A[0,0]", rig=rig_for(tmp_path, reference=const),
                 lasting=40, rate=0.5, update=0.1)
    y = run["y:y"]
    for j in range(4):                                      # 10-tick pieces, factor fixed
        factor = 1 + 0.5 * (10 * j * DT)
        a = math.exp(-2 * factor * DT)
        b = 2 * (1 - a) / (2 * factor)                      # ZOH of 2 / (s + 2 factor)
        k = np.arange(K + 10 * j, K + 10 * j + 10)
        np.testing.assert_allclose(y[k + 1], a * y[k] + b, rtol=1e-12)


def test_ode_parameter_step_changes_p_and_leaves_the_rig_alone(tmp_path: Path) -> None:
    (tmp_path / "lag_model.py").write_text(
        "import numpy as np\n"
        "def f(t, x, u, p):\n    return np.array([-p['a'] * x[0] + p['a'] * u[0]])\n"
        "def h(t, x, u, p):\n    return x.copy()\n")
    doc = {"rig": {"tick": DT, "duration": 1.5},
           "plant": {"kind": "ode", "module": "lag_model.py", "dynamics": "f", "output": "h",
                     "params": {"a": 2.0}, "states": [{"name": "x"}],
                     "inputs": [{"name": "u"}], "outputs": [{"name": "y"}]},
           "references": [{"name": "r", "kind": "constant", "value": 1.0}],
           "controller": {"kind": "open_loop", "drive": {"u": "r"}}}
    rig = build_rig(doc, tmp_path / "ode.toml")
    run = inject(tmp_path, "plant_step", "a", rig=rig, factor=3.0)
    y = run["y:y"]
    # a = 6 inside the window: y_{k+1} - 1 = e^{-6 dt} (y_k - 1); RK4 local error
    # (6 dt)^5 / 120 ~ 6e-7 relative (Hairer, Norsett & Wanner, Solving ODEs I, II.1)
    k = np.arange(K, K + W)
    np.testing.assert_allclose(y[k + 1] - 1, math.exp(-6 * DT) * (y[k] - 1), rtol=1e-6)
    assert rig.plant.params == {"a": 2.0}


def test_disturbance_step_on_a_first_order_plant_has_the_closed_form(tmp_path: Path) -> None:
    # x' = -2 x + 2 u + d, u = 0, d = 0.5 from t0: x(t) = (0.5 / 2) (1 - e^{-2 (t - t0)}),
    # the first-order step response (Ogata, Modern Control Engineering, 5th ed., 5-2);
    # ZOH is exact for a constant input, so the samples match it to rounding
    zero = {"name": "r", "kind": "constant", "value": 0.0}
    rig = rig_for(tmp_path, reference=zero,
                  extra={"disturbances": [{"name": "load", "unit": "N", "B": [1.0]}]})
    run = inject(tmp_path, "disturbance", "load", rig=rig, value=0.5)
    y, d, t = run["y:y"], run["d:load"], run["t"]
    assert np.all(d[K:K + W] == 0.5) and not d[:K].any() and not d[K + W:].any()
    k = np.arange(K, K + W + 1)
    np.testing.assert_allclose(y[k], 0.25 * (1 - np.exp(-2 * (t[k] - t[K]))), rtol=1e-12,
                               atol=1e-15)
    k = np.arange(K + W, len(y))                            # then the free decay
    np.testing.assert_allclose(y[k], y[K + W] * np.exp(-2 * (t[k] - t[K + W])), rtol=1e-11)


def test_ode_disturbance_adds_to_its_parameter(tmp_path: Path) -> None:
    (tmp_path / "m.py").write_text(
        "import numpy as np\n"
        "def f(t, x, u, p):\n    return np.array([-2.0 * x[0] + p['load']])\n"
        "def h(t, x, u, p):\n    return x.copy()\n")
    doc = {"rig": {"tick": DT, "duration": 1.5},
           "plant": {"kind": "ode", "module": "m.py", "dynamics": "f", "output": "h",
                     "params": {"load": 0.0}, "states": [{"name": "x"}],
                     "inputs": [{"name": "u"}], "outputs": [{"name": "y"}]},
           "controller": {"kind": "open_loop", "drive": {}},
           "disturbances": [{"name": "push", "param": "load"}]}
    run = inject(tmp_path, "disturbance", "push", rig=build_rig(doc, tmp_path / "m.toml"),
                 value=0.5)
    y, t = run["y:y"], run["t"]
    k = np.arange(K, K + W + 1)
    np.testing.assert_allclose(y[k], 0.25 * (1 - np.exp(-2 * (t[k] - t[K]))), rtol=1e-8)


# -- the catalogue and the commands ------------------------------------------------------
def test_every_kind_in_the_catalogue_can_be_injected_and_cleared(tmp_path: Path) -> None:
    rig = rig_for(tmp_path, extra={"disturbances": [{"name": "load", "B": [1.0]}]})
    targets = {"output": "y", "input": "u", "direction": "both", "parameter": "A[0,0]",
               "disturbance": "load"}
    script: dict[int, list[Command]] = {}
    for i, (kind, info) in enumerate(FAULT_KINDS.items()):
        args = {"kind": kind, "target": targets[info.target], "name": f"f{i}"}
        args.update({p: 2.0 for p, default in info.params.items() if default is None})
        spec, problems = parse_fault(args, rig)
        assert spec is not None and not problems, (kind, problems)
        script[10 + 2 * i] = [Command("inject_fault", args)]
    script[100] = [Command("clear_fault", {})]
    run = Run(rig, script)
    injected = [e for e in run.outcome.events if e.kind == "fault_injected"]
    cleared = [e for e in run.outcome.events if e.kind == "fault_cleared"]
    assert len(injected) == len(FAULT_KINDS)
    assert {e.detail.split(": ")[0] for e in cleared} == {f"f{i}" for i in range(
        len(FAULT_KINDS))}                  # the spike by its one-tick duration, the rest now
    assert "command_refused" not in run.kinds()
    assert np.isfinite(run.rows).all()


def test_bad_fault_commands_are_refused_with_reasons(tmp_path: Path) -> None:
    run = Run(rig_for(tmp_path), {5: [
        Command("inject_fault", {"kind": "sensor_bais", "target": "y"}),
        Command("inject_fault", {"kind": "sensor_bias", "target": "yy", "bias": "big"}),
        Command("inject_fault", {"kind": "actuator_delay", "target": "u", "ticks": 0.5}),
        Command("clear_fault", {"name": "nothing"}),
        Command("inject_fault", {"kind": "sensor_gain", "target": "y", "value": 1.5})],
        6: [Command("clear_fault", {"kind": "sensor_gain"})]})
    refused = [e.detail for e in run.outcome.events if e.kind == "command_refused"]
    assert "did you mean 'sensor_bias'?" in refused[0]
    assert "target: expected a plant output: y; found 'yy'; did you mean 'y'?" in refused[1]
    assert "bias: expected a number, found 'big'" in refused[1]
    assert "ticks: expected a whole number of ticks" in refused[2]
    assert refused[3] == "clear_fault: no active fault matches name=nothing"
    # a generic form's "value" stands for the kind's first parameter
    assert any(e.kind == "fault_injected" and "gain=1.5" in e.detail
               for e in run.outcome.events)
    assert run["sent:y"][5] == 1.5 * run["y:y"][5] and run["sent:y"][6] == run["y:y"][6]


def test_the_catalogue_in_docs_lists_every_kind_and_its_parameters() -> None:
    text = (Path(__file__).resolve().parents[1] / "docs" / "safety.md").read_text()
    rows = {line.split("|")[1].strip(" `"): line for line in text.splitlines()
            if line.startswith("| `")}
    for kind, info in FAULT_KINDS.items():
        assert kind in rows, kind
        for param in info.params:
            assert f"`{param}`" in rows[kind], (kind, param)
