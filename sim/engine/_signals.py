"""SIGINT and SIGTERM during a run: one graceful stop, never a traceback.

While a run is being set up or runs, a signal asks the engine to stop at the next tick
boundary through its one stop path (inputs to safe values, link closed, record
finished). While the record is being finished, further signals are only acknowledged:
finishing is short and must not be cut, or the record would claim less than is there.
Outside the main thread (a run started from a worker thread) nothing is installed.
"""

from __future__ import annotations

import signal
import sys
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from types import FrameType

STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)


class SignalStop:
    """Routes stop signals to whoever can act on them now."""

    def __init__(self) -> None:
        self.received: str | None = None
        self._stop: Callable[[str], None] | None = None
        self.finishing = False

    def attach(self, stop: Callable[[str], None]) -> None:
        """From now on a signal calls ``stop(why)``; one already received is passed on."""
        self._stop = stop
        if self.received:
            stop(self._why(self.received))

    def finish(self) -> None:
        """The loop has ended: later signals are acknowledged, not acted on."""
        self._stop = None
        self.finishing = True

    def handle(self, signum: int, _frame: FrameType | None) -> None:
        name = signal.Signals(signum).name
        if self.finishing:
            print(f"plantrig: {name} received while the run record is being finished; "
                  "finishing first (a few seconds)", file=sys.stderr, flush=True)
            return
        first = self.received is None
        self.received = self.received or name
        if self._stop is not None:
            self._stop(self._why(name))
        if first:
            print(f"plantrig: {name} received; stopping at the next tick and finishing the "
                  "run record", file=sys.stderr, flush=True)

    @staticmethod
    def _why(name: str) -> str:
        return f"signal {name}"


@contextmanager
def stop_on_signals() -> Iterator[SignalStop]:
    """Install the graceful handlers for the block (main thread only), then restore."""
    stopper = SignalStop()
    if threading.current_thread() is not threading.main_thread():
        yield stopper
        return
    previous = {s: signal.getsignal(s) for s in STOP_SIGNALS}
    for s in STOP_SIGNALS:
        signal.signal(s, stopper.handle)
    try:
        yield stopper
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
