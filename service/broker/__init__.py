"""A local single-node Apache Kafka broker (``casecloud broker run``), for
trying the service, for ``casecloud bench`` and for the integration tests.

The launcher (:mod:`service.broker.launcher`) uses the standard library only;
its Maven ``pom.xml`` (which pins the Kafka version and lists the jars) ships
beside it as package data, so a plain ``pip install`` can start a broker with
nothing more than Java 11+ and Maven.
"""

from __future__ import annotations

from .launcher import (
    KAFKA_VERSION,
    BrokerError,
    BrokerStartError,
    KafkaBroker,
    Listener,
    default_jar_dir,
    ensure_jars,
)

__all__ = [
    "KAFKA_VERSION",
    "BrokerError",
    "BrokerStartError",
    "KafkaBroker",
    "Listener",
    "default_jar_dir",
    "ensure_jars",
    "add_broker_parser",
]


def add_broker_parser(sub) -> None:
    """``casecloud broker run|fetch-jars``."""
    from .launcher import KAFKA_VERSION, add_arguments, run_command

    broker = sub.add_parser(
        "broker",
        help=f"run a local single-node Kafka {KAFKA_VERSION} broker (127.0.0.1) for trying serve and bench",
        description=f"A local single-node Apache Kafka {KAFKA_VERSION} broker on 127.0.0.1, for trials, "
        "`casecloud bench` and tests; not for production. Needs Java 11+ and, on the first run, Maven.",
    )
    add_arguments(broker)
    broker.set_defaults(handler=run_command)
