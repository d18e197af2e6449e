"""The sign-off report and ``plantrig plot`` on real run folders of the shipped rehearsals.

The PDF is rendered to PNG pages with poppler's pdftoppm and read back with pdftotext;
numbers on the pages are checked against the run folder (summary.json, run.h5). The
rehearsals are the shipped ones (configs/rehearsals/), run in fast mode by the CLI.
"""

from __future__ import annotations

import datetime as _dt
import json
import re
import subprocess
from pathlib import Path

import matplotlib.image
import numpy as np
import pytest
from rig_text import rig_text

from plantrig.cli import build_parser, main
from plantrig.io import build_link
from plantrig.sim import RigFileError, build_rig, load_rig, read_run
from plantrig.sim.records._run_info import run_info_of

REPO = Path(__file__).resolve().parents[1]
REHEARSALS = REPO / "configs" / "rehearsals"
INTERNAL = ("orphaned", "disk_error", "False", "None", "max_backlog_rows", "ticks_per_s",
            "lateness_p50", "fault_injected", "scenario_step", "run_end")


def run_cli(tmp: Path, rig: Path, scenario: Path, *extra: str) -> Path:
    out = tmp / "runs"
    assert main(["run", str(rig), "--scenario", str(scenario), "--fast", "--out", str(out),
                 *extra]) == 0
    (folder,) = [p for p in out.iterdir() if (p / "run_start.json").is_file()]
    return folder


@pytest.fixture(scope="module")
def belt_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return run_cli(tmp_path_factory.mktemp("belt"), REHEARSALS / "conveyor_guarded.toml",
                   REHEARSALS / "belt_sensor_stuck.toml", "--dut",
                   "belt drive controller, bench unit B", "--firmware", "2.4.1")


@pytest.fixture(scope="module")
def belt_report(belt_run: Path, tmp_path_factory: pytest.TempPathFactory) -> dict:
    assert main(["report", str(belt_run), "--operator", "R. Okafor", "--reviewer",
                 "M. Lindqvist"]) == 0
    pdf = belt_run / "derived" / "report.pdf"
    pngs = tmp_path_factory.mktemp("pages")
    subprocess.run(["pdftoppm", "-r", "60", "-png", str(pdf), str(pngs / "page")],
                   check=True, timeout=120)
    text = subprocess.run(["pdftotext", "-layout", str(pdf), "-"], check=True,
                          capture_output=True, text=True, timeout=120).stdout
    pages = text.split("\f")[:-1]
    images = [matplotlib.image.imread(p)[..., :3] for p in sorted(pngs.glob("page-*.png"))]
    assert len(images) == len(pages)
    return {"pages": pages, "images": images, "pngs": pngs,
            "html": (belt_run / "derived" / "report.html").read_text()}


def left_column(page: str, start: str, end: str, value_mark: str) -> str:
    """The label column (wrapped lines joined) of one section of a -layout page; the
    value column starts where ``value_mark`` does."""
    block = page[page.index(start) + len(start):page.index(end)]
    at = min(line.index(value_mark) for line in block.splitlines() if value_mark in line)
    return " ".join(line[:at].strip() for line in block.splitlines() if line[:at].strip())


def test_page_one_puts_the_result_identity_acceptance_and_verdicts_first(
        belt_run: Path, belt_report: dict) -> None:
    summary = json.loads((belt_run / "summary.json").read_text())
    first = belt_report["pages"][0]
    assert "Run record for sign-off" in first
    assert "RESULT: PASS — COMPLETED (duration reached), exit code 0" in first
    order = [first.index(s) for s in ("RESULT:", "Run\n", "Acceptance rules", "Verdicts",
                                      "Signatures")]
    assert order == sorted(order)
    assert belt_run.name in first and "belt_sensor_stuck" in first
    # tick 0 of the run: recorded by the engine at run time, after run_start.json
    tick0 = summary["tick0_utc"]
    assert tick0 in first
    started = _dt.datetime.fromisoformat(json.loads(
        (belt_run / "run_start.json").read_text())["started_utc"])
    assert _dt.datetime.fromisoformat(tick0) >= started
    # noted in run_start.json as the loop started too (what a recovered run keeps)
    assert json.loads((belt_run / "run_start.json").read_text())["tick0_utc"] == tick0
    assert "belt drive controller, bench unit B, firmware 2.4.1" in first
    # every acceptance rule and every verdict of the run, by its whole name
    for rule in summary["acceptance"]:
        assert rule["rule"] in first
    names = left_column(first, "Verdicts", "Signatures", "PASS;")
    verdicts = json.loads((belt_run / "verdicts.json").read_text())
    assert len(verdicts) == 8
    for verdict in verdicts:
        assert verdict["name"] in names, verdict["name"]      # wrapped, never cut
    # each verdict's bound as the console says it: the band's is its 1.15 m/s bound, not
    # the 0 m/s it may be outside by
    flat = " ".join(first.split())
    assert "needs x:belt_speed <= 1.15 m/s" in flat and "limit 0 m/s" not in flat
    assert all(f"needs {v['needs']}" in flat for v in verdicts if v["needs"])
    # an expectation reads as its test, without a bare "limit 0"; no detail said twice
    assert "released PASS; expect; measured 0; trip:belt_overspeed == 0 at " in flat
    assert "needs no unexpected trip; no unexpected trip" not in flat
    long = "overspeed trip after the sensor sticks"             # 38 characters
    assert long in names and "8 of 8 criteria passed" in first
    assert "name R. Okafor" in first and "name M. Lindqvist" in first
    html = belt_report["html"]
    assert html.index("RESULT: PASS") < html.index("Acceptance rules") < html.index(
        "Verdicts") < html.index("Signatures") < html.index("Software and hashes")


