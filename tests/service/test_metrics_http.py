"""The health endpoint (``service.runtime.http.HealthServer``) and the Prometheus metrics.

The HTTP client is a few lines of raw asyncio streams, so the server is
checked on the wire (status line, headers, body), not through a library that
might paper over a malformed response.
"""

from __future__ import annotations

import asyncio

import orjson
import pytest
from prometheus_client import CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families

from schemas import DeploymentConfig
from service.runtime.app import Service
from service.runtime.http import HealthServer
from service.runtime.metrics import Metrics
from service.transports import MemoryTransport


async def request(port: int, path: str, method: str = "GET") -> tuple[int, dict[str, str], bytes]:
    reader, writer = await asyncio.open_connection("127.0.0.1", port)
    writer.write(f"{method} {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n\r\n".encode())
    await writer.drain()
    raw = await asyncio.wait_for(reader.read(), timeout=5)
    writer.close()
    await writer.wait_closed()
    head, _, body = raw.partition(b"\r\n\r\n")
    status_line, *header_lines = head.decode("latin-1").split("\r\n")
    headers = {k.lower(): v.strip() for k, v in (h.split(":", 1) for h in header_lines)}
    assert int(headers["content-length"]) == len(body)
    return int(status_line.split()[1]), headers, body


def test_health_endpoints(kit, tmp_path):
    registry = CollectorRegistry()
    metrics = Metrics(registry=registry)
    ready = {"value": False}

    async def scenario():
        server = HealthServer(registry, lambda: ready["value"], "127.0.0.1", 0)
        await server.start()
        assert server.port != 0
        try:
            results = {"healthz": await request(server.port, "/healthz")}
            results["readyz_before"] = await request(server.port, "/readyz")
            ready["value"] = True
            results["readyz_after"] = await request(server.port, "/readyz")
            results["missing"] = await request(server.port, "/nothing-here")
            results["post"] = await request(server.port, "/metrics", "POST")
            results["query"] = await request(server.port, "/healthz?verbose=1")

            # process one record, then scrape
            config = kit.make_config(tmp_path / "ck")
            transport = MemoryTransport([kit.obs(3)])
            service = Service(config, transport, metrics=metrics, today=lambda: kit.TODAY)
            await service.run(until_exhausted=True)
            results["metrics"] = await request(server.port, "/metrics")
            return results
        finally:
            await server.stop()

    r = asyncio.run(scenario())
    assert r["healthz"][0] == 200 and r["healthz"][2] == b"ok\n"
    assert r["readyz_before"][0] == 503
    assert r["readyz_after"][0] == 200
    assert r["missing"][0] == 404
    assert r["post"][0] == 405
    assert r["query"][0] == 200
    status, headers, body = r["metrics"]
    assert status == 200
    assert headers["content-type"].startswith("text/plain")
    text = body.decode()
    assert 'casecloud_messages_processed_total{stream="region-north.ed"} 1.0' in text
    families = {f.name: f for f in text_string_to_metric_families(text)}  # parses as Prometheus text
    assert "casecloud_effective_sample_size" in families
    ess = families["casecloud_effective_sample_size"].samples[0].value
    assert 0 < ess <= 200


@pytest.mark.timeout(60)  # an idle loop that never yields would hang here, not fail
def test_service_serves_metrics_and_readiness_while_running(kit, tmp_path):
    """The service's own endpoint: not ready until the transport has started, and
    served while the loop idles on an exhausted input (the loop must yield)."""

    class GatedTransport(MemoryTransport):
        def __init__(self, inputs):
            super().__init__(inputs)
            self.gate = asyncio.Event()

        async def start(self, on_assign=None, on_revoke=None):
            await self.gate.wait()
            await super().start(on_assign)

    data = kit.config_dict(tmp_path / "ck")
    data["metrics"] = {"enabled": True, "host": "127.0.0.1", "port": 0}
    config = DeploymentConfig.model_validate(data)
    transport = GatedTransport([kit.obs(3), kit.obs(4)])
    registry = CollectorRegistry()
    service = Service(config, transport, metrics=Metrics(registry=registry), today=lambda: kit.TODAY)

    async def scenario():
        stop = asyncio.Event()
        task = asyncio.create_task(service.run(stop))
        for _ in range(200):
            if service.http is not None and service.http._server is not None:
                break
            await asyncio.sleep(0.01)
        port = service.http.port
        before = await request(port, "/readyz")
        health = await request(port, "/healthz")
        transport.gate.set()
        for _ in range(500):
            if transport.exhausted and service.counts["applied"] == 2:
                break
            await asyncio.sleep(0.01)
        after = await request(port, "/readyz")
        scraped = await request(port, "/metrics")
        stop.set()
        await asyncio.wait_for(task, timeout=10)
        return before, health, after, scraped

    before, health, after, scraped = asyncio.run(scenario())
    assert before[0] == 503 and health[0] == 200
    assert after[0] == 200
    assert b'casecloud_messages_processed_total{stream="region-north.ed"} 2.0' in scraped[2]
    assert service.http is None or service.http._server is None  # stopped with the service


