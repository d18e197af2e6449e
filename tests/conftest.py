"""Shared fixtures: a real mosquitto broker on a free loopback port, a real X server
(Xvfb) for the dashboard."""

from __future__ import annotations

import os
import shutil
import subprocess
from collections.abc import Callable, Iterator

import pytest

from plantrig.io import BrokerError, LocalBroker


@pytest.fixture
def make_broker() -> Iterator[Callable[..., LocalBroker]]:
    """Start brokers (``make_broker(users={...})`` for a password file); every one is
    killed at teardown. A missing mosquitto fails the test: it is a real part here."""
    started: list[LocalBroker] = []

    def make(**kwargs: object) -> LocalBroker:
        try:
            broker = LocalBroker(**kwargs)  # type: ignore[arg-type]
            started.append(broker)
            broker.start()
        except BrokerError as exc:
            pytest.fail(f"mosquitto is needed for this test: {exc}")
        return broker

    yield make
    for broker in started:
        broker.close()


@pytest.fixture
def mosquitto_broker(make_broker: Callable[..., LocalBroker]) -> LocalBroker:
    """A running anonymous broker on 127.0.0.1: ``host, port = mosquitto_broker``;
    ``stop()`` (``kill=True`` for a crash), ``start()`` and ``restart()`` keep the port."""
    return make_broker()


@pytest.fixture(scope="session")
def xvfb():
    """A real X server on a display number it picks itself (-displayfd)."""
    exe = shutil.which("Xvfb")
    if exe is None:
        pytest.fail("Xvfb is needed for the dashboard tests (apt-get install xvfb)")
    read_fd, write_fd = os.pipe()
    proc = subprocess.Popen([exe, "-displayfd", str(write_fd), "-screen", "0", "1400x900x24",
                             "-nolisten", "tcp"], pass_fds=(write_fd,),
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    os.close(write_fd)
    with os.fdopen(read_fd) as f:
        number = f.readline().strip()
    if not number:
        proc.kill()
        pytest.fail("Xvfb did not report a display number")
    old = os.environ.get("DISPLAY")
    os.environ["DISPLAY"] = f":{number}"
    yield os.environ["DISPLAY"]
    if old is None:
        os.environ.pop("DISPLAY", None)
    else:
        os.environ["DISPLAY"] = old
    proc.terminate()
    proc.wait(10)
