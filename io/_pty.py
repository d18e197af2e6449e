"""Pseudo-terminal pairs for the bench demo and the tests: two ends of a virtual cable.

os.openpty gives a master fd and a slave device path (/dev/pts/N). One side opens the
path like any serial port (pyserial); the other keeps the master fd, which has no path
of its own, so it is wrapped in FdPort. The slave starts in cooked mode with echo on:
bytes written to the master before anyone set it raw would come straight back as
garbage, so the pair is made raw at once (docs/platform.md: the pty and its failure modes).

How a hang-up shows on Linux (checked on both ends by tests/test_pty_hangup.py): a read
on the master fails with EIO once the slave side is closed and drained; a slave whose
master closed reads b"" and polls POLLHUP | POLLERR. An empty read alone proves nothing:
a port in raw mode with VMIN = 0 (as pyserial sets it) also reads b"" when it is merely
empty, and bytes may arrive just after, so readiness after an empty read is no sign of
a hang-up either.
"""

from __future__ import annotations

import contextlib
import errno
import os
import select
import tty
from dataclasses import dataclass


@dataclass
class PtyPair:
    """A raw pty pair. Close ``slave_fd`` once the far end has opened ``slave_path``, so
    that the far end closing is seen here (reads then fail with EIO)."""

    master_fd: int
    slave_fd: int
    slave_path: str

    def close_slave(self) -> None:
        if self.slave_fd >= 0:
            with contextlib.suppress(OSError):
                os.close(self.slave_fd)
            self.slave_fd = -1

    def close_master(self) -> None:
        """Close the master end: the far end then sees a hang-up."""
        if self.master_fd >= 0:
            with contextlib.suppress(OSError):
                os.close(self.master_fd)
            self.master_fd = -1


def open_pty_pair() -> PtyPair:
    """A new pty pair with the slave in raw mode (no echo, no line editing, 8-bit clean)."""
    master, slave = os.openpty()
    tty.setraw(slave)
    os.set_blocking(master, False)
    return PtyPair(master, slave, os.ttyname(slave))


class FdPort:
    """Non-blocking byte I/O on an open file descriptor (a pty master, or a port's fd).

    ``read_some`` returns b"" when nothing is waiting; ``write_some`` returns how many
    bytes the kernel took (0 when its buffer is full). Both raise OSError when the far
    end is gone: EIO from the kernel, or an empty read on an fd that polls POLLHUP or
    POLLERR (see the module doc).
    """

    READ_SIZE = 4096
    GONE = select.POLLHUP | select.POLLERR | select.POLLNVAL

    def __init__(self, fd: int, *, name: str = "", owns_fd: bool = True) -> None:
        os.set_blocking(fd, False)
        self.fd = fd
        self.name = name or f"fd {fd}"
        self._owns = owns_fd
        self._poll = select.poll()
        self._poll.register(fd, select.POLLIN)

    def read_some(self) -> bytes:
        try:
            data = os.read(self.fd, self.READ_SIZE)
        except BlockingIOError:
            return b""
        except OSError as exc:    # the kernel's EIO says the same as POLLHUP below
            if exc.errno == errno.EIO:
                raise OSError(errno.EIO, "the far end hung up") from None
            raise
        if not data and self.hung_up():
            raise OSError(errno.EIO, "the far end hung up")
        return data

    def hung_up(self) -> bool:
        """True if the kernel says the far end is gone (POLLHUP, POLLERR or POLLNVAL)."""
        ready = self._poll.poll(0)
        return bool(ready) and bool(ready[0][1] & self.GONE)

    def write_some(self, data: bytes | memoryview) -> int:
        try:
            return os.write(self.fd, data)
        except BlockingIOError:
            return 0
        except OSError as exc:    # a write can be the first to meet the hang-up
            if exc.errno == errno.EIO:
                raise OSError(errno.EIO, "the far end hung up") from None
            raise

    def wait_readable(self, timeout: float) -> None:
        """Wait until bytes (or an error) are waiting, or ``timeout`` s have passed."""
        select.select([self.fd], [], [], timeout)

    def discard_input(self) -> None:
        """Drop whatever is waiting (stale frames from before the run)."""
        with contextlib.suppress(OSError):
            while self.read_some():
                pass

    def close(self) -> None:
        if self.fd >= 0 and self._owns:
            with contextlib.suppress(OSError):
                os.close(self.fd)
        self.fd = -1
