"""The dashboard's data side, without a window: decimation, stores, events, panels, commands.

Reference values are brute-force restatements of each rule (a loop over buckets, a
boolean mask over rows) or the rig files in configs/; nothing here needs a display.
"""

from __future__ import annotations

import json
import math
import multiprocessing as mp
import pickle
import queue
import select
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from plantrig.gui._columns import ColumnGroups
from plantrig.gui._eventlog import EventLog, EventRow, Latch, fault_edge, trip_cause
from plantrig.gui._faults import check_fault_form, fault_catalogue, fault_targets
from plantrig.gui._model import (
    LAMP_LINE_CHARS,
    DashboardModel,
    Lamp,
    Status,
    runs_nonzero,
    trip_band,
)
from plantrig.gui._operator import MAX_TEXT, MOMENT_PRESETS, Operator, answer_to
from plantrig.gui._plots import LimitLine, limit_lines, plot_specs
from plantrig.gui._runinfo import (
    live_folder,
    outcome_lines,
    pending_verdicts,
    progress_lines,
    scenario_plan,
    watchdog_of,
)
from plantrig.gui._store import LiveStore, RowStore
from plantrig.sim import (
    BY_COMMAND,
    FAULT_KINDS,
    Command,
    LimitSpec,
    decimate_minmax,
    load_rig,
    load_rig_as_data,
    load_scenario,
    tick_columns,
)

CONFIGS = Path(__file__).resolve().parents[1] / "configs"
finite = st.floats(-1e6, 1e6, allow_nan=False)


# -- decimation -----------------------------------------------------------------------
def brute_minmax(y: np.ndarray, buckets: int) -> set[int]:
    """Indices a min-max decimation must keep: each bucket's argmin and argmax."""
    size = -(-len(y) // buckets)
    keep = set()
    for start in range(0, len(y), size):
        chunk = y[start:start + size]
        keep.add(start + int(np.argmin(chunk)))
        keep.add(start + int(np.argmax(chunk)))
    return keep


@settings(max_examples=60, deadline=None)
@given(arrays(np.float64, st.integers(1, 3000), elements=finite), st.integers(1, 400))
def test_decimation_keeps_every_bucket_extreme_in_time_order(y, buckets):
    x = np.arange(len(y), dtype=np.float64)
    dx, dy = decimate_minmax(x, y, buckets)
    assert len(dx) <= 2 * buckets + 2
    assert np.all(np.diff(dx) >= 0)
    if len(y) <= 2 * buckets:
        assert np.array_equal(dy, y)
    else:
        assert set(dx.astype(int)) == brute_minmax(y, buckets)
        assert dy.max() == y.max() and dy.min() == y.min()
        assert np.array_equal(dy, y[dx.astype(int)])


def test_decimation_survives_nan_and_rejects_no_buckets():
    y = np.full(1000, np.nan)
    y[500] = 3.0
    x = np.arange(1000.0)
    _, dy = decimate_minmax(x, y, 10)
    assert 3.0 in dy
    with pytest.raises(ValueError, match="at least 1"):
        decimate_minmax(x, y, 0)


# -- stores ---------------------------------------------------------------------------
@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(0, 130), max_size=30), st.integers(1, 100))
def test_live_store_holds_the_newest_rows_in_order(chunks, capacity):
    store = LiveStore(2, capacity, t_index=0)
    everything = []
    n = 0
    for size in chunks:
        block = np.column_stack([np.arange(n, n + size, dtype=float),
                                 np.arange(n, n + size, dtype=float) * 2])
        n += size
        everything.append(block)
        store.append(block)
    expected = np.concatenate(everything)[-capacity:] if everything and n else np.empty((0, 2))
    assert np.array_equal(store.rows, expected)
    assert store.appended == n


def test_row_store_window_and_at_match_a_mask():
    t = np.arange(0, 5, 0.01)
    store = RowStore(np.column_stack([t, np.sin(t)]), t_index=0)
    rows = store.window(3.0, 1.0)
    assert np.array_equal(rows[:, 0], t[(t > 2.0) & (t <= 3.0)])
    assert store.at(2.345)[0] == t[t <= 2.345][-1]
    assert store.at(-1.0) is None


# -- events ---------------------------------------------------------------------------
def test_event_log_latches_estop_and_opens_and_closes_fault_windows():
    events = [EventRow(10, 0.01, "estop", "operator E-stop: inputs forced to safe values",
                       "estop"),
              EventRow(20, 0.02, "fault_injected", "sensor_stuck:level: sensor_stuck on level",
                       "sensor_stuck:level"),
              EventRow(25, 0.025, "command_refused", "inject_fault: unknown kind",
                       "inject_fault"),
              EventRow(30, 0.03, "reset", "estop: released by operator", "estop"),
              EventRow(40, 0.04, "fault_cleared", "sensor_stuck:level: cleared by operator",
                       "sensor_stuck:level")]
    log = EventLog()
    log.add(events)
    assert not log.estop_latched and log.estop_time == 0.01
    assert [(w.name, w.start, w.end) for w in log.windows] == [("sensor_stuck:level", 0.02,
                                                                 0.04)]
    mid = EventLog.upto(events, 0.029)
    assert mid.estop_latched and mid.windows[0].end is None
    assert [e[2] for e in mid.newest_first(2)] == ["command_refused", "fault_injected"]


