"""Run records of a finished run: run.h5 bit for bit, the reader, manifest and signature,
export round trips, and the sign-off report rendered and looked at."""

from __future__ import annotations

import csv
import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import h5py
import matplotlib.image
import numpy as np
import pytest
import scipy.io
from rig_text import rig_text

from plantrig import __version__
from plantrig._report import write_report
from plantrig.cli import main
from plantrig.sim import load_rig, run_to_folder, simulate
from plantrig.sim.records._export import export_csv, export_mat, matlab_names
from plantrig.sim.records._manifest import verify_folder, write_manifest
from plantrig.sim.records._reader import RunRecord, read_run

REPO = Path(__file__).resolve().parents[1]
CONVEYOR = REPO / "configs" / "conveyor.toml"
TANK = REPO / "configs" / "tank.toml"


@pytest.fixture(scope="module")
def conveyor_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder, outcome, _ = run_to_folder(load_rig(CONVEYOR), tmp_path_factory.mktemp("runs"),
                                       realtime=False)
    assert outcome.ended == "completed"
    return folder


def copy_of(folder: Path, tmp_path: Path) -> Path:
    return Path(shutil.copytree(folder, tmp_path / folder.name))


def h5_rows(path: Path) -> tuple[list[str], np.ndarray]:
    """Tick columns read straight from run.h5 with h5py, by each dataset's index attr."""
    with h5py.File(path, "r") as f:
        columns = json.loads(f.attrs["columns"])
        rows = np.full((0, 0), np.nan)
        found: dict[int, np.ndarray] = {}
        f["ticks"].visititems(lambda _n, o: found.__setitem__(int(o.attrs["index"]), o[()])
                              if isinstance(o, h5py.Dataset) else None)
        rows = np.column_stack([found[i] for i in range(len(columns))])
    return columns, rows


def test_hdf5_holds_every_tick_bit_for_bit(tmp_path: Path) -> None:
    # the tank rig (20 s of it): an ODE plant whose model module travels with the record
    rig_path = tmp_path / "tank.toml"
    rig_path.write_text(TANK.read_text().replace("duration = 120.0", "duration = 20.0"))
    shutil.copyfile(TANK.parent / "tank_model.py", tmp_path / "tank_model.py")
    rig = load_rig(rig_path)
    folder, _, summary = run_to_folder(rig, tmp_path / "runs", realtime=False)
    memory = simulate(rig)       # the same rig, fast, into a MemoryTape
    columns, rows = h5_rows(folder / "run.h5")
    assert columns == memory.columns
    assert rows.dtype == np.float64 and rows.tobytes() == memory.rows.tobytes()
    with h5py.File(folder / "run.h5", "r") as f:
        level = f["ticks/outputs/level"]
        assert level.attrs["column"] == "y:level" and level.attrs["unit"] == "m"
        assert (level.attrs["min"], level.attrs["max"]) == (0.0, 1.5)
        assert f["ticks/link/cmd/heater"].attrs["unit"] == "W"
        assert f["ticks/states/temperature"].attrs["unit"] == "degC"
        assert set(f["ticks"]) >= {"time", "timing", "inputs", "outputs", "states", "link",
                                   "references"}
        events = f["events"][()]
        assert events.dtype.names == ("tick", "time", "kind", "detail", "source", "name",
                                      "window")
        assert events["kind"][-1].decode() == "run_end" and events["tick"][-1] == 2000
        assert f["sources/rig.toml"][()].decode() == rig_path.read_text()
        assert f["sources/tank_model.py"][()].decode() == (TANK.parent /
                                                           "tank_model.py").read_text()
        assert f.attrs["software_version"] == __version__
        assert json.loads(f.attrs["model"]) == summary["model"]
        assert json.loads(f.attrs["summary"])["ticks_recorded"] == 2000


