"""Fixtures for integration tests that need a real Kafka broker.

The broker comes from ``deploy/kafka/broker.py`` (loaded by file path, it is
not a package). It is started once per test session on free 127.0.0.1 ports in
a temporary directory. If it cannot start, the fixture raises and the run
fails: these tests are never skipped for a missing broker.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

REPO_ROOT = Path(__file__).resolve().parents[2]
BROKER_PY = REPO_ROOT / "deploy" / "kafka" / "broker.py"
_MODULE_NAME = "casecloud_deploy_kafka_broker"


def load_broker_module():
    """Import deploy/kafka/broker.py by path (once per process)."""
    module = sys.modules.get(_MODULE_NAME)
    if module is not None:
        return module
    if not BROKER_PY.is_file():
        raise FileNotFoundError(f"broker launcher not found at {BROKER_PY}")
    spec = importlib.util.spec_from_file_location(_MODULE_NAME, BROKER_PY)
    module = importlib.util.module_from_spec(spec)
    sys.modules[_MODULE_NAME] = module  # before exec, so the module can find itself
    try:
        spec.loader.exec_module(module)
    except BaseException:
        sys.modules.pop(_MODULE_NAME, None)
        raise
    return module


@pytest.fixture(scope="session")
def kafka_broker_module():
    """The broker launcher module (KafkaBroker, Listener, BrokerStartError, ...)."""
    return load_broker_module()


@pytest.fixture(scope="session")
def kafka_broker(kafka_broker_module, tmp_path_factory):
    """A running single-node Kafka broker; ``.bootstrap_servers`` is its address.

    Raises (never skips) if the broker cannot start: the error carries the
    command, exit code and the broker log's last lines. The broker is stopped
    at session end; an atexit handler in broker.py and a parent-death signal
    also end it if the session is interrupted.
    """
    work_dir = tmp_path_factory.mktemp("kafka-broker")
    broker = kafka_broker_module.KafkaBroker(work_dir)
    broker.start(timeout=120)
    try:
        yield broker
    finally:
        broker.stop()
