"""The service loop while its broker is away, with an in-memory transport that
fails the way the Kafka transport does (``TransportUnavailable``). The real
broker outage is in tests/integration/test_broker_outage.py; here the timing is
in the test's hands.

Checked: the loop stays up and retries; /readyz (``Service.readiness``) is
false with the reason and ``casecloud_broker_reachable`` is 0 meanwhile;
nothing is committed past the last record whose outputs were acknowledged; once
the broker is back, the run ends with the cloud and the outputs of a run that
never saw an outage; a stop during the outage ends the wait without a commit;
an error that waiting cannot cure still ends ``run``.
"""

from __future__ import annotations

import asyncio

import pytest
from prometheus_client import CollectorRegistry

from service.errors import TransportError, TransportUnavailable
from service.runtime import app
from service.runtime.app import Service
from service.runtime.metrics import Metrics
from service.transports import MemoryTransport


@pytest.fixture(autouse=True)
def quick_retries(monkeypatch):
    monkeypatch.setattr(app, "RETRY_FIRST_SECONDS", 0.01)
    monkeypatch.setattr(app, "RETRY_MAX_SECONDS", 0.02)
    monkeypatch.setattr(app, "PROBE_SECONDS", 0.01)


class AwayTransport(MemoryTransport):
    """Publishes and commits fail while ``away``; ``away`` is switched on when the
    record at offset ``away_at`` is published (before it is acknowledged)."""

    def __init__(self, inputs, away_at: int | None = None, error: type[TransportError] = TransportUnavailable) -> None:
        super().__init__(inputs)
        self.away = False
        self.away_at = away_at
        self.error = error
        self.failed_publishes = 0
        self.acknowledged: list[int] = []  # offsets whose outputs were published
        self.in_flight: int | None = None

    async def receive(self, timeout: float = 1.0):
        record = await super().receive(timeout)
        if record is not None:
            self.in_flight = record.offset
        return record

    async def publish(self, records) -> None:
        if self.in_flight == self.away_at and self.failed_publishes == 0:
            self.away = True
        if self.away:
            self.failed_publishes += 1
            raise self.error("the broker is away (test)", topic="estimates")
        await super().publish(records)
        self.acknowledged.append(self.in_flight)

    async def commit(self, record) -> None:
        if self.away:
            raise TransportUnavailable("the broker is away (test)", topic="input")
        assert record.offset in self.acknowledged, f"commit of offset {record.offset} whose outputs were not acknowledged"
        await super().commit(record)

    async def check_connection(self) -> str | None:
        return "no answer (test)" if self.away else None


def _service(kit, tmp_path, transport, name: str) -> tuple[Service, CollectorRegistry]:
    registry = CollectorRegistry()
    config = kit.make_config(tmp_path / name, alerts=True)
    return Service(config, transport, metrics=Metrics(registry=registry), today=lambda: kit.TODAY), registry


async def _until(predicate, what: str, limit: int = 2000) -> None:
    for _ in range(limit):
        if predicate():
            return
        await asyncio.sleep(0.005)
    raise AssertionError(f"never happened: {what}")


def test_the_loop_waits_for_the_broker_and_ends_as_if_it_never_left(kit, tmp_path):
    records = [kit.obs(d, cases=8 + d) for d in range(3, 11)]
    plain = MemoryTransport(records)
    reference, _ = _service(kit, tmp_path, plain, "ref")
    asyncio.run(reference.run(until_exhausted=True))

    transport = AwayTransport(records, away_at=4)
    service, registry = _service(kit, tmp_path, transport, "run")

    async def scenario():
        task = asyncio.create_task(service.run(until_exhausted=True))
        await _until(lambda: transport.failed_publishes >= 5, "five failed publishes")
        assert not task.done()
        ready, reason = service.readiness()
        seen = {
            "ready": ready,
            "reason": reason,
            "reachable": registry.get_sample_value("casecloud_broker_reachable"),
            "committed": transport.committed,
            "published": len(transport.published["estimates"]),
        }
        transport.away = False
        await asyncio.wait_for(task, 30)
        seen["reachable_after"] = registry.get_sample_value("casecloud_broker_reachable")
        seen["ready_after"] = service.readiness()[0]
        return seen

    seen = asyncio.run(scenario())
    assert seen["ready"] is False and "the broker has been unreachable" in seen["reason"], seen["reason"]
    assert seen["reachable"] == 0.0 and seen["reachable_after"] == 1.0
    # records 0-3 were published; the commit of 3 waits for record 4's step (pipelining) at most
    assert seen["published"] == 4 and seen["committed"] in (3, 4)
    assert service.counts == reference.counts == {"applied": 8, "skipped": 0, "dead_letter": 0}
    assert kit.cloud_snapshot(service) == kit.cloud_snapshot(reference)
    assert [r.value for r in transport.published["estimates"]] == [r.value for r in plain.published["estimates"]]
    assert [r.value for r in transport.published["alerts"]] == [r.value for r in plain.published["alerts"]]
    assert transport.committed == len(records)