def test_reader_works_from_h5_npy_or_journal(conveyor_run: Path, tmp_path: Path) -> None:
    memory = simulate(load_rig(CONVEYOR))
    from_h5 = read_run(conveyor_run)
    assert from_h5.source == "run.h5"
    assert from_h5.rows.tobytes() == memory.rows.tobytes()
    assert from_h5.unit("y:belt_speed") == "m/s" and from_h5.events[-1]["kind"] == "run_end"
    np.testing.assert_array_equal(from_h5["u:voltage"], memory["u:voltage"])
    with_npy, _, _ = run_to_folder(load_rig(CONVEYOR), tmp_path / "npy", realtime=False,
                                   npy=True)           # ticks.npy on request, beside run.h5
    no_h5 = copy_of(with_npy, tmp_path)
    (no_h5 / "run.h5").unlink()
    from_npy = read_run(no_h5)
    assert from_npy.source == "ticks.npy" and from_npy.rows.tobytes() == memory.rows.tobytes()
    (no_h5 / "ticks.npy").unlink()      # a crashed folder: only the journal, with a torn row
    with open(no_h5 / "ticks.journal", "wb") as f:
        f.write(memory.rows.tobytes() + b"\x01" * 13)
    from_journal = read_run(no_h5)
    assert from_journal.source == "ticks.journal"
    assert from_journal.rows.tobytes() == memory.rows.tobytes()