@pytest.mark.parametrize(("kind", "edge"), [
    ("fault_injected", 1), ("inject_fault", 1), ("sensor_fault", 1), ("fault_cleared", -1),
    ("clear_fault", -1), ("fault_end", -1), ("command_refused", 0), ("estop", 0),
    ("fault_refused", 0)])
def test_fault_edges(kind, edge):
    assert fault_edge(kind) == edge


def test_names_come_from_the_name_field_whatever_the_detail_says():
    # details worded unlike the engine's: the log must not read names from them
    log = EventLog()
    log.add([EventRow(1, 0.1, "trip", "guard fired (limit belt_fast)", "belt_guard"),
             EventRow(2, 0.2, "fault_injected", "a stuck level sensor", "stuck:level"),
             EventRow(3, 0.3, "scenario_step", "fired at 0.3 s", "surge"),
             EventRow(4, 0.4, "phase", "operator mark", "steady"),
             EventRow(5, 0.5, "estop", "E-stop pressed", "estop"),
             EventRow(6, 0.6, "reset", "released", "estop"),
             EventRow(7, 0.7, "fault_cleared", "over", "stuck:level")])
    assert list(log.latches) == ["belt_guard"] and not log.estop_latched
    assert log.latches["belt_guard"].cause == "guard fired (limit belt_fast)"
    assert [(w.name, w.start, w.end) for w in log.windows] == [("stuck:level", 0.2, 0.7)]
    assert log.steps == [(0.3, "surge")] and log.phases == [(0.4, "steady")]
    log.add([EventRow(8, 0.8, "reset", "belt_guard: reset by operator")])   # no name
    assert list(log.latches) == ["belt_guard"]


# -- panels ---------------------------------------------------------------------------
def test_runs_nonzero_matches_a_loop():
    t = np.arange(10.0)
    v = np.array([0, 1, 1, 0, 0, 2, 0, 0, 3, 3], dtype=float)
    got = [(w.start, w.end) for w in runs_nonzero(t, v, "f")]
    assert got == [(1.0, 3.0), (5.0, 6.0), (8.0, None)]
    assert runs_nonzero(t, np.zeros(10), "f") == []


def conveyor_model(extra: list[str]):
    rig = load_rig(CONFIGS / "conveyor.toml")
    columns, units = tick_columns(rig)
    columns = columns + extra
    units = units + [""] * len(extra)
    groups = ColumnGroups(columns, units, rig)
    return rig, groups, DashboardModel(groups, rig.tick, has_link=False)


def test_new_column_groups_are_discovered_by_prefix():
    extra = ["trip:overspeed_probe", "fault:stuck_probe"]
    rig, groups, model = conveyor_model(extra)
    n = len(groups.columns)
    rows = np.zeros((100, n))
    rows[:, groups.index("t")] = np.arange(100) * rig.tick
    rows[60:, groups.index("trip:overspeed_probe")] = 1.0
    rows[20:40, groups.index("fault:stuck_probe")] = 1.0
    rows[:, groups.index("y:belt_speed")] = 3.0              # above the rig range (max 2)
    snap = model.snapshot(RowStore(rows, groups.index("t")), 0.099, 1.0, run_state="test")
    lamp = [lamp for lamp in snap.lamps if lamp.name == "overspeed_probe"][0]
    assert lamp.tripped and lamp.text == ("overspeed_probe: TRIPPED, latched\n"
                                          "cause: not in the events read so far")
    assert [(w.name, w.start, w.end) for w in snap.faults] == [("stuck_probe", 0.02, 0.04)]
    belt = [b for b in snap.bars if b.label == "y:belt_speed"][0]
    assert belt.outside and belt.fraction == 1.0 and "OUTSIDE" in belt.text
    assert belt.level == 1                                   # needs a look, not a trip
    motor = [b for b in snap.bars if b.label == "x:motor_speed"][0]
    assert motor.fraction == pytest.approx(0.5) and not motor.outside   # 0 in [-400, 400]


