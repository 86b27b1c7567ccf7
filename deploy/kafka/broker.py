#!/usr/bin/env python3
"""Thin wrapper: the local Kafka broker launcher now ships inside the package
(``service/broker/launcher.py``, with its ``pom.xml``) and runs as
``casecloud broker run``. This script runs the same launcher from a source
checkout without installing anything (standard library only)::

    python deploy/kafka/broker.py run [--port N] [--dir D] [--topic NAME[:PARTITIONS]]
    python deploy/kafka/broker.py fetch-jars
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

LAUNCHER = Path(__file__).resolve().parents[2] / "service" / "broker" / "launcher.py"


def _load():
    # By file path, so that the package's own dependencies (numpy, aiokafka, ...)
    # are not needed just to start a broker.
    spec = importlib.util.spec_from_file_location("casecloud_broker_launcher", LAUNCHER)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


if __name__ == "__main__":
    sys.exit(_load().main(prog="broker.py"))