def test_software_and_hashes_match_the_folder(belt_run: Path, belt_report: dict) -> None:
    text = "\n".join(belt_report["pages"][:3])
    summary = json.loads((belt_run / "summary.json").read_text())
    env = summary["environment"]
    for key in ("host", "python", "numpy", "scipy", "h5py"):
        assert env[key] and env[key] in text, key
    commit = env["git_commit"].split()[0]            # the commit the run ran from
    assert subprocess.run(["git", "-C", str(REPO), "cat-file", "-e", f"{commit}^{{commit}}"],
                          timeout=30).returncode == 0
    assert commit in text
    sources = json.loads((belt_run / "sources.json").read_text())["files"]
    assert sources["rig.toml"]["sha256"] in text and sources["scenario.toml"]["sha256"] in text
    # the rig's hash is the file as written, labelled so: the folder's rig.toml (the
    # copy with the run's values, in the manifest) has another
    flat = " ".join(text.split())
    assert (f"rig file SHA-256 {sources['rig.toml']['sha256']} (conveyor_guarded.toml as "
            "written; rig.toml is its copy as run)") in flat
    assert sources["rig.toml"]["copy_sha256"] != sources["rig.toml"]["sha256"]
    assert "rig rig.toml SHA-256" not in flat
    import hashlib
    manifest = hashlib.sha256((belt_run / "manifest.json").read_bytes()).hexdigest()
    assert manifest in text
    # all of it on page 1, after the signatures, for a scenario of 8 verdicts
    first = belt_report["pages"][0]
    assert first.index("Signatures") < first.index("Software and hashes") < first.index(
        commit) < first.index(sources["scenario.toml"]["sha256"]) < first.index(manifest)


def test_every_page_is_numbered_with_the_run_id(belt_run: Path, belt_report: dict) -> None:
    pages = belt_report["pages"]
    for n, page in enumerate(pages, start=1):
        assert f"run {belt_run.name} — page {n} of {len(pages)}" in page, n


def test_no_internal_names_and_no_timing_figures_in_a_fast_run(belt_run: Path,
                                                              belt_report: dict) -> None:
    text = "\n".join(belt_report["pages"])
    for word in INTERNAL:
        assert word not in text, word
    assert "Tick lateness" not in text and "Tick work time" not in text
    assert "fast mode: ticks were not paced to the wall clock" in text
    summary = json.loads((belt_run / "summary.json").read_text())
    in_c = summary["timing"]["ticks_in_c"]    # the guarded belt ticks in C until its faults
    assert 0 < in_c < summary["ticks_recorded"]
    assert f"{in_c} of {summary['ticks_recorded']} (the same record" in text
    assert "fault injected: stuck_sensor" in text and "limit warning: belt_fast" in text


def test_limit_use_is_the_watched_signal_over_its_trip_band(belt_run: Path,
                                                            belt_report: dict) -> None:
    record = read_run(belt_run)
    v, t = record["x:belt_speed"], record.t
    # belt_fast: one-sided, trip above 1.1 m/s, warn above 1.0; base = v at tick 0 (0)
    assert v[0] == 0.0
    use = v / 1.1
    i = int(np.argmax(use))
    text = "\n".join(belt_report["pages"])
    assert f"peak {use[i]:.3f} at {t[i]:.4g} s" in text
    assert use[i] > 1.0                          # it went past the trip bound, then tripped
    # motor_current: two-sided -19 .. 19 A, base the middle (0 A)
    current = record["y:motor_current"]
    j = int(np.argmax(np.abs(current)))
    assert f"peak {abs(current[j]) / 19:.3f} at {t[j]:.4g} s" in text
    page_index = next(k for k, p in enumerate(belt_report["pages"]) if "Limit use:" in p)
    page = belt_report["images"][page_index]
    # the trip bound of each of the two panels: a long run of alarm-red pixels in a row
    red = (page[..., 0] > 0.5) & (page[..., 1] < 0.25) & (page[..., 2] < 0.25)
    rows = np.flatnonzero(red.sum(axis=1) > 0.5 * page.shape[1])
    groups = np.split(rows, np.flatnonzero(np.diff(rows) > 3) + 1) if rows.size else []
    assert len(groups) == 2
    assert "limit:belt_fast" not in belt_report["pages"][page_index]   # not the 0/1/2 code