def test_a_lamp_is_quiet_until_latched_then_says_when_and_why():
    # the engine's own event details (sim/safety/_interlocks.py): "<name>: <cause>: <why>; <action>"
    trip = ("belt_overspeed: limit belt_fast: x:belt_speed = 1.10022 m/s, above its trip "
            "limit 1.1 m/s (trip_high); inputs to safe values")
    cause = ("limit belt_fast: x:belt_speed = 1.10022 m/s, above its trip limit 1.1 m/s "
             "(trip_high)")
    assert trip_cause(EventRow(1458, 1.458, "trip", trip, "belt_overspeed")) == cause
    events = [EventRow(100, 0.1, "estop", "operator E-stop: inputs forced to safe values",
                       "estop"),
              EventRow(1458, 1.458, "trip", trip, "belt_overspeed"),
              EventRow(1500, 1.5, "reset", "estop: E-stop released by operator", "estop"),
              EventRow(2458, 2.458, "reset", "belt_overspeed: reset by operator",
                       "belt_overspeed")]
    mid = EventLog.upto(events, 1.49)
    assert mid.latches == {"estop": Latch(0.1, "operator E-stop"),
                           "belt_overspeed": Latch(1.458, cause)}
    assert EventLog.upto(events, 1.6).latches == {"belt_overspeed": Latch(1.458, cause)}
    assert EventLog.upto(events, 3.0).latches == {}
    latch = mid.latches["belt_overspeed"]
    lamp = Lamp("belt_overspeed", True, latch.t, latch.cause)
    lines = lamp.text.split("\n")
    assert lines[0] == "belt_overspeed: TRIPPED at t = 1.458 s, latched"
    assert " ".join(lines[1:]) == "cause: limit belt_fast: x:belt_speed = 1.10022 m/s, " \
                                  "above its trip limit 1.1 m/s (trip_high)"
    assert all(len(line) <= LAMP_LINE_CHARS for line in lines[1:])
    assert Lamp("belt_overspeed", False, latch.t, latch.cause).text == "belt_overspeed: normal"


def test_limit_bars_have_a_level_for_their_colour():
    rig = load_rig(CONFIGS / "rehearsals" / "conveyor_guarded.toml")
    columns, units = tick_columns(rig)
    groups = ColumnGroups(columns, units, rig)
    model = DashboardModel(groups, rig.tick, has_link=False, limits=rig.limits)
    rows = np.zeros((3, len(columns)))
    rows[:, groups.index("t")] = np.arange(3) * rig.tick
    rows[:, groups.index("limit:belt_fast")] = [0, 1, 2]
    rows[:, groups.index("limit:motor_current")] = [0, 0, np.nan]
    store = RowStore(rows, groups.index("t"))
    for k, (fast, current) in enumerate(((0, 0), (1, 0), (2, 1))):
        snap = model.snapshot(store, k * rig.tick, 1.0, run_state="test")
        assert [b.level for b in snap.bars] == [fast, current]
        assert f"  {('ok', 'WARN', 'TRIP')[fast]}; trip above 1.1" in snap.bars[0].text


def test_timing_panel_counts_overruns_from_the_lateness_column():
    rig, groups, model = conveyor_model([])
    rows = np.zeros((50, len(groups.columns)))
    rows[:, groups.index("t")] = np.arange(50) * rig.tick
    rows[:, groups.index("lateness")] = 2e-6
    rows[[5, 17, 30], groups.index("lateness")] = [0.0011, 0.001, 0.0025]  # >= one tick
    rows[:, groups.index("exec_time")] = 1e-5
    model.count_rows(rows)
    snap = model.snapshot(RowStore(rows, groups.index("t")), 1.0, 10.0, run_state="test")
    assert model.overruns == 3
    assert any("overruns" in line and line.endswith(": 3") for line in snap.timing)
    assert "max 2500.0 us" in snap.timing[0]


def test_plots_pair_each_reference_with_the_output_its_loop_measures():
    for rig_file, expected in (
            ("conveyor.toml", [("y:belt_speed", ("ref:speed_setpoint", "y:belt_speed",
                                                 "sent:belt_speed")),
                               ("y:motor_current", ("y:motor_current", "sent:motor_current")),
                               ("u:voltage", ("cmd:voltage", "u:voltage"))]),
            ("tank.toml", [("y:level", ("ref:level_setpoint", "y:level", "sent:level")),
                           ("y:temperature", ("ref:temperature_setpoint", "y:temperature",
                                              "sent:temperature")),
                           ("u:inflow", ("cmd:inflow", "u:inflow")),
                           ("u:heater", ("cmd:heater", "u:heater"))])):
        rig = load_rig(CONFIGS / rig_file)
        columns, units = tick_columns(rig)
        specs = plot_specs(ColumnGroups(columns, units, rig), rig)
        assert [(s.key, s.series) for s in specs] == expected
        belt = specs[0]
        out = rig.outputs[0]
        assert (belt.low, belt.high) == (out.min, out.max)
    # a controller on a link: the loop its rig file gives the reference controller
    bench = load_rig(CONFIGS / "conveyor_hil.toml")
    assert bench.controller.kind == "external"
    assert bench.loop_pairs() == {"belt_speed": "speed_setpoint"}


# -- faults catalogue -------------------------------------------------------------------
def test_fault_catalogue_follows_sim():
    choices = {c.kind: c for c in fault_catalogue()}
    assert set(choices) == set(FAULT_KINDS)
    stuck = choices["sensor_stuck"]
    assert (stuck.target, stuck.parameter) == ("output", "value")
    rig = load_rig(CONFIGS / "tank.toml")
    assert fault_targets(stuck, rig) == ["level", "temperature"]
    inputs = [c for c in choices.values() if c.target == "input"]
    assert inputs and fault_targets(inputs[0], rig) == ["inflow", "heater"]


# -- operator actions -----------------------------------------------------------------
@pytest.fixture
def command_queue():
    q = mp.get_context("spawn").Queue()
    yield q
    q.close()
    q.join_thread()


