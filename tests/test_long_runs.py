"""Runs of any length: a fast run's processes keep their peak memory whatever the run's
length (measured at two lengths, five times apart), and its disk use grows by a fixed
amount a tick. Before the records were streamed, memory grew by about 140 bytes a tick:
800k more ticks would have added some 110 MB, far beyond the margin allowed here."""

from __future__ import annotations

import importlib.util
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

BENCH = Path(__file__).resolve().parents[1] / "bench" / "bench_long_run.py"
MARGIN_MB = 15.0


def _bench():  # type: ignore[no-untyped-def]
    spec = importlib.util.spec_from_file_location("bench_long_run", BENCH)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_peak_memory_does_not_grow_with_the_run(tmp_path: Path) -> None:
    one_run = _bench().one_run
    (tmp_path / "short").mkdir()
    (tmp_path / "long").mkdir()
    # the two runs at once: each measures its own processes' peaks (getrusage)
    with ThreadPoolExecutor(max_workers=2) as pool:
        runs = pool.map(one_run, (200_000, 1_000_000), (tmp_path / "short", tmp_path / "long"))
        short, long = runs
    assert (short["ticks"], long["ticks"]) == (200_000, 1_000_000)
    print(f"\nshort {short}\nlong  {long}")
    assert long["rig_mb"] <= short["rig_mb"] + MARGIN_MB
    assert long["recorder_mb"] <= short["recorder_mb"] + MARGIN_MB
    # one copy of the ticks, compressed: the long run costs no more disk a tick
    assert long["bytes_per_tick"] <= short["bytes_per_tick"]