def test_signal_pages_overlay_reference_and_shade_faults(belt_run: Path,
                                                         belt_report: dict) -> None:
    pages = belt_report["pages"]
    signals = [k for k, p in enumerate(pages) if "Signals (" in p]
    assert signals
    image = belt_report["images"][signals[0]]
    # the first panel (belt speed): plant blue, controller orange and reference ink traces,
    # and the amber fault window of the stuck sensor (1.2 .. 1.958 s)
    frame = np.flatnonzero((image < 0.3).all(axis=2).sum(axis=1) > 0.4 * image.shape[1])
    panel = image[frame[0] + 2:frame[1] - 1]
    blue = (panel[..., 2] - panel[..., 0] > 0.3)
    orange = (panel[..., 0] - panel[..., 2] > 0.5) & (panel[..., 1] > 0.3)
    assert blue.sum() > 150 and orange.sum() > 100
    # the fault window: the widest run of pixel columns mostly amber-tinted; its share of
    # the axes matches 1.2 .. 1.958 s on an axis of 0 .. 4 s with matplotlib's 5 % margins
    amber = (panel[..., 0] > 0.8) & (panel[..., 0] - panel[..., 2] > 0.1)
    cols = np.convolve(amber.mean(axis=0) > 0.5, np.ones(5), "same") > 0
    edges = np.flatnonzero(np.diff(np.concatenate([[0], cols.astype(int), [0]])))
    widest = max(b - a for a, b in zip(edges[::2], edges[1::2], strict=True))
    inner = np.flatnonzero((panel < 0.3).all(axis=2).sum(axis=0) > 0.8 * len(panel))
    expected = (1.958 - 1.2) / (4.0 * 1.1)
    assert abs(widest / (inner[-1] - inner[0]) - expected) < 0.03
    events = [json.loads(line) for line in (belt_run / "events.jsonl").read_text().splitlines()]
    kinds = [e["kind"] for e in events]
    assert "trip" in kinds and "fault_injected" in kinds
    html = belt_report["html"]
    assert "Signals (1 of" in html and "Limit use" in html and "Timing" not in html
    matplotlib.image.imsave(belt_report["pngs"] / "look-signals.png", image)


def test_fault_windows_and_trips_come_from_the_event_fields(belt_run: Path,
                                                           tmp_path: Path) -> None:
    """The plots take each window's name and kind and each trip's interlock from the
    events' name and window fields, whatever the detail says; a record written before
    those fields existed gets them from its text in one place (current_event_fields)."""
    import shutil

    import h5py

    from plantrig._plots import context, windows_from_events
    from plantrig.sim.records._reader import current_event_fields

    record = read_run(belt_run)
    ctx = context(record)
    # the scenario's load surge is a disturbance (0.8 s for 2.5 s), its stuck sensor a
    # fault cleared 0.5 s after the trip (configs/rehearsals/belt_sensor_stuck.toml)
    trip = next(e["time"] for e in record.events if e["kind"] == "trip")
    assert [(w.name, w.kind, w.start, w.end) for w in ctx.windows] == [
        ("load_surge", "disturbance", 0.8, pytest.approx(3.3)),
        ("stuck_sensor", "fault", 1.2, pytest.approx(trip + 0.5))]
    assert [(t.name, t.time) for t in ctx.trips] == [("belt_overspeed", trip)]
    reworded = [{**e, "detail": "worded otherwise: fault on nothing"} for e in record.events]
    assert [(w.name, w.kind, w.start, w.end) for w in windows_from_events(reworded, 4.0)] \
        == [(w.name, w.kind, w.start, w.end) for w in windows_from_events(record.events, 4.0)]
    # the same events as an older record holds them (no name, no window): the one
    # fallback gives back every field the engine set today, from the engine's wording
    old = [{k: v for k, v in e.items() if k not in ("name", "window")} for e in record.events]
    assert old != record.events and [current_event_fields(e) for e in old] == record.events
    # ... and read_run gives them so from a folder whose run.h5 and events.jsonl lack them
    folder = tmp_path / "old"
    shutil.copytree(belt_run, folder)
    (folder / "events.jsonl").write_text("".join(json.dumps(e) + "\n" for e in old))
    with h5py.File(folder / "run.h5", "r+") as f:
        table = f["events"][()]
        del f["events"]
        f.create_dataset("events", data=table[["tick", "time", "kind", "detail", "source"]])
    assert read_run(folder).events == record.events
    # a fault named by the engine's default "<kind>:<target>" keeps its colon, and an
    # event that names nothing gets no name
    assert current_event_fields({"tick": 5, "time": 0.5, "kind": "fault_injected", "detail":
                                 "disturbance:belt_load: disturbance on belt_load (value=1), "
                                 "until cleared"}) == {
        "tick": 5, "time": 0.5, "kind": "fault_injected", "detail": "disturbance:belt_load: "
        "disturbance on belt_load (value=1), until cleared", "name": "disturbance:belt_load",
        "window": "disturbance"}
    # a fault a clear_fault command ended: its source, as today's records say it
    assert current_event_fields({"tick": 7, "time": 0.7, "kind": "fault_cleared",
                                 "detail": "stuck: cleared by command"}) == {
        "tick": 7, "time": 0.7, "kind": "fault_cleared", "detail": "stuck: cleared by command",
        "name": "stuck", "source": "command"}
    assert current_event_fields({"tick": 1, "time": 0.1, "kind": "reset_refused",
                                 "detail": "nothing is latched"}) == {
        "tick": 1, "time": 0.1, "kind": "reset_refused", "detail": "nothing is latched"}