def drain(q, n):
    return [q.get(timeout=5) for _ in range(n)]


def test_every_action_puts_one_command(command_queue):
    op = Operator(command_queue)
    assert op.estop() and op.reset() and op.stop()
    assert not hasattr(op, "arm") and not hasattr(op, "start")   # no do-nothing markers
    assert op.set_reference("speed_setpoint", "0.5")
    assert op.mark_moment("  load   step  ")
    assert op.mark_moment(MOMENT_PRESETS[0])
    assert op.inject_fault("sensor_bias", "belt_speed", 0.2, 1.5)
    assert op.clear_fault()
    got = drain(command_queue, 8)
    assert [c.kind for c in got] == ["estop", "reset", "stop", "set_reference", "mark_phase",
                                     "mark_phase", "inject_fault", "clear_fault"]
    assert got[3].args == {"name": "speed_setpoint", "value": 0.5}
    assert got[4].args == {"name": "load step"}
    assert got[5].args == {"name": MOMENT_PRESETS[0]}
    assert got[6].args == {"kind": "sensor_bias", "target": "belt_speed", "value": 0.2,
                           "duration_s": 1.5}


def test_bad_input_is_refused_with_a_message_and_sends_nothing(command_queue):
    op = Operator(command_queue)
    assert not op.set_reference("speed_setpoint", "fast")
    assert "not a number" in op.message
    assert not op.set_reference("speed_setpoint", math.inf)
    assert not op.mark_moment("   ")
    assert not op.inject_fault("sensor_bias", "", 1.0)
    assert not op.inject_fault("sensor_bias", "belt_speed", 1.0, -2)
    with pytest.raises(queue.Empty):
        command_queue.get(timeout=0.2)
    readonly = Operator(None)
    assert not readonly.estop() and "read-only" in readonly.message


def test_a_command_is_one_atomic_pipe_write():
    """POSIX: a pipe write of at most PIPE_BUF bytes is atomic (a killed dashboard cannot
    leave half a command); multiprocessing sends a 4-byte length and the pickle."""
    long = "x" * 10_000
    op = Operator(None)
    sent = []
    op.queue = type("Q", (), {"put_nowait": lambda self, c: sent.append(c)})()
    op.inject_fault(long, long, 1.0, 0.0)
    op.mark_moment(long)
    op.set_reference(long, 1.0)
    for command in sent:
        assert all(len(str(v)) <= MAX_TEXT for v in command.args.values())
        assert 4 + len(pickle.dumps(command)) <= select.PIPE_BUF
    assert isinstance(sent[0], Command)


# -- frame pacing -----------------------------------------------------------------------
def test_frame_pacer_caps_the_rate_and_idles_as_long_as_it_worked(monkeypatch):
    """On a virtual clock: quick frames are held to the cap; slow frames get at least
    their own length of idle time (so drawing never takes more than half a core)."""
    import plantrig.gui._dashboard as dashboard

    now = [0.0]
    slept: list[float] = []
    monkeypatch.setattr(dashboard.time, "perf_counter", lambda: now[0])

    def sleep(s: float) -> None:
        slept.append(s)
        now[0] += s

    monkeypatch.setattr(dashboard.time, "sleep", sleep)
    pacer = dashboard.FramePacer(25.0, idle_ratio=1.0)
    starts = []
    for work in (0.002, 0.002, 0.1, 0.1, 0.002):
        starts.append(now[0])
        now[0] += work
        pacer.wait()
    gaps = np.diff(starts + [now[0]])
    assert gaps[0] == pytest.approx(0.04) and gaps[1] == pytest.approx(0.04)   # 25 Hz
    assert slept[2] == pytest.approx(0.1) and slept[3] == pytest.approx(0.1)   # idle >= busy
    assert gaps[4] == pytest.approx(0.04)
    with pytest.raises(ValueError, match="positive"):
        dashboard.FramePacer(0.0)


def test_gui_exports_are_what_they_claim():
    import plantrig.gui as gui

    assert sorted(gui.__all__) == sorted(set(gui.__all__))
    for name in gui.__all__:
        obj = getattr(gui, name)
        assert getattr(obj, "__module__", "plantrig.gui").startswith("plantrig.gui"), name


# -- palette ----------------------------------------------------------------------------
def relative_luminance(colour) -> float:
    """WCAG 2.1 relative luminance of an sRGB colour (W3C, WCAG 2.1, 'relative
    luminance' definition)."""
    def linear(v: float) -> float:
        v /= 255
        return v / 12.92 if v <= 0.04045 else ((v + 0.055) / 1.055) ** 2.4
    r, g, b = (linear(float(c)) for c in colour[:3])
    return 0.2126 * r + 0.7152 * g + 0.0722 * b


def contrast(a, b) -> float:
    """WCAG 2.1 contrast ratio (L1 + 0.05) / (L2 + 0.05), lighter over darker."""
    high, low = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (high + 0.05) / (low + 0.05)