def test_a_stop_during_the_outage_ends_the_wait_without_a_commit(kit, tmp_path, caplog):
    records = [kit.obs(d) for d in range(3, 9)]
    transport = AwayTransport(records, away_at=2)
    service, _ = _service(kit, tmp_path, transport, "run")

    async def scenario():
        stop = asyncio.Event()
        task = asyncio.create_task(service.run(stop))
        await _until(lambda: transport.failed_publishes >= 2, "two failed publishes")
        stop.set()
        return await asyncio.wait_for(task, 10)

    counts = asyncio.run(scenario())
    assert counts["applied"] == 2  # the record in flight is not counted, it is read again at the next start
    assert transport.committed is None or transport.committed <= 2
    assert "stopped while the broker was unreachable (publish was not finished)" in caplog.text
    newest = sorted(p.name for p in (tmp_path / "run").rglob("*.ckpt"))
    assert len(newest) == 2, newest  # checkpoints of the two acknowledged records only


def test_an_error_that_waiting_cannot_cure_ends_the_run_without_a_commit(kit, tmp_path):
    records = [kit.obs(d) for d in range(3, 9)]
    transport = AwayTransport(records, away_at=3, error=TransportError)
    service, _ = _service(kit, tmp_path, transport, "run")
    with pytest.raises(TransportError, match="the broker is away"):
        asyncio.run(service.run(until_exhausted=True))
    assert transport.failed_publishes == 1
    assert transport.committed is None or transport.committed <= 3


def test_aiokafka_errors_during_an_outage_are_let_through_once_a_minute():
    """aiokafka logged ~41,000 'Unable connect to node' lines in a 15 s outage on our
    machine; the filter on its loggers lets each distinct message through once per
    window, then once more with the count held back."""
    import logging

    from service.transports.kafka import _ClientLogFilter

    now = {"t": 0.0}
    filt = _ClientLogFilter(window=60.0, clock=lambda: now["t"])
    logger = logging.getLogger("aiokafka.test-outage")
    logger.propagate = False
    seen: list[logging.LogRecord] = []

    class Keep(logging.Handler):
        def emit(self, record):
            seen.append(record)

    logger.addHandler(Keep())
    logger.addFilter(filt)
    logger.setLevel(logging.WARNING)
    for i in range(1000):
        now["t"] = i * 0.01
        logger.error("Unable connect to node with id %s: %s", 1, f"refused {i}")
    now["t"] = 61.0
    logger.error("Unable connect to node with id %s: %s", 1, "refused again")
    assert [r.getMessage() for r in seen] == [
        "Unable connect to node with id 1: refused 0",
        "Unable connect to node with id 1: refused again (999 more like this in the last 61 s)",
    ]

    # the normal wait for a topic at start-up is INFO, so a WARNING logger drops it
    seen.clear()
    logger.error("Topic %s not found in cluster metadata", "casecloud.estimates")
    assert seen == []
    logger.setLevel(logging.INFO)
    logger.error("Topic %s not found in cluster metadata", "casecloud.alerts")
    assert [(r.levelname, r.getMessage()) for r in seen] == [("INFO", "Topic casecloud.alerts not found in cluster metadata")]
