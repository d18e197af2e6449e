"""A software null-modem for the link tests, run as its own process.

It holds the master ends of two pty pairs (fds inherited, argv[1] and argv[2]) and
copies every byte from one to the other, both ways, as a USB serial adapter and its
cable would: the rig opens the slave of pair A, the controller the slave of pair B.
When either side hangs up (EIO on its master) the relay ends and closes both masters,
so the other side sees a hang-up too. On SIGTERM it ends the same way. It prints
"relay: ready" at start and "relay: <bytes a->b> <bytes b->a> <why>" at the end.
"""

from __future__ import annotations

import os
import select
import signal
import sys


def main() -> int:
    a, b = int(sys.argv[1]), int(sys.argv[2])
    for fd in (a, b):
        os.set_blocking(fd, False)
    stopping: list[int] = []
    signal.signal(signal.SIGTERM, lambda *_: stopping.append(1))
    moved = {a: 0, b: 0}
    pending = {a: b"", b: b""}           # bytes read from the key, not yet written on
    other = {a: b, b: a}
    print("relay: ready", flush=True)
    why = "stopped"
    while not stopping:
        want_write = [other[fd] for fd in (a, b) if pending[fd]]
        try:
            readable, writable, _ = select.select([a, b], want_write, [], 0.2)
        except InterruptedError:
            continue
        try:
            for src in readable:
                if len(pending[src]) < 65536:
                    data = os.read(src, 4096)
                    if not data:
                        raise OSError("empty read on a master")
                    pending[src] += data
            for src in (a, b):
                if pending[src] and (other[src] in writable or src in readable):
                    try:
                        done = os.write(other[src], pending[src])
                    except BlockingIOError:
                        done = 0
                    moved[src] += done
                    pending[src] = pending[src][done:]
        except BlockingIOError:
            continue
        except OSError as exc:
            why = f"hang-up ({exc})"
            break
    os.close(a)
    os.close(b)
    print(f"relay: {moved[a]} {moved[b]} {why}", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
