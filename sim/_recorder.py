"""The recorder: a separate process that drains the tape into an append-only journal.

The journal is raw float64 rows (one tick record each), appended as they come and
fdatasync'ed at least every 100 ms, so a crash of the rig loses at most the rows of the
last interval (a SIGKILL keeps the page cache; the sync is for power loss). A torn last
row is dropped when the journal is read back (FIELD-NOTES.md: raw append survived every
SIGKILL trial).
"""

from __future__ import annotations

import json
import multiprocessing as mp
import os
import time
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from plantrig.sim._tape import EventTape, TapeReader

SYNC_INTERVAL_S = 0.1
IDLE_SLEEP_S = 0.002


def drain_tape(tape_path: str, journal_path: str, status_path: str, event_tape_path: str,
               events_path: str) -> None:
    """Copy every tape row into the journal and every event into events.jsonl, until
    both tapes have ended and are empty."""
    reader = TapeReader(Path(tape_path), acknowledge=True)
    event_tape = EventTape(Path(event_tape_path), create=False)
    max_backlog = 0
    with open(journal_path, "ab", buffering=0) as journal, \
            open(events_path, "a", encoding="utf-8") as events:
        last_sync = time.monotonic()
        while True:
            backlog = reader.written - reader.next_seq
            max_backlog = max(max_backlog, backlog)
            rows = reader.read_new()
            if rows.size:
                journal.write(rows.tobytes())
            new_events = event_tape.read_new()
            for tick, t, kind, detail in new_events:
                events.write(json.dumps({"tick": tick, "time": t, "kind": kind,
                                         "detail": detail}) + "\n")
            now = time.monotonic()
            if now - last_sync >= SYNC_INTERVAL_S:
                events.flush()
                os.fdatasync(journal.fileno())
                os.fdatasync(events.fileno())
                last_sync = now
            if not rows.size and not new_events:
                if (reader.ended and reader.next_seq >= reader.written
                        and event_tape.ended):
                    break
                time.sleep(IDLE_SLEEP_S)
        events.flush()
        os.fdatasync(journal.fileno())
        os.fdatasync(events.fileno())
    event_tape.close()
    Path(status_path).write_text(json.dumps({
        "rows": reader.next_seq, "lost": reader.lost, "max_backlog_rows": max_backlog}))
    reader.close()


def start_recorder(tape_path: Path, journal_path: Path, status_path: Path,
                   event_tape_path: Path, events_path: Path) -> mp.Process:
    """Start the recorder in its own process (spawned: no state shared by accident)."""
    ctx = mp.get_context("spawn")
    proc = ctx.Process(target=drain_tape, name="plantrig-recorder",
                       args=(str(tape_path), str(journal_path), str(status_path),
                             str(event_tape_path), str(events_path)), daemon=True)
    proc.start()
    return proc


def read_journal(path: Path, n_columns: int) -> NDArray[np.float64]:
    """All complete rows of a journal; a torn last row is dropped."""
    raw = np.fromfile(path, dtype=np.float64)
    whole = raw.size // n_columns * n_columns
    return raw[:whole].reshape(-1, n_columns)
