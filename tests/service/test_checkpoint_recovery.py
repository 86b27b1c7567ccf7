"""Service-level recovery from saved state: a corrupt newest checkpoint is
detected, the previous one is used and this is reported; a checkpoint written
for a different model is refused with a clear error."""

from __future__ import annotations

import asyncio
import datetime as dt

import orjson
import pytest
from prometheus_client import CollectorRegistry

from schemas import DeploymentConfig
from service.runtime.app import Service
from service.state import CheckpointMismatch, LocalCheckpointStore
from service.runtime.metrics import Metrics
from service.transports import MemoryTransport

STREAM = "fernhill-ili"
START = dt.date(2025, 9, 1)


def _config(tmp_path, model: str = "sir") -> DeploymentConfig:
    return DeploymentConfig.model_validate(
        {
            "service": {"seed": 3, "checkpoint_dir": str(tmp_path / "ckpt"), "keep_checkpoints": 3},
            "metrics": {"enabled": False},
            "streams": [{"id": STREAM, "model": model, "start": START.isoformat(), "particles": 200}],
        }
    )


def _records(days: int) -> list[bytes]:
    return [
        orjson.dumps({"stream": STREAM, "period": (START + dt.timedelta(days=d)).isoformat(), "counts": {"cases": 3 + d % 4}})
        for d in range(1, days + 1)
    ]


def _run(config, records, registry=None):
    metrics = Metrics(registry=registry or CollectorRegistry())
    transport = MemoryTransport(records)
    service = Service(config, transport, metrics=metrics, today=lambda: dt.date(2026, 12, 1))
    counts = asyncio.run(service.run(until_exhausted=True))
    return service, transport, counts, metrics


def test_corrupt_newest_checkpoint_falls_back_and_is_reported(tmp_path):
    config = _config(tmp_path)
    records = _records(8)
    # Uninterrupted reference over all 8 records.
    ref_config = _config(tmp_path / "ref")
    _run(ref_config, records)
    reference = LocalCheckpointStore(ref_config.service.checkpoint_dir).list(STREAM)[0].path.read_bytes()

    _run(config, records[:6])
    store = LocalCheckpointStore(config.service.checkpoint_dir)
    newest = store.list(STREAM)[0]
    assert newest.step == 6
    data = bytearray(newest.path.read_bytes())
    data[len(data) // 2] ^= 0xFF  # one flipped byte in the arrays
    newest.path.write_bytes(bytes(data))

    registry = CollectorRegistry()
    service, transport, counts, _ = _run(config, records, registry)
    # Resumed after step 5's recorded offset (4): record 5 (day 6) is applied again, then 6 and 7.
    assert counts == {"applied": 3, "skipped": 0, "dead_letter": 0}
    assert registry.get_sample_value("casecloud_checkpoint_fallbacks_total", {"stream": STREAM}) == 1.0
    final = LocalCheckpointStore(config.service.checkpoint_dir).list(STREAM)[0]
    assert final.step == 8
    assert final.path.read_bytes() == reference


def test_checkpoint_of_a_different_model_is_refused(tmp_path):
    _run(_config(tmp_path, "sir"), _records(3))
    other = DeploymentConfig.model_validate(
        {**_config(tmp_path).model_dump(mode="json"), "streams": [{"id": STREAM, "model": "seir", "start": START.isoformat(), "particles": 200}]}
    )
    seir_record = orjson.dumps({"stream": STREAM, "period": "2025-09-05", "counts": {"onsets": 2}})
    with pytest.raises(CheckpointMismatch) as info:
        _run(other, [seir_record])
    message = str(info.value)
    assert STREAM in message and "fingerprint" in message
    # Nothing was overwritten: the sir checkpoint is still the newest.
    assert LocalCheckpointStore(tmp_path / "ckpt").list(STREAM)[0].step == 3


def test_update_age_is_known_right_after_a_restart(tmp_path):
    """A restarted service reports how old each stream's state is before any new record arrives."""
    import os

    config = _config(tmp_path)
    _run(config, _records(2))
    newest = LocalCheckpointStore(config.service.checkpoint_dir).list(STREAM)[0].path
    os.utime(newest, (1_000_000.0, 1_000_000.0))
    registry = CollectorRegistry()
    metrics = Metrics(registry=registry, clock=lambda: 1_000_600.0)
    service = Service(config, MemoryTransport([]), metrics=metrics, today=lambda: dt.date(2026, 12, 1))
    asyncio.run(service.run(until_exhausted=True))
    assert registry.get_sample_value("casecloud_stream_update_age_seconds", {"stream": STREAM, "cadence": "daily"}) == 600.0
