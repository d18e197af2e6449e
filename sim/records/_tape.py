"""The tape: a ring of fixed-size tick records in a shared-memory file.

Layout of the file (an np.memmap under /dev/shm, see docs/platform.md for why not
multiprocessing.shared_memory): a header of eight int64 words, then ``capacity`` rows of
``n_columns`` float64. Column 0 of every row is its sequence number. The writer marks a
row invalid (-1) while it fills it, writes the data, then the sequence number, then
advances the ``written`` counter; a reader checks the sequence number before and after
copying, so a row overwritten during the copy is detected, never read torn.

Header words: magic, version, n_columns, capacity, written, consumed (the slowest
reader's acknowledged count, so a fast-mode writer can wait instead of overwriting),
state (0 running, 1 ended), recorder (0 writing, else a RECORDER_* code: the recorder
cannot write the record, and the loop stops safely). The writer also watches the
recorder process itself (``watch_recorder``): a recorder that died reads as RECORDER_DIED.
"""

from __future__ import annotations

import json
import os
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

MAGIC = 0x5450_4152_5450  # "PTRAPT", a plantrig tape
VERSION = 1
HEADER_WORDS = 8
W_MAGIC, W_VERSION, W_COLUMNS, W_CAPACITY, W_WRITTEN, W_CONSUMED, W_STATE, W_RECORDER = range(8)
STATE_RUNNING, STATE_ENDED = 0, 1
RECORDER_OK, RECORDER_DISK_FULL, RECORDER_WRITE_ERROR, RECORDER_DIED = 0, 1, 2, 3
ALIVE_CHECK_S = 0.02


def tape_dir() -> Path:
    """/dev/shm where it exists (RAM-backed), else the temporary folder."""
    shm = Path("/dev/shm")
    return shm if shm.is_dir() and os.access(shm, os.W_OK) else Path(tempfile.gettempdir())


class TapeOverflow(RuntimeError):
    """The writer would overwrite rows no reader has consumed."""


