"""Shared set-up for the service tests: a small deployment, observation bytes,
snapshots of a stream's cloud, and a fresh Prometheus registry per test.

Everything is deterministic: the deployment seed is fixed, ``today`` is a
fixed date (so "far in the future" does not depend on the wall clock) and the
clouds are small (200 particles) so the whole service suite stays fast.
"""

from __future__ import annotations

import asyncio
import datetime as dt
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pytest
from prometheus_client import CollectorRegistry

from schemas import DeploymentConfig
from service.runtime.app import Service
from service.runtime.metrics import Metrics
from service.runtime.processor import Outcome
from service.transports import MemoryTransport

STREAM = "region-north.ed"
START = dt.date(2026, 1, 1)
TODAY = dt.date(2026, 3, 1)


def period(day: int) -> str:
    """The calendar date of model day ``day`` of the test stream."""
    return (START + dt.timedelta(days=day)).isoformat()


def obs(day: int | str, cases: Any = 10, stream: str = STREAM, **extra: Any) -> bytes:
    """A well-formed observation (or a deliberately altered one via ``extra``)."""
    message = {"stream": stream, "period": period(day) if isinstance(day, int) else day, "counts": {"cases": cases}}
    message.update(extra)
    return orjson.dumps(message)


def config_dict(checkpoint_dir: Path, *, alerts: bool = False, **service: Any) -> dict[str, Any]:
    stream: dict[str, Any] = {
        "id": STREAM,
        "model": "sir",
        "start": START.isoformat(),
        "particles": 200,
        "forecast_trajectories": 40,
    }
    if alerts:
        stream["alerts"] = [{"name": "cases_high", "series": "cases", "threshold": 25, "horizon_days": 5}]
    return {
        "service": {"seed": 11, "checkpoint_dir": str(checkpoint_dir), "keep_checkpoints": 100, **service},
        "metrics": {"enabled": False},
        "streams": [stream],
    }


def make_config(checkpoint_dir: Path, **kwargs: Any) -> DeploymentConfig:
    return DeploymentConfig.model_validate(config_dict(checkpoint_dir, **kwargs))


def cloud_snapshot(service: Service, stream: str = STREAM) -> dict[str, Any] | None:
    """Everything a stream carries between messages, copied (None: not loaded yet)."""
    runtime = service.registry.runtimes.get(stream)
    if runtime is None:
        return None
    header, arrays = runtime.filter.state()
    return {
        "header": orjson.loads(orjson.dumps(header)),
        "arrays": {k: (v.dtype.str, v.shape, v.tobytes()) for k, v in arrays.items()},
        "last_day": runtime.last_day,
        "last_period": runtime.last_period,
        "positions": dict(runtime.positions),
        "alerts": {k: v.to_json() for k, v in runtime.alerts.items()},
    }


def checkpoint_files(root: Path) -> dict[str, bytes]:
    """Every file under the checkpoint root with its bytes."""
    if not root.exists():
        return {}
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def assert_same_arrays(got: dict[str, np.ndarray], want: dict[str, np.ndarray]) -> None:
    assert sorted(got) == sorted(want)
    for name in want:
        assert got[name].dtype == want[name].dtype, name
        assert got[name].shape == want[name].shape, name
        assert got[name].tobytes() == want[name].tobytes(), f"array {name!r} differs"


class Harness:
    """One Service over a MemoryTransport, with a per-record trace.

    After each record (after its commit) the trace holds the outcome, the
    committed offset, a snapshot of the cloud and the checkpoint files. The
    service runs unpipelined here (``pipeline=False``) so that every record's
    checkpoint and commit are done when the trace is taken; the pipelined
    path is covered by the restart tests and the Kafka crash tests.
    """

    def __init__(self, tmp_path: Path, records: list[bytes], **config: Any) -> None:
        self.checkpoint_dir = tmp_path / "checkpoints"
        self.config = make_config(self.checkpoint_dir, **config)
        self.transport = MemoryTransport(records)
        self.registry = CollectorRegistry()
        self.metrics = Metrics(registry=self.registry)
        self.trace: list[dict[str, Any]] = []
        self.service = Service(
            self.config,
            self.transport,
            metrics=self.metrics,
            today=lambda: TODAY,
            on_outcome=self._record,
            pipeline=False,
        )

    def _record(self, outcome: Outcome) -> None:
        self.trace.append(
            {
                "outcome": outcome,
                "committed": self.transport.committed,
                "cloud": cloud_snapshot(self.service),
                "files": checkpoint_files(self.checkpoint_dir),
            }
        )

    def run(self) -> dict[str, int]:
        return asyncio.run(self.service.run(until_exhausted=True))

    def sample(self, name: str, labels: dict[str, str] | None = None) -> float | None:
        return self.registry.get_sample_value(name, labels or {})


@pytest.fixture
def harness(tmp_path: Path):
    """``harness(records, **config)`` builds a Harness in this test's tmp dir."""

    def build(records: list[bytes], **config: Any) -> Harness:
        return Harness(tmp_path, records, **config)

    return build


@pytest.fixture
def kit():
    """The helpers above, for test modules (conftest is not importable under
    ``--import-mode=importlib``)."""
    import types

    return types.SimpleNamespace(
        STREAM=STREAM,
        START=START,
        TODAY=TODAY,
        period=period,
        obs=obs,
        config_dict=config_dict,
        make_config=make_config,
        cloud_snapshot=cloud_snapshot,
        checkpoint_files=checkpoint_files,
        assert_same_arrays=assert_same_arrays,
        Harness=Harness,
    )