def test_tank_rehearsal_report_reads_the_ode_rig_as_data(tmp_path: Path) -> None:
    folder = run_cli(tmp_path, REHEARSALS / "tank_guarded.toml",
                     REHEARSALS / "heater_stuck_on.toml")
    assert main(["report", str(folder)]) == 0
    text = subprocess.run(["pdftotext", "-layout", str(folder / "derived" / "report.pdf"),
                           "-"], check=True, capture_output=True, text=True,
                          timeout=120).stdout
    sources = json.loads((folder / "sources.json").read_text())["files"]
    model = next(e for e in sources.values() if e["role"] == "model")
    assert model["sha256"] in text
    record = read_run(folder)
    level = record["x:level"]
    # level_low: one-sided, trip below 0.08 m, base = the level at tick 0 (0.30 m)
    use = np.where(level < level[0], (level[0] - level) / (level[0] - 0.08), 0.0)
    k = int(np.argmax(use))
    assert f"peak {use[k]:.3f} at {record.t[k]:.4g} s" in text
    assert "device under test" in text and "not named" in text
    # level_high peaks at the run's last tick: its note stays inside the panel
    import matplotlib.pyplot as plt

    from plantrig._plots import context, plot_signals, standard_panels
    from plantrig._report import _limit_page
    ctx = context(record)
    # the trip comes late (116.5 s of 150): its name, left of its line, clears the limit
    # labels at the right edge
    assert ctx.trips and ctx.trips[0].time > 100
    fig = plot_signals(ctx, standard_panels(ctx))
    try:
        for axes, _legend, texts in _boxes(fig):
            assert_apart(axes, texts)
    finally:
        plt.close(fig)
    fig = _limit_page(ctx, ctx.limits)
    try:
        notes = [(axes, b) for axes, _legend, texts in _boxes(fig) for text, b in texts
                 if text.startswith("peak ")]
        assert len(notes) == len(ctx.limits) == 3
        for axes, b in notes:
            assert axes.x0 <= b.x0 and b.x1 <= axes.x1 and axes.y0 <= b.y0 <= b.y1 <= axes.y1
    finally:
        plt.close(fig)


def test_dut_table_is_checked_like_every_rig_key(tmp_path: Path) -> None:
    doc_text = rig_text(REHEARSALS / "conveyor_guarded.toml")
    import tomllib
    doc = tomllib.loads(doc_text)
    rig = build_rig({**doc, "dut": {"name": "drive B", "firmware": "2.4.1",
                                    "serial": "SN 10442"}}, tmp_path / "r.toml")
    assert rig.dut.as_dict() == {"name": "drive B", "firmware": "2.4.1", "serial": "SN 10442"}
    assert rig.dut.with_overrides(None, "2.5.0").firmware == "2.5.0"
    with pytest.raises(RigFileError) as err:
        build_rig({**doc, "dut": {"nmae": "x", "firmware": 3, "serial": " "}},
                  tmp_path / "r.toml")
    messages = [str(i) for i in err.value.issues]
    assert any("dut.nmae" in m and "did you mean 'name'" in m for m in messages)
    assert any("dut.firmware" in m and "expected a string" in m for m in messages)
    assert any("dut.serial" in m and "empty" in m for m in messages)