def test_the_palette_sets_every_colour_slot_of_the_toolkit():
    from plantrig.gui import _theme as theme

    assert theme.ALL_SLOTS and set(theme.ALL_SLOTS) <= set(theme.ROLES)


def test_the_palette_reads_on_a_projector_and_in_monochrome():
    from plantrig.gui import _theme as th

    white = (255, 255, 255)
    # words on their backgrounds: WCAG 2.1 SC 1.4.3 asks 4.5:1 for normal text
    for words, ground in ((th.INK, th.PAPER), (th.INK, th.PANEL), (th.INK, th.FIELD),
                          (th.INK_SOFT, th.PANEL), (th.INK_SOFT, th.PAPER),
                          (th.ACCENT, th.PANEL), (th.INK, th.BUTTON), (th.INK, th.BAR_QUIET),
                          (th.INK, th.ATTENTION), (th.ALARM_TEXT, th.ALARM),
                          (th.ALARM_TEXT, th.ALARM_DEEP), (th.BANNER_TEXT, th.BANNER_BG),
                          (white, th.ESTOP_BG)):
        assert contrast(words, ground) >= 4.5, (words, ground)
    # lines on the plot: WCAG 2.1 SC 1.4.11 asks 3:1 for graphics against their ground
    for prefix, (colour, _) in th.SERIES.items():
        assert contrast(colour, th.FIELD) >= 3.0, prefix
    # in grey, the controller's values stay apart from the plant's and the reference:
    # a clear lightness step, and the plant's lines are twice as thick
    plant, controller, reference = th.SERIES["y"], th.SERIES["sent"], th.SERIES["ref"]
    assert contrast(controller[0], plant[0]) >= 2.0
    assert contrast(controller[0], reference[0]) >= 2.0
    assert plant[1] >= 2 * controller[1] and plant[1] >= 2 * reference[1]
    assert th.SERIES["u"] == plant and th.SERIES["cmd"] == controller


# -- issue 14: limit lines, status line, link lamp, fault form, answers, progress ---------
GUARDED = CONFIGS / "rehearsals" / "conveyor_guarded.toml"


def guarded_model():
    rig = load_rig(GUARDED)
    columns, units = tick_columns(rig)
    groups = ColumnGroups(columns, units, rig)
    model = DashboardModel(groups, rig.tick, has_link=False, limits=rig.limits,
                           watchdog_s=watchdog_of(rig))
    return rig, groups, model


def guarded_rows(groups, n: int, tick: float) -> np.ndarray:
    rows = np.zeros((n, len(groups.columns)))
    rows[:, groups.index("t")] = np.arange(n) * tick
    rows[:, groups.index("fresh")] = 1.0
    return rows


def test_every_watched_signal_has_a_plot_with_its_limit_lines():
    # configs/rehearsals/conveyor_guarded.toml: belt_fast on x:belt_speed (warn_high 1.0,
    # trip_high 1.1), motor_current on y:motor_current (warn +-17, trip +-19)
    rig, groups, _ = guarded_model()
    specs = {s.key: s for s in plot_specs(groups, rig)}
    state = specs["x:belt_speed"]                   # a state: a plot of its own
    assert state.series == ("x:belt_speed",) and state.watched == ("belt_fast",)
    assert [(line.value, line.level) for line in state.lines] == [(1.1, 2), (1.0, 1)]
    assert not state.shows_range
    current = specs["y:motor_current"]
    assert sorted((line.value, line.level) for line in current.lines) == \
        [(-19.0, 2), (-17.0, 1), (17.0, 1), (19.0, 2)]
    assert specs["y:belt_speed"].lines == () and specs["y:belt_speed"].shows_range
    # a limit with trip bounds only is drawn once, as its trip line
    only_trip = LimitSpec("hot", "y:temp", trip_high=80.0, warn_high=80.0)
    assert limit_lines("y:temp", [only_trip])[0] == (LimitLine(80.0, 2, "hot trip high 80"),)


def test_a_one_sided_limit_bar_runs_from_zero_to_its_trip_point():
    rig, groups, model = guarded_model()
    assert trip_band(rig.limits[0]) == (0.0, 1.1)          # belt_fast: trip_high only
    assert trip_band(rig.limits[1]) == (-19.0, 19.0)
    assert trip_band(LimitSpec("low", "y:p", trip_low=-4.0)) == (-4.0, 0.0)
    rows = guarded_rows(groups, 3, rig.tick)
    rows[:, groups.index("x:belt_speed")] = 0.55
    snap = model.snapshot(RowStore(rows, groups.index("t")), 2 * rig.tick, 1.0)
    belt = snap.bars[0]
    assert belt.fraction == pytest.approx(0.5)             # halfway to the trip point
    assert belt.text == "belt_fast (x:belt_speed) 0.55 m/s  ok; trip above 1.1"