def test_manifest_catches_one_changed_byte_missing_and_extra(conveyor_run: Path,
                                                             tmp_path: Path,
                                                             capsys: pytest.CaptureFixture
                                                             ) -> None:
    folder = copy_of(conveyor_run, tmp_path)
    assert main(["verify", str(folder)]) == 0
    listed = json.loads((folder / "manifest.json").read_text())["files"]
    assert set(listed) >= {"run.h5", "events.jsonl", "summary.json", "rig.toml",
                           "run_start.json"}
    assert "ticks.npy" not in listed                  # one copy of the ticks: run.h5
    data = bytearray((folder / "run.h5").read_bytes())
    data[len(data) // 2] ^= 0x01                      # one bit of one byte
    (folder / "run.h5").write_bytes(bytes(data))
    capsys.readouterr()
    assert main(["verify", str(folder)]) == 1
    assert "changed: run.h5" in capsys.readouterr().out
    (folder / "events.jsonl").unlink()
    (folder / "notes.txt").write_text("added later")
    result = verify_folder(folder)
    assert (result.changed, result.missing, result.extra) == (
        ["run.h5"], ["events.jsonl"], ["notes.txt"])
    assert not result.ok


def test_signature_from_one_key_is_rejected_under_another(conveyor_run: Path, tmp_path: Path,
                                                          capsys: pytest.CaptureFixture
                                                          ) -> None:
    folder = copy_of(conveyor_run, tmp_path)
    alice, mallory = tmp_path / "alice", tmp_path / "mallory"
    assert main(["keygen", "--out", str(alice)]) == 0
    assert main(["keygen", "--out", str(mallory)]) == 0
    assert main(["keygen", "--out", str(alice)]) == 2          # never overwrites a key
    assert (Path(f"{alice}.private.pem").stat().st_mode & 0o777) == 0o600
    assert main(["sign", str(folder), "--key", f"{alice}.private.pem"]) == 0
    assert main(["verify", str(folder), "--public-key", f"{alice}.public.pem"]) == 0
    capsys.readouterr()
    assert main(["verify", str(folder), "--public-key", f"{mallory}.public.pem"]) == 1
    assert "signature: invalid" in capsys.readouterr().out
    # a manifest edited to match a changed file no longer matches its signature
    manifest = (folder / "manifest.json").read_text()
    (folder / "manifest.json").write_text(manifest.replace('"version": 2', '"version": 2 '))
    assert main(["verify", str(folder), "--public-key", f"{alice}.public.pem"]) == 1


def test_csv_and_mat_exports_read_back_equal(conveyor_run: Path, tmp_path: Path) -> None:
    folder = copy_of(conveyor_run, tmp_path)
    record = read_run(folder)
    assert main(["export", str(folder), "--csv", "--mat"]) == 0
    with open(folder / "derived" / "ticks.csv", newline="") as f:
        table = list(csv.reader(f))
    assert table[0] == record.columns and table[1] == record.units
    back = np.array([[float(v) for v in row] for row in table[2:]])
    assert back.tobytes() == record.rows.tobytes()        # 17 digits round-trip exactly
    with open(folder / "derived" / "events.csv", newline="") as f:
        events = list(csv.reader(f))
    assert events[0] == ["tick", "time", "kind", "detail", "source", "name", "window"]
    assert events[-1][2] == "run_end"
    # every field of every event, as the record holds it (empty where not set)
    fields = ("kind", "detail", "source", "name", "window")
    assert [row[2:] for row in events[2:]] == [[str(e.get(k, "")) for k in fields]
                                               for e in record.events]
    mat = scipy.io.loadmat(folder / "derived" / "run.mat")
    for k in fields:
        column = [str(v[0]) if v.size else "" for v in mat["events"][0, 0][k].ravel()]
        assert column == [str(e.get(k, "")) for e in record.events], k
    names = [str(n[0]) for n in mat["names"].ravel()]
    assert [str(c[0]) for c in mat["columns"].ravel()] == record.columns
    assert [str(u[0]) if u.size else "" for u in mat["units"].ravel()] == record.units
    for i, name in enumerate(names):
        assert re.fullmatch(r"[A-Za-z][A-Za-z0-9_]{0,62}", name), name
        assert mat[name].shape == (len(record.rows), 1)
        assert mat[name].ravel().tobytes() == record.rows[:, i].tobytes()
    assert main(["verify", str(folder)]) == 0             # exports are not in the record
    # read and written in three parts (the last one short), the exports are the same
    export_csv(folder, tmp_path / "parts", part_rows=1024)
    export_mat(folder, tmp_path / "parts", "parts", part_rows=1024)
    for name in ("ticks.csv", "events.csv"):
        assert (tmp_path / "parts" / name).read_bytes() == \
            (folder / "derived" / name).read_bytes()
    parts = scipy.io.loadmat(tmp_path / "parts" / "run.mat")
    assert all(parts[n].tobytes() == mat[n].tobytes() for n in names)


def test_matlab_names_are_valid_and_distinct() -> None:
    names = matlab_names(["y:belt speed", "y:belt-speed", "9lives", "end", "x:" + "a" * 80,
                          "x:" + "a" * 80, "columns"])
    assert names[:4] == ["y_belt_speed", "y_belt_speed_2", "v_9lives", "end_"]
    assert len(set(names)) == len(names) and all(len(n) <= 63 for n in names)
    assert "columns" not in names


def trace_pixels(page: np.ndarray, bands: int) -> list[int]:
    """Pixels of the blue trace ink (#1f3b57, antialiased: blue well above red) in each
    horizontal band of a rendered page; text, grid and frames are grey, bands red."""
    blue = page[..., 2] - page[..., 0] > 0.08
    return [int(b.sum()) for b in np.array_split(blue, bands, axis=0)]


def red_pixels(page: np.ndarray) -> int:
    """Pixels of the range bands and limit lines (#d9534f)."""
    return int((page[..., 0] - page[..., 2] > 0.2).sum())


def test_report_pdf_has_its_plots_and_html_is_self_contained(tmp_path: Path) -> None:
    # a short real-time run, so the lateness histogram has something to show
    rig_path = tmp_path / "conveyor.toml"
    rig_path.write_text(rig_text(CONVEYOR).replace("duration = 3.0", "duration = 1.0"))
    folder, _, _ = run_to_folder(load_rig(rig_path), tmp_path / "runs", realtime=True)
    # a verdict file from the safety checks (written before the manifest) shows as a table
    (folder / "verdicts.json").write_text(json.dumps(
        [{"name": "belt speed settles", "criterion": "settling_time", "measured": 0.41,
          "limit": 0.5, "unit": "s", "passed": True, "detail": ""},
         {"name": "no overspeed", "criterion": "max", "measured": 2.3, "limit": 2.0,
          "unit": "m/s", "passed": False, "detail": "at 0.61 s"}]))
    write_manifest(folder)
    assert main(["report", str(folder), "--operator", "R. Okafor", "--witness",
                 "L. Brandt"]) == 0
    page = (folder / "derived" / "report.html").read_text()
    assert "R. Okafor" in page and "L. Brandt" in page
    assert "belt speed settles" in page and "no acceptance criteria" not in page
    assert "1 of 2 criteria passed — NOT ACCEPTED" in page
    assert "FAIL; max; measured 2.3 m/s; limit 2 m/s; at 0.61 s" in page
    assert re.search(r"""src=['"](?!data:image/png;base64,)""", page) is None
    assert page.count("data:image/png;base64,") >= 4
    assert json.loads((folder / "manifest.json").read_text())["files"]["run.h5"][
        "sha256"] in page
    assert main(["verify", str(folder)]) == 0
    subprocess.run(["pdftoppm", "-r", "50", "-png", str(folder / "derived" / "report.pdf"),
                    str(tmp_path / "page")], check=True, timeout=60)
    pages = [matplotlib.image.imread(p)[..., :3]
             for p in sorted(tmp_path.glob("page-*.png"))]
    texts = subprocess.run(["pdftotext", "-layout", str(folder / "derived" / "report.pdf"),
                            "-"], check=True, capture_output=True, text=True,
                           timeout=60).stdout.split("\f")[:-1]
    assert len(texts) == len(pages)
    # 7 panels (2 outputs, 1 input, 3 states... 4 to a page): two signal pages, each
    # with plant-blue traces in the upper half; the text pages have no trace ink
    signal_pages = [p for p, text in zip(pages, texts, strict=True) if "Signals (" in text]
    assert len(signal_pages) == 2
    assert all(trace_pixels(p[int(0.08 * len(p)):], 2)[0] > 200 for p in signal_pages)
    assert max(trace_pixels(pages[0], 5)) < 50           # page 1 is text
    assert "Timing" in texts[-1] or "Tick lateness" in texts[-1]
    # timing in the console's human units (a 204 ms stall read "max 203720.5 us"), the
    # histogram's axis in ms once a stall stretches it past 5 ms
    from plantrig._console import human_duration
    timing_s = json.loads((folder / "summary.json").read_text())["timing"]
    flat = " ".join(" ".join(texts).split())
    assert "lateness p50 {}, p99 {}, max {}".format(*(human_duration(timing_s[
        f"lateness_{q}_s"]) for q in ("p50", "p99", "max"))) in flat
    unit = "ms" if timing_s["lateness_max_s"] * 1e6 > 5000 else "us"
    assert f"lateness per tick [{unit}]" in texts[-1]
    timing = pages[-1]      # lateness and work-time histograms in the upper 65 %
    upper, lower, rest = trace_pixels(timing[:int(0.65 * len(timing))], 2) + [
        sum(trace_pixels(timing[int(0.7 * len(timing)):int(0.97 * len(timing))], 1))]
    # bars of ink in both (a blank axes has none; one narrow bar gives a hundred or so)
    assert upper > 50 and lower > 50 and rest == 0
    matplotlib.image.imsave(tmp_path / "signals.png", signal_pages[0])


def test_cli_record_commands_refuse_clearly(tmp_path: Path) -> None:
    proc = subprocess.run([sys.executable, "-m", "plantrig", "verify", str(tmp_path / "nope")],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2 and "no such run folder" in proc.stderr
    assert "Traceback" not in proc.stderr
    assert main(["verify", str(tmp_path)]) == 1           # no manifest: not verified
    assert main(["recover", str(tmp_path)]) == 2          # not a run folder


def test_report_marks_fault_and_trip_windows(tmp_path: Path) -> None:
    # a record with the safety columns (fault:, trip:, limit:) as the dashboard reads them
    t = np.arange(1000) * 0.001
    fault = ((t >= 0.3) & (t < 0.5)).astype(float)
    trip = (t >= 0.7).astype(float)
    columns = ["seq", "t", "lateness", "exec_time", "fresh", "y:level", "fault:stuck_sensor",
               "trip:high_level", "limit:level_high"]
    rows = np.column_stack([np.arange(1000), t, np.zeros(1000), np.zeros(1000),
                            np.ones(1000), np.sin(t * 6), fault, trip, np.abs(np.sin(t * 6))])
    info = [{"name": c, "unit": "m" if c == "y:level" else "", "min": -0.5 if c == "y:level"
             else None, "max": 0.9 if c == "y:level" else None} for c in columns]
    record = RunRecord(tmp_path, columns, [i["unit"] for i in info], rows,
                       [{"tick": 300, "time": 0.3, "kind": "fault_on", "detail": "stuck"}],
                       {"rig": {"name": "demo"}}, info, "memory")
    write_report(record, tmp_path, operator="R. Okafor")
    subprocess.run(["pdftoppm", "-r", "50", "-png", str(tmp_path / "report.pdf"),
                    str(tmp_path / "page")], check=True, timeout=60)
    pages = [matplotlib.image.imread(p)[..., :3] for p in sorted(tmp_path.glob("page-*.png"))]
    texts = subprocess.run(["pdftotext", "-layout", str(tmp_path / "report.pdf"), "-"],
                           check=True, capture_output=True, text=True,
                           timeout=60).stdout.split("\f")[:-1]
    signal = next(p for p, text in zip(pages, texts, strict=True) if "Signals (" in text)
    axes = np.flatnonzero((signal < 0.3).all(axis=2).sum(axis=1) > 0.4 * signal.shape[1])
    panel = signal[axes[0] + 2:axes[1] - 1]          # inside the first panel's frame
    # the frame's left and right sides (the legend sits beside it): widths are shares
    # of the axes, 1 s of plant time plus matplotlib's 5 % margins each side
    sides = np.flatnonzero((panel < 0.3).all(axis=2).sum(axis=0) > 0.8 * len(panel))
    width = sides[-1] - sides[0]
    orange = (panel[..., 0] - panel[..., 2] > 0.1) & (panel[..., 1] - panel[..., 2] > 0.05)
    red = (panel[..., 0] - panel[..., 1] > 0.25) & (panel[..., 0] - panel[..., 2] > 0.25)
    # the fault window spans 0.2 s of the 1 s axis, about a fifth of the panel's width
    # (the widest run of orange pixel columns, bridging the grid lines across it; the
    # legend's swatch is a short run)
    cols = np.convolve(orange.any(axis=0), np.ones(5), "same") > 0
    edges = np.flatnonzero(np.diff(np.concatenate([[0], cols.astype(int), [0]])))
    widest = max(b - a for a, b in zip(edges[::2], edges[1::2], strict=True))
    assert abs(widest / width - 0.2 / 1.1) < 0.03
    # the interlock latched from 0.7 s to the end: a red bar along the panel's top,
    # about 30 % of its width
    top = red[:max(3, len(red) // 25)].any(axis=0)
    assert abs(top.sum() / width - 0.3 / 1.1) < 0.04
    page = (tmp_path / "report.html").read_text()
    assert "no rig.toml in the folder" in page and "no acceptance criteria in this run" in page


def test_a_long_run_opens_a_part_at_a_time(conveyor_run: Path, tmp_path: Path) -> None:
    whole = read_run(conveyor_run)
    part = read_run(conveyor_run, columns=["t", "y:belt_speed"], ticks=(1000, 1500))
    assert part.columns == ["t", "y:belt_speed"] and part.rows.shape == (500, 2)
    assert part.rows.tobytes() == whole.rows[1000:1500][:, [
        whole.columns.index("t"), whole.columns.index("y:belt_speed")]].tobytes()
    assert part.unit("y:belt_speed") == "m/s"
    journal_only = copy_of(conveyor_run, tmp_path)      # the same from a bare journal
    (journal_only / "run.h5").unlink()
    (journal_only / "ticks.journal").write_bytes(whole.rows.tobytes())
    same = read_run(journal_only, columns=["t", "y:belt_speed"], ticks=(1000, 1500))
    assert same.source == "ticks.journal" and same.rows.tobytes() == part.rows.tobytes()
    with pytest.raises(KeyError, match="no column 'y:nothing'"):
        read_run(conveyor_run, columns=["y:nothing"])


def test_run_h5_is_chunked_and_compressed(conveyor_run: Path) -> None:
    with h5py.File(conveyor_run / "run.h5", "r") as f:
        ds = f["ticks/outputs/belt_speed"]
        assert ds.compression == "gzip" and ds.shuffle and ds.chunks is not None
        assert ds.maxshape == (None,)