def test_the_port_really_used_is_recorded(tmp_path: Path) -> None:
    rig = load_rig(REPO / "configs" / "conveyor_hil.toml")
    assert rig.link.options["port"] == "/dev/ttyUSB0"                   # what the file asks for
    link = build_link(rig, port="loop://")                       # what --port gave
    info = run_info_of({"dut": {"name": "x"}}, link, rig.dut)
    assert info["link_used"]["port"] == "loop://"
    assert info["link_used"]["baud"] == rig.link.options["baud"]
    assert info["dut"] == {"name": "x"} and info["environment"]["python"]


def test_plot_writes_png_and_svg_with_limits_trips_and_faults(belt_run: Path,
                                                              tmp_path: Path,
                                                              capsys: pytest.CaptureFixture[str]
                                                              ) -> None:
    svg = tmp_path / "belt.svg"
    assert main(["plot", str(belt_run), "belt_speed", "x:belt_speed", "cmd:voltage,u:voltage",
                 "--out", str(svg)]) == 0
    body = svg.read_text()
    for words in ("belt_fast trip 1.1", "belt_fast warn 1", "trip belt_overspeed",
                  "fault stuck_sensor", "disturbance load_surge",
                  "reference speed_setpoint", "controller reads belt_speed",
                  "plant output (true) belt_speed", "plant state (true) belt_speed"):
        assert words in body, words
    png = tmp_path / "belt.png"
    assert main(["plot", str(belt_run), "motor_current", "--out", str(png)]) == 0
    image = matplotlib.image.imread(png)
    assert image.shape[0] > 200
    capsys.readouterr()
    assert main(["plot", str(belt_run), "belt_sped", "--out", str(png)]) == 2
    err = capsys.readouterr().err
    assert "no signal 'belt_sped'" in err and "y:belt_speed" in err
    assert main(["plot", str(belt_run), "belt_speed", "--out", str(tmp_path / "a.jpg")]) == 2
    assert main(["plot", str(tmp_path / "nowhere"), "belt_speed"]) == 2
    capsys.readouterr()                      # never into the record outside derived/
    assert main(["plot", str(belt_run), "belt_speed", "--out",
                 str(belt_run / "p.png")]) == 2
    assert "inside the run folder but not in derived/" in capsys.readouterr().err
    assert not (belt_run / "p.png").exists()
    assert not (belt_run / "derived" / "plot-belt_speed.png").exists()
    assert main(["plot", str(belt_run), "belt_speed"]) == 0   # default: RUN/derived/
    assert (belt_run / "derived" / "plot-belt_speed.png").is_file()
    assert main(["verify", str(belt_run)]) == 0                  # the record is unchanged


def test_help_of_plot_and_run_documents_the_new_options() -> None:
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    plot_help = sub.choices["plot"].format_help()
    assert "exit codes:" in plot_help and re.search(r"\b2\s+usage mistake", plot_help)
    run_help = sub.choices["run"].format_help()
    assert "--dut NAME" in run_help and "--firmware VERSION" in run_help
    assert "--reviewer" in sub.choices["report"].format_help()


def test_a_long_record_is_reported_from_a_thinned_copy_with_its_peaks(
        belt_run: Path, belt_report: dict, tmp_path: Path,
        monkeypatch: pytest.MonkeyPatch) -> None:
    """A record longer than DISPLAY_ROWS is plotted from a min/max-thinned copy read a
    part at a time (memory that does not grow with the run); the limit-use peaks, the
    pages and the numbers stay those of the whole record."""
    import plantrig.sim.records._reader as reader

    record = reader.read_for_display(belt_run, max_rows=400)
    assert len(record.rows) <= 402 and record.ticks_total == len(read_run(belt_run).rows)
    monkeypatch.setattr(reader, "DISPLAY_ROWS", 400)
    assert main(["report", str(belt_run), "--out", str(tmp_path), "--operator", "R. Okafor",
                 "--reviewer", "M. Lindqvist"]) == 0
    text = subprocess.run(["pdftotext", "-layout", str(tmp_path / "report.pdf"), "-"],
                          check=True, capture_output=True, text=True, timeout=120).stdout
    pages = text.split("\f")[:-1]
    assert len(pages) == len(belt_report["pages"])
    whole = "\n".join(belt_report["pages"])
    peaks = re.findall(r"peak \d+\.\d+ at [\d.e+-]+ s", whole)
    assert peaks and all(p in text for p in peaks)