def test_the_status_line_says_the_real_state():
    rig, groups, model = guarded_model()
    rows = guarded_rows(groups, 2000, rig.tick)
    store = RowStore(rows, groups.index("t"))
    running = model.snapshot(store, 1.0, 1.0)
    assert running.status == Status("RUNNING | plant time 1.000 s", "quiet")
    # the interlock has cut the drive (its trip column), the events say since when and why
    trip = ("belt_overspeed: limit belt_fast: x:belt_speed = 1.10022 m/s, above its trip "
            "limit 1.1 m/s (trip_high); inputs to safe values")
    rows[1458:, groups.index("trip:belt_overspeed")] = 1.0
    model.log.add([EventRow(1458, 1.458, "trip", trip, "belt_overspeed")])
    tripped = model.snapshot(store, 1.9, 1.0)
    assert tripped.status.level == "alarm"
    assert tripped.status.text == (
        "TRIPPED by belt_overspeed since t = 1.458 s (limit belt_fast: x:belt_speed = "
        "1.10022 m/s, above its trip limit 1.1 m/s (trip_high)): inputs held at their safe "
        "values | plant time "
        "1.900 s")
    assert tripped.trips == [(1.458, "belt_overspeed")]
    rows[1600:, groups.index("trip:estop")] = 1.0
    model.log.add([EventRow(1600, 1.6, "estop", "operator E-stop", "estop")])
    both = model.snapshot(store, 1.9, 1.0)
    assert both.status.text.startswith("TRIPPED by E-stop, belt_overspeed since t = 1.458 s")
    model.log.add([EventRow(1700, 1.7, "operator_stop", "operator stop from the dashboard")])
    ended = model.snapshot(store, 1.9, 1.0, ended="stopped, exit code 0: operator stop")
    assert ended.status.level == "ended"
    assert ended.status.text == ("ENDED: stopped, exit code 0: operator stop | plant time "
                                 "1.900 s | latched at the end: E-stop, belt_overspeed")
    replay = model.snapshot(store, 1.0, 1.0, replay_of="run-1", log=EventLog())
    assert replay.status == Status("REPLAY of run-1 | at plant time 1.000 s: normal",
                                   "replay")
    fresh = EventLog()
    fresh.add([EventRow(5, 0.005, "operator_stop", "")])
    rows[:, groups.index("trip:belt_overspeed")] = rows[:, groups.index("trip:estop")] = 0
    assert model.snapshot(store, 0.5, 1.0, log=fresh).status.text.startswith(
        "STOPPING: operator stop |")


def test_the_link_lamp_is_judged_by_the_rigs_watchdog():
    rig, groups, model = guarded_model()
    assert watchdog_of(rig) == 0.05 and model.watchdog_s == 0.05    # [safety], not 0.1
    rows = guarded_rows(groups, 1000, rig.tick)
    store = RowStore(rows, groups.index("t"))
    t_end = 999 * rig.tick
    assert model.snapshot(store, t_end, 1.0).link_lamp.level == "quiet"
    for silent, level in ((24, "quiet"), (25, "attention"), (49, "attention"), (50, "alarm")):
        rows[:, groups.index("fresh")] = 1.0
        rows[999 - silent + 1:, groups.index("fresh")] = 0.0    # the last fresh: 999-silent
        lamp = model.snapshot(store, t_end, 1.0).link_lamp
        assert lamp.level == level, (silent, lamp)
        assert f"{silent * rig.tick:.3f} s" in lamp.text or level == "quiet"
    assert lamp.text == "LINK LOST: silent 0.050 s, beyond the 0.05 s watchdog"
    assert model.snapshot(store, t_end, 1.0).link[0].startswith("built-in controller: ")
    hil = load_rig_as_data(CONFIGS / "rehearsals" / "conveyor_guarded_hil.toml")
    assert hil.link is not None
    assert watchdog_of(hil) == hil.link.watchdog_timeout


def test_trip_marks_sit_where_a_limit_reached_trip():
    rig, groups, model = guarded_model()
    rows = guarded_rows(groups, 100, rig.tick)
    rows[:, groups.index("x:belt_speed")] = np.linspace(0.9, 1.2, 100)
    code = rows[:, groups.index("limit:belt_fast")]
    code[40:] = 1
    code[70:80] = 2
    code[90:] = 2
    marks = model.snapshot(RowStore(rows, groups.index("t")), 0.099, 1.0).trip_marks
    assert [(m.column, m.t, m.value, m.limit) for m in marks] == [
        ("x:belt_speed", rows[i, groups.index("t")], rows[i, groups.index("x:belt_speed")],
         "belt_fast")
        for i in (70, 90)]


