"""Fixtures for integration tests that need a real Kafka broker.

The broker comes from the packaged launcher ``service.broker`` (what
``casecloud broker run`` and ``casecloud bench`` use too). It is started once
per test session on free 127.0.0.1 ports in a temporary directory. If it cannot
start, the fixture raises and the run fails: these tests are never skipped for
a missing broker. Tests that stop and restart a broker start one of their own
(:func:`own_broker`), never the session's.
"""

from __future__ import annotations

import pytest

from service.broker import launcher


def load_broker_module():
    """The broker launcher module (KafkaBroker, Listener, BrokerStartError, ...)."""
    return launcher


@pytest.fixture(scope="session")
def kafka_broker_module():
    """The broker launcher module (KafkaBroker, Listener, BrokerStartError, ...)."""
    return load_broker_module()


@pytest.fixture(scope="session")
def kafka_broker(kafka_broker_module, tmp_path_factory):
    """A running single-node Kafka broker; ``.bootstrap_servers`` is its address.

    Raises (never skips) if the broker cannot start: the error carries the
    command, exit code and the broker log's last lines. The broker is stopped
    at session end; an atexit handler in the launcher and a parent-death signal
    also end it if the session is interrupted.
    """
    work_dir = tmp_path_factory.mktemp("kafka-broker")
    broker = kafka_broker_module.KafkaBroker(work_dir)
    broker.start(timeout=120)
    try:
        yield broker
    finally:
        broker.stop()


@pytest.fixture
def own_broker(tmp_path):
    """A broker of this test's own (free ports, its own data directory), for tests
    that stop and restart it without disturbing the session's broker."""
    broker = launcher.KafkaBroker(tmp_path / "own-broker")
    broker.start(timeout=120)
    try:
        yield broker
    finally:
        broker.stop()