def _boxes(fig: object) -> list:
    """(axes box, legend box, texts' boxes) of each axes of a drawn figure, in pixels."""
    fig.canvas.draw()                                   # type: ignore[attr-defined]
    renderer = fig.canvas.get_renderer()                # type: ignore[attr-defined]
    return [(ax.get_window_extent(renderer),
             ax.get_legend().get_window_extent(renderer) if ax.get_legend() else None,
             [(t.get_text(), t.get_window_extent(renderer)) for t in ax.texts])
            for ax in fig.axes if ax.get_visible()]     # type: ignore[attr-defined]


def assert_apart(axes: object, texts: list) -> None:
    """No two labels of a panel overlap; a trip's name sits under the latched bar (the
    top 3.5 % of the axes), not on it."""
    for i, (text, a) in enumerate(texts):
        if text.startswith("trip "):
            assert a.y1 < axes.y1 - 0.035 * axes.height, text    # type: ignore[attr-defined]
        for other, b in texts[i + 1:]:
            assert not a.overlaps(b), (text, other)


def test_legends_and_labels_leave_the_traces_and_each_other_clear(belt_run: Path) -> None:
    """The legend sits beside each panel (inside, it hid the reference step and the rise
    under its box); a limit's warn and trip labels never write over each other (the
    motor current's -17 and -19 did); the figure is the one report and plot draw."""
    import matplotlib.pyplot as plt

    from plantrig._plots import context, plot_signals, standard_panels

    ctx = context(read_run(belt_run))
    fig = plot_signals(ctx, standard_panels(ctx))
    try:
        boxes = _boxes(fig)
        labelled = 0
        for axes, legend, texts in boxes:
            assert legend is not None and legend.x0 >= axes.x1      # beside, not over
            limit_labels = [b for text, b in texts if " warn " in text or " trip " in text]
            labelled += len(limit_labels) > 1
            for a in limit_labels:
                assert axes.y0 <= a.y0 and a.y1 <= axes.y1           # inside its panel
            assert_apart(axes, texts)
        assert labelled == 2            # motor_current (four lines) and x:belt_speed (two)
    finally:
        plt.close(fig)