def test_the_fault_form_starts_from_each_kinds_own_default():
    choices = {c.kind: c for c in fault_catalogue()}
    # sim's catalogue: NaN = "its value when injected", None = required, else a number
    assert choices["sensor_stuck"].default_text == ""
    assert choices["sensor_stuck"].value_hint == "empty: its value when injected"
    assert choices["sensor_dropout"].default_text == "0"
    assert choices["link_drop"].default_text == "1"
    assert choices["sensor_bias"].value_hint == "bias: required"
    for kind, info in FAULT_KINDS.items():
        first = next(iter(info.params.values()), None)
        if first is not None and math.isfinite(first):
            assert choices[kind].default_text == f"{first:g}"
    stuck = choices["sensor_stuck"]
    assert check_fault_form(stuck, "", 0.0) == (None, 0.0, "")     # holds where it is
    assert check_fault_form(stuck, " 0.3 ", 2) == (0.3, 2.0, "")
    bias = choices["sensor_bias"]
    assert "needs bias" in check_fault_form(bias, "", 0)[2]
    assert "changes nothing" in check_fault_form(bias, "0", 0)[2]
    drop = choices["link_drop"]
    assert "more than 0" in check_fault_form(drop, "0", 0)[2]
    assert "more than 0" in check_fault_form(drop, "1.5", 0)[2]
    assert check_fault_form(drop, "0.25", 0) == (0.25, 0.0, "")
    assert "enter 0 (until cleared) or more" in check_fault_form(drop, "1", -1.0)[2]
    assert "not a number" in check_fault_form(drop, "often", 0)[2]
    assert check_fault_form(choices["link_freeze"], "", 1.0) == (None, 1.0, "")


def test_the_form_result_is_the_runs_answer(command_queue):
    op = Operator(command_queue)
    assert op.inject_fault("sensor_stuck", "belt_speed", None, 0.0)
    assert op.set_reference("speed_setpoint", 0.4)
    assert "waiting for the run's answer" in op.message
    # events as the engine writes them (sim/faults/_faults.py, sim/engine/_engine.py)
    op.hear([EventRow(10, 0.01, "fault_injected", "load_surge: disturbance on belt_load "
                               "(value=25)", "load_surge"),
             EventRow(12, 0.012, "reference_set", "speed_setpoint = 0.4", "speed_setpoint")])
    assert op.message.startswith("ACCEPTED at t = 0.012 s: set_reference")
    assert [c.kind for c in op.waiting] == ["inject_fault"]   # another fault is no answer
    op.hear([EventRow(20, 0.02, "command_refused", "inject_fault: target: no output named "
                                                   "'belt_sped'", "inject_fault")])
    assert op.message == ("REFUSED by the run at t = 0.020 s: inject_fault kind=sensor_stuck "
                          "target=belt_speed duration_s=0.0: inject_fault: target: no output "
                          "named 'belt_sped'")
    assert [a.accepted for a in op.answers] == [True, False]
    assert op.reset()
    op.hear([EventRow(30, 0.03, "reset_refused", "nothing is latched")])
    assert op.message.startswith("REFUSED by the run") and "nothing is latched" in op.message
    assert op.clear_fault()
    op.run_ended("stopped: operator stop")
    assert op.message == "NO ANSWER to clear_fault: the run ended (stopped: operator stop) " \
                         "first"
    assert op.answers[-1].accepted is None and not op.waiting
    assert not op.estop() and op.message.startswith("NOT SENT estop: the run has ended")
    drain(command_queue, 4)
    with pytest.raises(queue.Empty):
        command_queue.get(timeout=0.2)


def test_answers_match_each_command_kind():
    # (command, event kind, detail, event name, answer); the engine's wording where the
    # detail starts with the name, other wording where it does not: names decide
    cases = [
        (Command("estop"), "estop", "operator E-stop", "estop", True),
        (Command("reset"), "reset", "belt_overspeed: reset by operator", "belt_overspeed",
         True),
        (Command("mark_phase", {"name": "surge"}), "phase", "surge", "surge", True),
        (Command("mark_phase", {"name": "surge"}), "phase", "moment marked", "surge", True),
        (Command("mark_phase", {"name": "surge"}), "phase", "surge", "other", None),
        (Command("stop"), "operator_stop", "", "", True),
        (Command("clear_fault"), "command_refused", "clear_fault: no active fault",
         "clear_fault", False),
        (Command("set_reference", {"name": "a", "value": 1}), "command_refused",
         "set_reference {'name': 'a'}: unknown name or non-finite value", "set_reference",
         False),
        (Command("set_reference", {"name": "a", "value": 1}), "command_refused",
         "set_reference refused, but the event is about another command", "inject_fault",
         None),
        (Command("set_reference", {"name": "a", "value": 1}), "reference_set", "now 1", "a",
         True),
        (Command("set_reference", {"name": "a", "value": 1}), "reference_set", "a = 1", "b",
         None),
        (Command("inject_fault", {"kind": "link_drop", "target": "both"}), "fault_injected",
         "link_drop:both: link_drop on both", "link_drop:both", True),
        (Command("inject_fault", {"kind": "link_drop", "target": "both"}), "fault_injected",
         "frames dropped both ways", "link_drop:both", True),
        (Command("inject_fault", {"kind": "link_drop", "target": "both"}), "fault_injected",
         "link_drop:both: link_drop on both", "link_drop:up", None),
    ]
    for command, kind, detail, name, expected in cases:
        event = EventRow(1, 0.001, kind, detail, name)
        assert answer_to(command, event) is expected, (command, event)
    # a clear_fault is answered by the fault_cleared a command made (its source says
    # so), whatever the detail's words; a fault whose duration ran out is no answer
    clear = Command("clear_fault")
    assert answer_to(clear, EventRow(1, 0.001, "fault_cleared", "stuck: ended by hand",
                                     "stuck", BY_COMMAND)) is True
    assert answer_to(clear, EventRow(1, 0.001, "fault_cleared", "stuck: cleared by command",
                                     "stuck")) is None


