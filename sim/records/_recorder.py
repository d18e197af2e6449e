"""The recorder: a separate process that drains the tape into an append-only journal.

The journal is raw float64 rows (one tick record each), appended as they come and
fdatasync'ed at least every 100 ms, so a crash of the rig loses at most the rows of the
last interval (a SIGKILL keeps the page cache; the sync is for power loss). A torn last
row is dropped when the journal is read back (docs/platform.md: raw append survived every
SIGKILL trial).

A killed rig leaves the recorder orphaned: it notices (its parent pid changes), drains
what the tapes still hold and exits, so the journal keeps every row the rig produced.
A full disk is reported to the loop through the tape header (RECORDER_DISK_FULL); the
loop stops safely and the rows written so far are kept.
"""

from __future__ import annotations

import contextlib
import errno
import json
import multiprocessing as mp
import os
import signal
import time
from multiprocessing.process import BaseProcess
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np
from numpy.typing import NDArray

from plantrig.sim.records._tape import (
    RECORDER_DISK_FULL,
    RECORDER_OK,
    RECORDER_WRITE_ERROR,
    EventTape,
    TapeReader,
)

SYNC_INTERVAL_S = 0.1
IDLE_SLEEP_S = 0.002
READY_TIMEOUT_S = 60.0
RESERVE_NAME = ".reserve"


class _Disk:
    """Writes that notice a full disk: the first failure frees the run folder's reserve
    (so events, summary and manifest still fit) and tells the loop through the tape."""

    def __init__(self, reader: TapeReader, reserve: Path) -> None:
        self.reader, self.reserve = reader, reserve
        self.error = RECORDER_OK

    def fail(self, exc: OSError) -> None:
        if self.error == RECORDER_OK:
            self.error = RECORDER_DISK_FULL if exc.errno in (errno.ENOSPC, errno.EDQUOT) \
                else RECORDER_WRITE_ERROR
            self.reader.report_error(self.error)
        self.reserve.unlink(missing_ok=True)

    def write(self, f: BinaryIO, data: bytes) -> bool:
        """Write all of ``data``; after a failure retry once (the reserve is free now)."""
        view = memoryview(data)
        for _attempt in range(2):
            try:
                while view:
                    view = view[f.write(view) or 0:]
                return True
            except OSError as exc:
                self.fail(exc)
        return False


def drain_tape(tape_path: str, journal_path: str, status_path: str, event_tape_path: str,
               events_path: str, parent_pid: int | None = None, ready: Any = None) -> None:
    """Copy every tape row into the journal and every event into events.jsonl, until
    both tapes have ended and are empty, or the rig process has died and nothing is left.

    When the journal cannot be written (disk full) the recorder keeps only whole rows,
    tells the loop through the tape header, and goes on consuming rows without writing
    them so the loop never blocks; events are still written, into the freed reserve.
    """
    reader = TapeReader(Path(tape_path), acknowledge=True)
    event_tape = EventTape(Path(event_tape_path), create=False)
    disk = _Disk(reader, Path(journal_path).with_name(RESERVE_NAME))
    row_bytes = reader.n_columns * 8
    parent = parent_pid or os.getppid()
    max_backlog = journal_bytes = not_written = 0
    orphaned = False
    with open(journal_path, "ab", buffering=0) as journal, \
            open(events_path, "ab", buffering=0) as events:
        last_sync = time.monotonic()
        if ready is not None:
            ready.set()
        while True:
            orphaned = orphaned or os.getppid() != parent
            # read "ended" before the rows and events: a writer that appends its last
            # event and then ends between our read and our check would lose that event
            finished = reader.ended and event_tape.ended
            rows = reader.read_new()
            # how far behind this read was: the rows it took and any written since (a
            # count taken before the read would miss a recorder stopped between the two)
            max_backlog = max(max_backlog, len(rows) + reader.written - reader.next_seq)
            if rows.size and disk.error == RECORDER_OK:
                if disk.write(journal, rows.tobytes()):
                    journal_bytes += rows.size * 8
                else:  # keep whole rows only; the rest of this block is not recorded
                    with contextlib.suppress(OSError):
                        journal_bytes = os.fstat(journal.fileno()).st_size
                        journal_bytes -= journal_bytes % row_bytes
                        os.ftruncate(journal.fileno(), journal_bytes)
            if disk.error != RECORDER_OK:
                not_written = reader.next_seq - journal_bytes // row_bytes
            reader.release()     # in the journal (or knowingly dropped): slots are free
            new_events = event_tape.read_new()
            for event in new_events:
                disk.write(events, (json.dumps(event) + "\n").encode())
            now = time.monotonic()
            if now - last_sync >= SYNC_INTERVAL_S:
                _sync(disk, journal, events)
                last_sync = now
            if not rows.size and not new_events:
                if orphaned or (finished and reader.next_seq >= reader.written):
                    break
                time.sleep(IDLE_SLEEP_S)
        _sync(disk, journal, events)
    event_tape.close()
    status = {"rows": reader.next_seq, "lost": reader.lost, "max_backlog_rows": max_backlog,
              "rows_not_written": not_written, "orphaned": orphaned,
              "disk_error": {RECORDER_OK: None, RECORDER_DISK_FULL: "disk full"}.get(
                  disk.error, "write error")}
    with contextlib.suppress(OSError):
        Path(status_path).write_text(json.dumps(status))
    reader.close()


def _recorder_main(*args: Any) -> None:
    """The recorder process: deaf to SIGINT and SIGTERM, which are the rig's to act on
    (a Ctrl-C reaches the whole process group); it ends when the tapes end or the rig
    process is gone, so a signal never costs a recorded row."""
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, signal.SIG_IGN)
    drain_tape(*args)


def _sync(disk: _Disk, *files: BinaryIO) -> None:
    for f in files:
        try:
            os.fdatasync(f.fileno())
        except OSError as exc:
            disk.fail(exc)


def start_recorder(tape_path: Path, journal_path: Path, status_path: Path,
                   event_tape_path: Path, events_path: Path) -> BaseProcess:
    """Start the recorder in its own process (spawned: no state shared by accident) and
    wait until it is draining: a spawned interpreter takes about a second to import,
    and a real-time loop must not fill the ring meanwhile."""
    ctx = mp.get_context("spawn")
    ready = ctx.Event()
    proc = ctx.Process(target=_recorder_main, name="plantrig-recorder",
                       args=(str(tape_path), str(journal_path), str(status_path),
                             str(event_tape_path), str(events_path), os.getpid(), ready),
                       daemon=True)
    proc.start()
    deadline = time.monotonic() + READY_TIMEOUT_S
    while not ready.wait(0.05):
        if not proc.is_alive() or time.monotonic() > deadline:
            proc.kill()
            raise RuntimeError(f"the recorder did not start (exit code {proc.exitcode})")
    return proc


def read_journal(path: Path, n_columns: int) -> NDArray[np.float64]:
    """All complete rows of a journal; a torn last row is dropped."""
    raw = np.fromfile(path, dtype=np.float64)
    whole = raw.size // n_columns * n_columns
    return raw[:whole].reshape(-1, n_columns)
