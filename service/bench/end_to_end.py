"""``casecloud bench`` section ``service``: the whole service path through a
real Kafka broker against the engine alone, on the same workload, in the same
process.

Workload: one stream of the reference spec (``seir_two_band``) with the
requested particle count and one exceedance-alert rule, fed ``messages`` days
of a simulated season.

* **engine**: the CPU work the service does per message (filter step with
  summary, forecast for the alert rule), called directly on a fresh stream
  runtime, message after message.
* **service**: the same messages produced to a fresh Kafka topic and consumed
  by :class:`service.runtime.app.Service` with the Kafka transport (parse, validate,
  step in a worker thread, publish with acks=all, checkpoint with fsync,
  commit). Timed from the first record handled to the last.

``overhead_ratio`` = (service - engine) / engine per message, with the engine
time taken from the service's own step histogram in the same run (the
engine-alone run is reported beside it); target <= 0.25. The service writes
each checkpoint in a worker thread while the next record is stepped.
Also: checkpoint write time and size, restart-recovery time (a new registry
loading and verifying the stream's newest checkpoint), memory per stream
(particle arrays). The broker is the packaged single-node KRaft launcher
(:mod:`service.broker`, ``casecloud broker run``; needs Java and, once, Maven),
or an existing one given with ``bootstrap``.
"""

from __future__ import annotations

import asyncio
import datetime as dt
import statistics
import tempfile
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from filters import CompartmentalModel, simulate_season
from schemas import DeploymentConfig, example_model_path, load_model_spec

from .feeds import FEEDS_SPEC, feed_messages

__all__ = ["bench_service", "OVERHEAD_RATIO_MAX"]

OVERHEAD_RATIO_MAX = 0.25
STREAM = "bench-ed"
START = dt.date(2025, 9, 1)


def _config(root: Path, particles: int, bootstrap: str, topic: str, spec: str = "seir_two_band") -> DeploymentConfig:
    return DeploymentConfig.model_validate(
        {
            "transport": "kafka",
            "service": {"seed": 1, "checkpoint_dir": str(root / "ckpt")},
            "metrics": {"enabled": False},
            "kafka": {
                "bootstrap_servers": bootstrap,
                "group_id": f"bench-{topic}",
                "input_topic": topic,
                "estimates_topic": f"{topic}.estimates",
                "alerts_topic": f"{topic}.alerts",
                "dead_letter_topic": f"{topic}.dead-letters",
                "session_timeout_ms": 6000,
            },
            "streams": [
                {
                    "id": STREAM,
                    "model": spec,
                    "start": START.isoformat(),
                    "particles": particles,
                    "forecast_trajectories": 500,
                    "alerts": [{"name": "surge", "series": "ed_child", "threshold": 40, "horizon_days": 7}],
                }
            ],
        }
    )


def _messages(days: int) -> list[bytes]:
    model = CompartmentalModel(load_model_spec(example_model_path("seir_two_band")))
    truth = simulate_season(model, days, np.random.default_rng(4))
    return [
        orjson.dumps({"stream": STREAM, "period": (START + dt.timedelta(days=o.time)).isoformat(),
                      "counts": {k: int(v) for k, v in o.values.items()}})
        for o in truth.observations
    ]


def _engine_seconds(config: DeploymentConfig, messages: list[bytes], root: Path) -> list[float]:
    from schemas import ObservationMessage

    from ..runtime.metrics import Metrics
    from ..runtime.processor import RecordProcessor
    from ..runtime.streams import StreamRegistry
    from ..state import LocalCheckpointStore

    store = LocalCheckpointStore(root / "engine-ckpt")
    registry = StreamRegistry(config, store)
    processor = RecordProcessor(config, registry, store, Metrics())
    runtime = registry.get(STREAM)
    assert runtime is not None
    out = []
    for raw in messages:
        message = ObservationMessage.model_validate(orjson.loads(raw))
        plan = processor._plan(runtime, message)
        t0 = time.perf_counter()
        processor._step(runtime, message, plan)
        out.append(time.perf_counter() - t0)
        runtime.last_day = plan.time
    return out