@pytest.fixture(scope="module")
def trip_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The guarded conveyor asked for 1.3 m/s at 1.6 s: belt_overspeed trips, unexpected
    (exit code 4), with a long reason in the result line."""
    out = tmp_path_factory.mktemp("trip") / "runs"
    assert main(["run", str(REHEARSALS / "conveyor_guarded.toml"), "--fast", "--out",
                 str(out), "--set", "references[0].points=[[0.0, 0.0], [0.2, 0.8], "
                 "[1.6, 1.3]]"]) == 4
    (folder,) = [p for p in out.iterdir() if (p / "run_start.json").is_file()]
    return folder


def test_the_result_box_holds_every_line_of_a_long_result(trip_run: Path) -> None:
    """A tripped run's result wraps onto as many lines as it needs, all inside the box
    (it was cut at two lines, and its first line ran past the box's right edge)."""
    import matplotlib.pyplot as plt
    from matplotlib.patches import Rectangle

    from plantrig._plots import context
    from plantrig._report import _text_pages
    from plantrig._report_text import result_line, run_facts, sections
    from plantrig.sim import check_folder

    record = read_run(trip_run)
    facts = run_facts(record)
    content = sections(record, context(record), check_folder(trip_run), False, {})
    pages = _text_pages(record, facts, content)
    try:
        first = pages[0]
        first.canvas.draw()
        renderer = first.canvas.get_renderer()
        (box,) = [a.get_window_extent(renderer) for a in first.artists
                  if isinstance(a, Rectangle)]
        lines = [t for t in first.texts if t.get_fontsize() == 11]
        assert len(lines) >= 2
        assert " ".join(t.get_text() for t in lines) == result_line(facts)
        assert "TRIPPED" in result_line(facts) and "exit code 4" in result_line(facts)
        for line in lines:
            b = line.get_window_extent(renderer)
            assert box.x0 < b.x0 and b.x1 < box.x1 and box.y0 < b.y0 and b.y1 < box.y1
    finally:
        for page in pages:
            plt.close(page)


def test_a_scenario_never_judged_is_not_reported_as_having_no_verdicts(
        belt_run: Path, tmp_path: Path) -> None:
    """A run whose rig died has its scenario's verdicts unjudged (recover rebuilds ticks,
    not verdicts): the report says so instead of 'no acceptance criteria'."""
    from plantrig._report_text import verdict_rows

    (tmp_path / "scenario.toml").write_bytes((belt_run / "scenario.toml").read_bytes())
    rows = verdict_rows(tmp_path, {"ended": "interrupted", "recovery": {}})
    assert rows == [("verdicts", "not judged: the run did not end (its rig process died; "
                                 "plantrig recover rebuilt the record); the scenario's 7 "
                                 "verdict(s) were not evaluated")]
    assert len(json.loads((belt_run / "verdicts.json").read_text())) == 8   # 7 + expect


@pytest.fixture(scope="module")
def bench_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The bench rig (controller on a serial link) rehearsed fast: the reference
    controller's law over a real pty in lockstep, with the link's real counters."""
    out = tmp_path_factory.mktemp("bench") / "runs"
    assert main(["run", str(REPO / "configs" / "conveyor_hil.toml"), "--fast", "--out",
                 str(out)]) == 0
    (folder,) = [p for p in out.iterdir() if (p / "run_start.json").is_file()]
    return folder


def test_a_controller_on_a_link_has_its_reference_over_the_value_it_drives(
        bench_run: Path) -> None:
    """The rig's controller is external; its [link.controller] law pairs the setpoint
    with the belt speed, so the reference is drawn over it, not on a panel of its own."""
    from plantrig._plots import context, standard_panels

    panels = standard_panels(context(read_run(bench_run)))
    assert panels[0].columns == ["ref:speed_setpoint", "y:belt_speed", "sent:belt_speed"]
    assert sum("ref:speed_setpoint" in p.columns for p in panels) == 1


def test_the_link_section_says_the_counters_in_words(bench_run: Path) -> None:
    """The link's health as the console says it, each refusal by reason, the rest in
    words: no summary key (bad_non_finite, latency_ms_p50, controller_state) on the page."""
    from plantrig._console import link_lines

    assert main(["report", str(bench_run)]) == 0
    text = subprocess.run(["pdftotext", "-layout", str(bench_run / "derived" / "report.pdf"),
                           "-"], check=True, capture_output=True, text=True,
                          timeout=120).stdout
    section = text[text.index("Link and timing"):text.index("Caution")]
    flat = " ".join(section.split())
    summary = json.loads((bench_run / "summary.json").read_text())
    health = summary["link"]
    assert len(health) > 30 and health["frames_out"] > 0
    for key in (k for k in health if "_" in k):
        assert key not in section, key
    for line in link_lines(health, summary["rig"]["tick_s"], "serial").splitlines():
        assert " ".join(line.removeprefix("link: ").split()) in flat
    assert "refused, by reason none" in flat
    assert f"controller's last state {health['controller_state']:.0f}" in flat
    used = summary["link_used"]
    assert used["port"] != "/dev/ttyUSB0"          # the pty the run used, not the file's
    assert f"serial port {used['port']} at {used['baud']} baud" in " ".join(text.split())


def test_timeline_marks_are_drawn_over_the_grid(belt_run: Path) -> None:
    """An event on a grid line (the run's end at 4.0 s) is drawn above the grid line:
    under it, the mark all but vanished at 60 dpi."""
    import matplotlib.pyplot as plt

    from plantrig._plots import context
    from plantrig._report import _timeline

    fig = _timeline(context(read_run(belt_run)))
    try:
        ax = fig.axes[0]
        grid = max(line.get_zorder() for line in ax.xaxis.get_gridlines())
        assert ax.collections and all(c.get_zorder() > grid for c in ax.collections)
        ends = [c for c in ax.collections if 4.0 in c.get_offsets()[:, 0]]
        assert ends                                  # the run's end, on the 4.0 grid line
    finally:
        plt.close(fig)


def test_rehearsed_link_faults_are_said_in_words(tmp_path: Path) -> None:
    """A rehearsed link loss (built-in controller, no link) reads as the console says it,
    without the event's field name."""
    folder = run_cli(tmp_path, REHEARSALS / "conveyor_guarded.toml",
                     REHEARSALS / "link_lost.toml")
    from plantrig._report_text import timing_rows

    record = read_run(folder)
    rows = dict(timing_rows(record, record.summary))
    health = record.summary["link"]
    assert rows["link"] == "none (built-in controller)"
    assert rows["rehearsed link faults"] == (
        f"{health['frames_dropped']:.0f} frames dropped, {health['rehearsed_losses']:.0f} "
        "link losses (each a link-lost event)")
    assert "_" not in rows["rehearsed link faults"]


def test_an_event_before_tick_0_says_so(belt_run: Path) -> None:
    """A link's set-up event is recorded at tick -1 (an MQTT connect, a Modbus server
    listening): the report says "before tick 0", not "tick -1"."""
    from plantrig._report_text import event_rows

    record = read_run(belt_run)
    record.events.insert(0, {"tick": -1, "time": 0.0, "kind": "link_connected",
                             "detail": "127.0.0.1:47235 as plantrig-conveyor-14001"})
    rows = event_rows(record)
    assert rows[0] == ("before tick 0",
                       "link connected: 127.0.0.1:47235 as plantrig-conveyor-14001")
    assert rows[1][0] == "0.8000 s (tick 800)" and not any("tick -1" in k for k, _ in rows)


def test_the_console_says_the_device_under_test(tmp_path: Path,
                                                capsys: pytest.CaptureFixture[str]) -> None:
    """The device under test given at run time is in the console's summary of the run,
    in the report's words, right under the run folder."""
    assert main(["run", str(REHEARSALS / "conveyor_guarded.toml"), "--fast", "--out",
                 str(tmp_path), "--dut", "drive B", "--firmware", "2.4.1"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith("run folder: ")
    assert lines[1] == "device under test: drive B, firmware 2.4.1"


def test_a_verdict_never_measured_says_so(tmp_path: Path) -> None:
    """A run stopped before an expectation's trigger came has that verdict unmeasured
    (null in verdicts.json, as a Ctrl-C'd belt rehearsal wrote it): 'not measured', never
    'measured none'."""
    from plantrig._report_text import verdict_rows

    (tmp_path / "verdicts.json").write_text(json.dumps([{
        "name": "released", "criterion": "expect", "measured": None, "limit": 0.0,
        "unit": "", "passed": False, "needs": "",
        "detail": "trip:belt_overspeed == 0: never checked (its trigger did not come)"}]))
    rows = verdict_rows(tmp_path, {})
    assert rows[1] == ("released", "FAIL; expect; not measured; trip:belt_overspeed == 0: "
                                   "never checked (its trigger did not come)")


def test_an_old_mqtt_folders_link_counters_read_under_todays_names(
        belt_run: Path, tmp_path: Path) -> None:
    """A run folder whose summary.json holds MQTT link health as recorded before the
    renames of docs/protocol.md section 5 ("Older run folders"): the reader gives today's
    names, so the report says the refusals and the drops as for a new folder."""
    import shutil

    from plantrig._report_text import link_rows
    from plantrig.sim.records._reader import current_link_names

    folder = tmp_path / "old"
    shutil.copytree(belt_run, folder)
    summary = json.loads((folder / "summary.json").read_text())
    summary["link_used"] = {"kind": "mqtt", "broker": "127.0.0.1:1883"}
    summary["link"] = {  # the names the MQTT link wrote before 2 December 2026, 18:22
        "sends": 1500.0, "receives": 1500.0, "commands_used": 1490.0, "superseded": 0.0,
        "dropped_to_worker": 0.0, "missed_ticks": 10.0, "late": 3.0, "link_lost": 0.0,
        "link_restored": 0.0, "frames_in": 1497.0, "commands_in": 1492.0, "bad_json": 1.0,
        "bad_channels": 2.0, "rejected_tick": 1.0, "dropped_out": 4.0,
        "dropped_offline": 6.0, "connects": 1.0, "watchdog_lost": 0.0}
    (folder / "summary.json").write_text(json.dumps(summary))
    health = read_run(folder).summary["link"]
    assert health["rejected_count"] == 2 and health["rejected_echo"] == 1
    assert not {"bad_channels", "rejected_tick", "sends", "receives", "watchdog_lost"} & set(health)
    assert health["dropped_out"] == 4 + 6        # today it counts the offline drops too
    rows = link_rows(read_run(folder).summary)
    assert ("refused, by reason", "malformed: json 1, not usable: count 2, not usable: echo 1"
            ) in rows
    assert any(key == "link" and "dropped out 10," in text for key, text in rows)
    # a record with today's names is read as written (serial's bad_channels: > 32 values)
    new = {"link": {"bad_channels": 1.0, "dropped_out": 2.0, "dropped_offline": 0.0}}
    assert current_link_names(new) == new


def test_a_run_changed_on_the_command_line_says_so_in_its_report(
        belt_report: dict, tmp_path: Path) -> None:
    # the limits table shows the value run; the report must also say it was not the file's
    out = tmp_path / "runs"
    assert main(["run", str(REHEARSALS / "conveyor_guarded.toml"), "--fast", "--out",
                 str(out), "--duration", "0.5", "--set", "limits[0].trip_high=1.2"]) == 0
    (folder,) = [p for p in out.iterdir() if (p / "summary.json").is_file()]
    assert main(["report", str(folder)]) == 0
    text = re.sub(r"<[^>]+>", " ", (folder / "derived" / "report.html").read_text())
    assert re.search(r"rig file changed for this run\s+limits\[0\]\.trip_high=1\.2; "
                     r"rig\.duration=0\.5 \(--set and options; rig\.toml holds the result\)",
                     text), text[:2000]
    assert "changed for this run" not in belt_report["html"]