def test_scenario_progress_and_verdicts_read_from_the_folder_files(tmp_path):
    rig = load_rig(GUARDED)
    scenario_file = CONFIGS / "rehearsals" / "belt_sensor_stuck.toml"
    (tmp_path / "scenario.toml").write_bytes(scenario_file.read_bytes())
    plan, note = scenario_plan(tmp_path, rig)
    assert note == "" and plan is not None
    scenario = load_scenario(scenario_file, rig)
    assert plan.steps == tuple(s.label for s in scenario.steps)
    assert plan.phases == ("surge", "sensor_stuck")
    assert plan.verdicts == tuple(v.name for v in scenario.verdicts)
    log = EventLog()
    log.add([EventRow(800, 0.8, "scenario_step", f"{plan.steps[0]}: at 0.8 s", plan.steps[0]),
             EventRow(800, 0.8, "phase", "surge", "surge")])
    lines = progress_lines(plan, log)
    assert lines[0] == f"scenario belt_sensor_stuck: 1 of {len(plan.steps)} steps fired"
    assert lines[1] == "  done  step 1 (steps[0]) at 0.800 s"    # unnamed: counted, with its key
    assert lines[2] == "  --    step 2 (steps[1])"
    assert "phases reached: surge (0.800 s)" in lines
    assert "phases to come: sensor_stuck" in lines
    summary = {"ended": "tripped", "exit_code": 1, "reason": "interlock belt_overspeed",
               "acceptance": [{"rule": "no unexpected trip", "passed": False,
                               "measured": "1 trip(s)", "needed": "none"}],
               "verdicts": [{"name": "a very long verdict name that is never cut short",
                             "criterion": "band", "measured": 0.0, "limit": 0.0,
                             "unit": "m/s", "passed": False, "detail": "outside"}]}
    out = outcome_lines(summary)
    assert out[0] == ("outcome: tripped, exit code 1: interlock belt_overspeed", False)
    assert ("rule failed: no unexpected trip: 1 trip(s) (needed none)", False) in out
    assert out[-1] == ("FAIL  a very long verdict name that is never cut short: 0 m/s "
                       "(limit 0); outside", False)
    assert outcome_lines(None) == [("outcome: judged when the run ends", None)]
    assert pending_verdicts(plan)[1] == (f"  ..  {plan.verdicts[0]}", None)
    (tmp_path / "scenario.toml").write_text("[scenario]\nname = 3\n")
    assert scenario_plan(tmp_path, rig)[0] is None and \
        scenario_plan(tmp_path, rig)[1].startswith("scenario.toml:")


def test_the_live_window_finds_its_run_folder_only_when_run_start_names_the_tape(tmp_path):
    folder = tmp_path / "conveyor_guarded-20261202-101500"
    folder.mkdir()
    tape = Path("/dev/shm") / f"plantrig-{folder.name}-7f3a.tape"
    assert live_folder(tape, tmp_path) is None                 # no run_start.json yet
    (folder / "run_start.json").write_text(json.dumps({"tape": "/dev/shm/other.tape"}))
    assert live_folder(tape, tmp_path) is None                 # another run's tape
    (folder / "run_start.json").write_text(json.dumps({"tape": str(tape)}))
    assert live_folder(tape, tmp_path) == folder
    assert live_folder(tape, None) is None
    assert live_folder(Path("/dev/shm/odd.tape"), tmp_path) is None


def test_a_recorded_run_is_read_a_window_at_a_time(tmp_path: Path) -> None:
    """Replay never holds the whole run: a short window comes back as recorded, a long
    one thinned to each bucket's min and max per column (the spike and the extremes
    survive), and the row at an instant is the recorded row."""
    from plantrig.gui._store import RecordStore
    from plantrig.sim import load_rig, read_run, run_to_folder

    rig = load_rig(Path(__file__).resolve().parents[1] / "configs" / "conveyor.toml")
    folder, _, _ = run_to_folder(rig, tmp_path)
    whole = read_run(folder)
    t_index = whole.columns.index("t")
    store = RecordStore(folder, whole.ticks_total, rig.tick, t_index, max_rows=200)
    assert len(store) == len(whole.rows) and store.t_last == whole.t[-1]
    short = store.window(0.15, 0.1)                    # ticks 51..150: 100 rows
    np.testing.assert_array_equal(short, whole.rows[51:151])
    np.testing.assert_array_equal(store.at(1.2345), whole.rows[1234])
    thin = store.window(store.t_last, store.t_last + 1.0)   # every row: thinned
    assert len(thin) <= 200 + 2 and np.all(np.diff(thin[:, t_index]) >= 0)
    for i, name in enumerate(whole.columns):
        if name != "t":
            assert np.nanmax(thin[:, i]) == np.nanmax(whole.rows[:, i])
            assert np.nanmin(thin[:, i]) == np.nanmin(whole.rows[:, i])
    assert thin[0, t_index] == 0.0 and thin[-1, t_index] == whole.t[-1]