async def _service_seconds(config: DeploymentConfig, n: int) -> tuple[float, float, int]:
    from ..runtime.app import Service
    from ..transports.kafka import KafkaTransport

    stop = asyncio.Event()
    stamps: list[float] = []

    def seen(outcome) -> None:
        stamps.append(time.perf_counter())
        if len(stamps) >= n:
            stop.set()

    service = Service(config, KafkaTransport(config.kafka, config.service.max_message_bytes), on_outcome=seen)
    counts = await service.run(stop)
    # Time from the first record handled to the last, per record after the first;
    # and the engine's own share measured inside the same run (step histogram).
    registry = service.metrics.registry
    step_sum = registry.get_sample_value("casecloud_step_duration_seconds_sum", {"stream": STREAM}) or 0.0
    step_count = registry.get_sample_value("casecloud_step_duration_seconds_count", {"stream": STREAM}) or 1.0
    return (stamps[-1] - stamps[0]) / max(1, len(stamps) - 1), step_sum / step_count, counts["applied"]


async def _produce(bootstrap: str, topic: str, messages: list[bytes]) -> None:
    from aiokafka import AIOKafkaProducer

    producer = AIOKafkaProducer(bootstrap_servers=bootstrap, acks="all")
    await producer.start()
    try:
        for m in messages:
            await producer.send_and_wait(topic, value=m, key=STREAM.encode())
    finally:
        await producer.stop()


def bench_service(
    particles: int = 10_000,
    repeats: int = 5,
    progress: Callable[[str], None] | None = None,
    messages: int = 30,
    bootstrap: str | None = None,
    feeds: int = 1,
):
    """``feeds=1``: one message a day with both ED series (``seir_two_band``). ``feeds=3``:
    ``seir_two_band_lab`` fed as three feeds (ED child, ED adult, weekly lab totals as of
    each day, revised as reports arrive), ``messages`` days of them."""
    from ..runtime.streams import StreamRegistry
    from ..state import LocalCheckpointStore
    from .common import SectionResult, Target

    say = progress or (lambda _: None)
    if feeds not in (1, 3):
        raise ValueError(f"feeds must be 1 or 3, got {feeds}")
    spec = "seir_two_band" if feeds == 1 else FEEDS_SPEC
    feed = _messages(messages) if feeds == 1 else feed_messages(STREAM, START, messages, seed=4)
    with tempfile.TemporaryDirectory(prefix="casecloud-bench-") as tmp:
        root = Path(tmp)
        broker = None
        if bootstrap is None:
            say("service: starting a local Kafka broker")
            from ..broker import KafkaBroker

            broker = KafkaBroker(root / "broker")
            broker.start(timeout=180)
            bootstrap = broker.bootstrap_servers
        try:
            topic = f"bench-{uuid.uuid4().hex[:8]}"
            config = _config(root, particles, bootstrap, topic, spec)
            say(f"service: engine alone, {len(feed)} messages")
            engine = _engine_seconds(config, feed, root)
            if broker is not None:
                broker.create_topic(topic, 1)
            asyncio.run(_produce(bootstrap, topic, feed))
            say(f"service: through Kafka, {len(feed)} messages")
            per_message, engine_in_run, applied = asyncio.run(_service_seconds(config, len(feed)))
        finally:
            if broker is not None:
                broker.stop()
        # Checkpoint write and restart recovery on the final cloud.
        store = LocalCheckpointStore(config.service.checkpoint_dir)
        registry = StreamRegistry(config, store)
        checkpoint = registry.get(STREAM).to_checkpoint()  # type: ignore[union-attr]
        writes, loads = [], []
        for _ in range(repeats):
            t0 = time.perf_counter()
            info = store.write(checkpoint)
            writes.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            StreamRegistry(config, store).get(STREAM)
            loads.append(time.perf_counter() - t0)
        state_bytes = sum(a.nbytes for a in checkpoint.arrays.values())
    engine_per_message = statistics.mean(engine[1:]) if len(engine) > 1 else engine[0]
    # The ratio uses the engine time measured inside the same service run, so
    # machine load affects both sides alike; the separate engine-alone run is
    # reported beside it.
    overhead = (per_message - engine_in_run) / engine_in_run
    figures: dict[str, Any] = {
        "workload": {"spec": spec, "particles": particles, "days": messages, "feeds": feeds, "messages": len(feed),
                     "alert_rules": 1, "forecast_trajectories": 500},
        "applied": applied,
        "engine_alone_seconds_per_message": engine_per_message,
        "engine_in_service_seconds_per_message": engine_in_run,
        "service_seconds_per_message": per_message,
        "overhead_ratio": overhead,
        "checkpoint_write_seconds": statistics.median(writes),
        "checkpoint_bytes": info.size_bytes,
        "restart_recovery_seconds": statistics.median(loads),
        "stream_state_bytes": state_bytes,
    }
    targets = [Target("overhead_ratio", overhead, OVERHEAD_RATIO_MAX, "max", "service overhead over the engine per message")]
    return SectionResult(figures, targets)