def test_update_age_uses_the_clock(kit, tmp_path):
    now = {"t": 1_000.0}
    registry = CollectorRegistry()
    metrics = Metrics(registry=registry, clock=lambda: now["t"])
    name = "casecloud_stream_update_age_seconds"
    assert registry.get_sample_value(name, {"stream": kit.STREAM, "cadence": "daily"}) is None  # nothing updated yet

    config = kit.make_config(tmp_path / "ck")
    service = Service(config, MemoryTransport([kit.obs(3)]), metrics=metrics, today=lambda: kit.TODAY)
    asyncio.run(service.run(until_exhausted=True))
    assert registry.get_sample_value(name, {"stream": kit.STREAM, "cadence": "daily"}) == 0.0
    now["t"] = 1_012.5
    assert registry.get_sample_value(name, {"stream": kit.STREAM, "cadence": "daily"}) == 12.5
    now["t"] = 1_090.0
    assert registry.get_sample_value(name, {"stream": kit.STREAM, "cadence": "daily"}) == 90.0
    now["t"] = 900.0  # a clock that stepped back never reports a negative age
    assert registry.get_sample_value(name, {"stream": kit.STREAM, "cadence": "daily"}) == 0.0


def test_update_age_carries_the_cadence_of_the_stream_s_series(kit, tmp_path):
    """The staleness alerts tell daily from weekly streams by this label, never by the
    stream's name: weekly if every series of the model is weekly (seirs: weekly cases),
    daily if any is daily (seir_two_band_lab: daily ED visits and weekly lab positives)."""
    data = kit.config_dict(tmp_path / "ck")
    base = data["streams"][0]
    data["streams"] = [
        {**base, "id": "lab-mixed", "model": "seir_two_band_lab", "particles": 50},
        {**base, "id": "daily-looking-name-weekly", "model": "seirs", "particles": 50},
        base,
    ]
    registry = CollectorRegistry()
    metrics = Metrics(registry=registry, clock=lambda: 50.0)
    service = Service(DeploymentConfig.model_validate(data), MemoryTransport([]), metrics=metrics, today=lambda: kit.TODAY)
    for sid in ("lab-mixed", "daily-looking-name-weekly", kit.STREAM):
        service.metrics.last_update[sid] = 20.0
    samples = {
        s.labels["stream"]: s.labels["cadence"]
        for family in registry.collect() if family.name == "casecloud_stream_update_age_seconds" for s in family.samples
    }
    assert samples == {"lab-mixed": "daily", "daily-looking-name-weekly": "weekly", kit.STREAM: "daily"}


def test_consumer_lag_from_a_lag_source():
    registry = CollectorRegistry()
    metrics = Metrics(registry=registry)
    name = "casecloud_consumer_lag_records"
    assert registry.get_sample_value(name, {"topic": "obs", "partition": "0"}) is None
    lag = {("obs", 0): 7, ("obs", 3): 0}
    metrics.watch_lag(lambda: lag)
    assert registry.get_sample_value(name, {"topic": "obs", "partition": "0"}) == 7
    assert registry.get_sample_value(name, {"topic": "obs", "partition": "3"}) == 0
    lag[("obs", 0)] = 2  # read at scrape time
    assert registry.get_sample_value(name, {"topic": "obs", "partition": "0"}) == 2


def test_service_reports_transport_lag_while_consuming(kit, tmp_path):
    registry = CollectorRegistry()
    seen = []
    config = kit.make_config(tmp_path / "ck")
    transport = MemoryTransport([kit.obs(3), kit.obs(4), kit.obs(5)])
    service = Service(
        config,
        transport,
        metrics=Metrics(registry=registry),
        today=lambda: kit.TODAY,
        on_outcome=lambda _: seen.append(
            registry.get_sample_value("casecloud_consumer_lag_records", {"topic": "input", "partition": "0"})
        ),
    )
    asyncio.run(service.run(until_exhausted=True))
    assert seen == [2, 1, 0]


def test_counters_for_every_outcome(kit, tmp_path):
    registry = CollectorRegistry()
    records = [kit.obs(3), kit.obs(3), b"{oops", kit.obs(4, -1), kit.obs(4)]
    config = kit.make_config(tmp_path / "ck")
    service = Service(config, MemoryTransport(records), metrics=Metrics(registry=registry), today=lambda: kit.TODAY)
    assert asyncio.run(service.run(until_exhausted=True)) == {"applied": 2, "skipped": 1, "dead_letter": 2}
    get = registry.get_sample_value
    assert get("casecloud_messages_processed_total", {"stream": kit.STREAM}) == 2
    assert get("casecloud_messages_skipped_total", {"stream": kit.STREAM, "reason": "duplicate_period"}) == 1
    assert get("casecloud_messages_dead_lettered_total", {"reason": "malformed_json"}) == 1
    assert get("casecloud_messages_dead_lettered_total", {"reason": "bad_count"}) == 1
    assert get("casecloud_step_duration_seconds_count", {"stream": kit.STREAM}) == 2
    assert get("casecloud_checkpoint_write_duration_seconds_count") == 2
    assert get("casecloud_checkpoint_size_bytes", {"stream": kit.STREAM}) > 0
    ratio = get("casecloud_effective_sample_size_ratio", {"stream": kit.STREAM})
    assert 0 < ratio <= 1
    assert get("casecloud_effective_sample_size", {"stream": kit.STREAM}) == pytest.approx(ratio * 200, rel=1e-12)
    estimate = orjson.loads(service.transport.published["estimates"][-1].value)
    assert get("casecloud_log_evidence_increment", {"stream": kit.STREAM}) == estimate["log_evidence_increment"]