class Tape:
    """Writer side of the ring, owned by the tick loop."""

    recorded_elsewhere = True    # by the recorder process, which can die or fail

    def __init__(self, path: Path, columns: list[str], capacity: int,
                 units: list[str] | None = None) -> None:
        self.path = Path(path)
        self.columns = list(columns)
        self.capacity = int(capacity)
        n = len(columns)
        size = (HEADER_WORDS + self.capacity * n) * 8
        with open(self.path, "wb") as f:
            f.truncate(size)
        self._map = np.memmap(self.path, dtype=np.float64, mode="r+", shape=(size // 8,))
        # plain ndarray views: every index of a memmap runs its Python-level finalizer,
        # which cost the fast loop a few microseconds a tick (more than the rest of it)
        self.header = np.asarray(self._map[:HEADER_WORDS]).view(np.int64)
        self.rows = np.asarray(self._map[HEADER_WORDS:]).reshape(self.capacity, n)
        self.rows[:, 0] = -1.0
        self.header[:] = [MAGIC, VERSION, n, self.capacity, 0, 0, STATE_RUNNING, 0]
        meta = {"columns": self.columns, "units": units or [""] * n}
        self.meta_path = self.path.with_suffix(".json")
        self.meta_path.write_text(json.dumps(meta))
        self.written = 0
        self._recorder_alive: Callable[[], bool] | None = None
        self._next_alive_check = 0.0
        self._recorder_gone = False

    def watch_recorder(self, alive: Callable[[], bool]) -> None:
        """Let ``recorder_error`` also report a recorder process that has died."""
        self._recorder_alive = alive

    def free(self) -> int:
        """Rows that can be written before unread rows would be overwritten."""
        return self.capacity - (self.written - int(self.header[W_CONSUMED]))

    def append(self, row: NDArray[np.float64]) -> None:
        """Copy one tick record into the ring (row[0] is ignored; the tape numbers rows)."""
        slot = self.rows[self.written % self.capacity]
        slot[0] = -1.0
        slot[1:] = row[1:]
        slot[0] = self.written
        self.written += 1
        self.header[W_WRITTEN] = self.written

    def append_rows(self, block: NDArray[np.float64]) -> None:
        """``append`` for each row of ``block`` in turn, at a block's cost (column 0 is
        ignored): each slot is marked invalid, filled, then numbered, as one row is."""
        first, count = self.written, len(block)
        done = 0
        while done < count:             # in at most two pieces: the ring wraps
            at = (first + done) % self.capacity
            piece = min(count - done, self.capacity - at)
            slots = self.rows[at:at + piece]
            slots[:, 0] = -1.0
            slots[:, 1:] = block[done:done + piece, 1:]
            slots[:, 0] = np.arange(first + done, first + done + piece)
            done += piece
        self.written = first + count
        self.header[W_WRITTEN] = self.written

    def recorder_error(self) -> int:
        """RECORDER_OK, the code the recorder set when it could not write, or
        RECORDER_DIED when the watched recorder process is gone (asked of the process at
        most every ALIVE_CHECK_S of wall time: a fast run polls every few ticks, and a
        waitpid each time cost it a fifth of its speed)."""
        code = int(self.header[W_RECORDER])
        if code == RECORDER_OK and self._recorder_alive is not None:
            now = time.monotonic()
            if now >= self._next_alive_check:
                self._next_alive_check = now + ALIVE_CHECK_S
                if not self._recorder_alive():
                    self._recorder_gone = True
            if self._recorder_gone:
                return RECORDER_DIED
        return code

    def wait_for_room(self, timeout_s: float = 30.0) -> None:
        """Fast mode only: block until a reader has freed a row (never in real time);
        return at once, without room, when the recorder has stopped."""
        deadline = time.monotonic() + timeout_s
        while self.free() <= 0:
            if self.recorder_error() != RECORDER_OK:
                return
            if time.monotonic() > deadline:
                raise TapeOverflow(f"{self.path}: no reader consumed rows for {timeout_s} s")
            time.sleep(0.0005)

    def wait_drained(self, timeout_s: float = 30.0) -> int:
        """Wait until the recorder has taken every row (or stopped); its error code.

        The loop calls this before it declares how the run ended, so that a record
        the recorder could not write is never announced as complete.
        """
        deadline = time.monotonic() + timeout_s
        while int(self.header[W_CONSUMED]) < self.written:
            if self.recorder_error() != RECORDER_OK or time.monotonic() > deadline:
                break
            time.sleep(0.001)
        return self.recorder_error()

    def end(self) -> None:
        self.header[W_STATE] = STATE_ENDED
        self._map.flush()

    def close(self, unlink: bool = True) -> None:
        del self.rows, self.header
        self._map._mmap.close()  # type: ignore[attr-defined]
        if unlink:
            for p in (self.path, self.meta_path):
                p.unlink(missing_ok=True)


class MemoryTape:
    """An in-process tape holding every row of a run, for the Python API and tests."""

    recorded_elsewhere = False

    def __init__(self, columns: list[str], capacity: int) -> None:
        self.columns = list(columns)
        self.rows = np.zeros((capacity, len(columns)))
        self.written = 0

    def free(self) -> int:
        return len(self.rows) - self.written

    def append(self, row: NDArray[np.float64]) -> None:
        n = self.written
        if n >= len(self.rows):
            raise TapeOverflow("memory tape full: the run is longer than planned")
        rows = self.rows
        rows[n] = row          # no reader in another process: no torn-row guard needed
        rows[n, 0] = n
        self.written = n + 1

    def append_rows(self, block: NDArray[np.float64]) -> None:
        """``append`` for each row of ``block`` in turn, at a block's cost."""
        n, count = self.written, len(block)
        if n + count > len(self.rows):
            raise TapeOverflow("memory tape full: the run is longer than planned")
        self.rows[n:n + count] = block
        self.rows[n:n + count, 0] = np.arange(n, n + count)
        self.written = n + count

    def recorder_error(self) -> int:
        return RECORDER_OK

    def wait_for_room(self, timeout_s: float = 30.0) -> None:
        if self.free() <= 0:
            raise TapeOverflow("memory tape full: the run is longer than planned")

    def wait_drained(self, timeout_s: float = 30.0) -> int:
        return RECORDER_OK

    def end(self) -> None:
        self.rows = self.rows[:self.written]


class TapeReader:
    """Reader side: copies new rows out in order and notices any it missed."""

    def __init__(self, path: Path, acknowledge: bool = False) -> None:
        self.path = Path(path)
        self._map = np.memmap(self.path, dtype=np.float64, mode="r+" if acknowledge else "r")
        self.header = np.asarray(self._map[:HEADER_WORDS]).view(np.int64)   # as in Tape
        if int(self.header[W_MAGIC]) != MAGIC:
            raise ValueError(f"{self.path}: not a plantrig tape")
        n, cap = int(self.header[W_COLUMNS]), int(self.header[W_CAPACITY])
        self.rows = np.asarray(self._map[HEADER_WORDS:HEADER_WORDS + n * cap]).reshape(cap, n)
        self.capacity, self.n_columns = cap, n
        meta = json.loads(self.path.with_suffix(".json").read_text())
        self.columns: list[str] = meta["columns"]
        self.units: list[str] = meta["units"]
        self.acknowledge = acknowledge
        self.next_seq = 0
        self.lost = 0

    @property
    def ended(self) -> bool:
        return int(self.header[W_STATE]) == STATE_ENDED

    @property
    def written(self) -> int:
        return int(self.header[W_WRITTEN])

    def report_error(self, code: int) -> None:
        """Tell the writer the record cannot be written (an acknowledging reader only)."""
        self.header[W_RECORDER] = code

    def read_new(self, max_rows: int = 4096) -> NDArray[np.float64]:
        """Rows written since the last call, oldest first (at most ``max_rows``)."""
        written = self.written
        if written - self.next_seq > self.capacity:
            skipped = written - self.capacity - self.next_seq
            self.lost += skipped
            self.next_seq = written - self.capacity
        count = min(written - self.next_seq, max_rows)
        if count <= 0:
            return np.empty((0, self.n_columns))
        start = self.next_seq % self.capacity
        first = min(count, self.capacity - start)
        block = np.concatenate([self.rows[start:start + first], self.rows[:count - first]])
        expected = np.arange(self.next_seq, self.next_seq + count, dtype=np.float64)
        good = block[:, 0] == expected
        if not good.all():
            # overwritten while we copied: keep the valid prefix, count the rest as lost
            stop = int(np.argmin(good))
            block = block[:stop]
            self.lost += count - stop
        self.next_seq += count
        return block

    def release(self) -> None:
        """Let the writer reuse the slots of every row read so far (an acknowledging
        reader only). Called once those rows are in the journal, not when copied out:
        a reader killed between copy and write must leave them in the ring to salvage."""
        if self.acknowledge:
            self.header[W_CONSUMED] = self.next_seq

    def latest(self) -> NDArray[np.float64] | None:
        """The newest complete row, for displays that only need the present."""
        written = self.written
        if written == 0:
            return None
        row = self.rows[(written - 1) % self.capacity].copy()
        return row if row[0] == written - 1 else None

    def close(self) -> None:
        del self.rows, self.header
        self._map._mmap.close()  # type: ignore[attr-defined]


EVENT_VERSION = 4
EVENT_HEADER_WORDS = HEADER_WORDS + 2
W_HEAP_SIZE, W_HEAP_WRITTEN = HEADER_WORDS, HEADER_WORDS + 1
EVENT_DTYPE = np.dtype([("seq", np.int64), ("tick", np.int64), ("time", np.float64),
                        ("kind", "S32"), ("source", "S16"), ("window", "S16"),
                        ("at", np.int64), ("size", np.int64), ("name_size", np.int64)])
HEAP_BYTES = 1 << 20


def _cut(data: bytes, limit: int) -> bytes:
    """The first ``limit`` bytes of ``data`` (whole UTF-8 characters), and a marker."""
    head = data[:limit].decode("utf-8", "ignore").encode()
    return head + (f" [... cut: {len(data)} bytes in all, the event record keeps the "
                   f"first {len(head)}]").encode()


class EventTape:
    """A ring of event records beside the tick tape, each detail kept whole.

    Layout: the tick tape's eight header words (written counts rows), two more words
    (heap size, heap bytes written so far), ``capacity`` fixed-size rows (seq, tick,
    time, kind, source, window, at, size, name_size), then the heap: a byte ring of
    ``heap_bytes`` that holds each event's name and then its detail as UTF-8 from byte
    position ``at`` (modulo its size; ``size`` bytes in all, the first ``name_size`` of
    them the name). A fixed-size field would cut long details (a model error's
    traceback) and long names (an operator's phase label); the heap keeps name and
    detail together up to a quarter of its size, and a longer one is cut with a marker
    that says so. The writer claims heap bytes (advances the heap count) before it
    overwrites them, so a reader that finds the count more than a heap ahead of an
    event's bytes after copying them knows the copy is torn and says so in place of the
    detail. Readers (recorder, dashboard) see trips, bad frames and operator actions
    while the run goes on; a crash keeps what the recorder has drained.
    """

    def __init__(self, path: Path, capacity: int = 4096, create: bool = True,
                 heap_bytes: int = HEAP_BYTES) -> None:
        self.path = Path(path)
        rows_at = EVENT_HEADER_WORDS * 8
        if create:
            size = rows_at + capacity * EVENT_DTYPE.itemsize + heap_bytes
            with open(self.path, "wb") as f:
                f.truncate(size)
        self._header_map = np.memmap(self.path, dtype=np.int64, mode="r+",
                                     shape=(EVENT_HEADER_WORDS,))
        self.header = np.asarray(self._header_map)   # plain views, as in Tape
        if create:
            self.header[:] = [MAGIC, EVENT_VERSION, 0, capacity, 0, 0, STATE_RUNNING, 0,
                              heap_bytes, 0]
        elif int(self.header[W_MAGIC]) != MAGIC or int(self.header[W_VERSION]) != EVENT_VERSION:
            self._header_map._mmap.close()  # type: ignore[attr-defined]
            raise ValueError(f"{self.path}: not a plantrig event tape of version "
                             f"{EVENT_VERSION}")
        self.capacity = int(self.header[W_CAPACITY])
        self.heap_bytes = int(self.header[W_HEAP_SIZE])
        self.max_detail = self.heap_bytes // 4
        self._rows_map = np.memmap(self.path, dtype=EVENT_DTYPE, mode="r+", offset=rows_at,
                                   shape=(self.capacity,))
        self._heap_map = np.memmap(self.path, dtype=np.uint8, mode="r+",
                                   offset=rows_at + self.capacity * EVENT_DTYPE.itemsize,
                                   shape=(self.heap_bytes,))
        self.rows = np.asarray(self._rows_map)
        self.heap = np.asarray(self._heap_map)
        if create:
            self.rows["seq"] = -1
        self.next_seq = 0

    def append(self, tick: int, time_s: float, kind: str, detail: str,
               source: str = "", name: str = "", window: str = "") -> None:
        """One event; ``source``, ``name`` and ``window`` are Event's fields of those
        names (sim/engine/_contracts.py), recorded so readers never parse ``detail``."""
        label = name.encode("utf-8", "replace")
        if len(label) > self.max_detail // 2:
            label = _cut(label, self.max_detail // 2 - 120)  # room for the marker
        data = detail.encode("utf-8", "replace")
        if len(label) + len(data) > self.max_detail:
            data = _cut(data, self.max_detail - len(label) - 120)
        data = label + data
        n = int(self.header[W_WRITTEN])
        at = int(self.header[W_HEAP_WRITTEN])
        slot = self.rows[n % self.capacity]
        slot["seq"] = -1
        self.header[W_HEAP_WRITTEN] = at + len(data)   # claim the bytes, then write them
        start = at % self.heap_bytes
        first = min(len(data), self.heap_bytes - start)
        buf = np.frombuffer(data, dtype=np.uint8)
        self.heap[start:start + first] = buf[:first]
        self.heap[:len(data) - first] = buf[first:]
        slot["tick"] = tick
        slot["time"] = time_s
        slot["kind"] = kind.encode("utf-8", "replace")[:32]
        slot["source"] = source.encode("utf-8", "replace")[:16]
        slot["window"] = window.encode("utf-8", "replace")[:16]
        slot["at"] = at
        slot["size"] = len(data)
        slot["name_size"] = len(label)
        slot["seq"] = n
        self.header[W_WRITTEN] = n + 1

    def _texts(self, at: int, size: int, name_size: int) -> tuple[str, str]:
        """(name, detail) from the heap; a torn copy gives a marker as the detail."""
        start = at % self.heap_bytes
        first = min(size, self.heap_bytes - start)
        data = self.heap[start:start + first].tobytes() + self.heap[:size - first].tobytes()
        if int(self.header[W_HEAP_WRITTEN]) - at > self.heap_bytes:
            return "", (f"[detail of {size - name_size} bytes overwritten before it was "
                        "read: the event heap is full of newer details]")
        return (data[:name_size].decode("utf-8", "replace"),
                data[name_size:].decode("utf-8", "replace"))

    def read_new(self) -> list[dict[str, Any]]:
        """Events since the last call, as events.jsonl holds them: tick, time, kind,
        detail, and source, name and window when set."""
        written = int(self.header[W_WRITTEN])
        self.next_seq = max(self.next_seq, written - self.capacity)
        out = []
        while self.next_seq < written:
            slot = self.rows[self.next_seq % self.capacity].copy()
            if int(slot["seq"]) == self.next_seq:
                name, detail = self._texts(int(slot["at"]), int(slot["size"]),
                                           int(slot["name_size"]))
                event: dict[str, Any] = {"tick": int(slot["tick"]), "time": float(slot["time"]),
                                         "kind": slot["kind"].decode("utf-8", "replace"),
                                         "detail": detail}
                for key, value in (("source", slot["source"].decode("utf-8", "replace")),
                                   ("name", name),
                                   ("window", slot["window"].decode("utf-8", "replace"))):
                    if value:
                        event[key] = value
                out.append(event)
            self.next_seq += 1
        return out

    def end(self) -> None:
        self.header[W_STATE] = STATE_ENDED

    @property
    def ended(self) -> bool:
        return int(self.header[W_STATE]) == STATE_ENDED

    def close(self, unlink: bool = False) -> None:
        del self.rows, self.heap, self.header
        maps: tuple[Any, ...] = (self._rows_map, self._heap_map, self._header_map)
        for m in maps:
            m._mmap.close()
        if unlink:
            self.path.unlink(missing_ok=True)
