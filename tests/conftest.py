"""Shared fixtures: a real mosquitto broker on a free loopback port."""

from __future__ import annotations

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
