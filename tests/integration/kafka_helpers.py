"""Shared pieces of the service-over-Kafka tests: configs, producing a
season of observations, reading a topic to its end, running the service as a
real process."""

from __future__ import annotations

import asyncio
import datetime as dt
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import orjson
from aiokafka import AIOKafkaConsumer, AIOKafkaProducer, TopicPartition

from filters import CompartmentalModel, simulate_season
from schemas import example_model_path, load_model_spec

START = dt.date(2025, 9, 1)


def season_messages(stream: str, days: int, seed: int, model: str = "seir") -> list[bytes]:
    """Observation messages of a simulated season for one stream."""
    m = CompartmentalModel(load_model_spec(example_model_path(model)))
    truth = simulate_season(m, days, np.random.default_rng(seed))
    return [
        orjson.dumps(
            {
                "stream": stream,
                "period": (START + dt.timedelta(days=o.time)).isoformat(),
                "counts": {k: int(v) for k, v in o.values.items()},
            }
        )
        for o in truth.observations
    ]


def write_config(
    path: Path,
    bootstrap: str,
    topic: str,
    group: str,
    checkpoint_dir: Path,
    streams: list[str],
    particles: int = 400,
    metrics_port: int | None = None,
    out_prefix: str | None = None,
    checkpoint_topic: str | None = None,
    kafka_extra: str = "",
) -> Path:
    """A deployment config for ``casecloud serve`` over Kafka. With
    ``checkpoint_topic`` the checkpoints go to that compacted Kafka topic
    (``checkpoint_store = "kafka"``) instead of ``checkpoint_dir``.
    ``kafka_extra``: more lines for the ``[kafka]`` table."""
    out = out_prefix or topic
    store = f'checkpoint_store = "kafka"\ncheckpoint_topic = "{checkpoint_topic}"' if checkpoint_topic else ""
    stream_blocks = "\n".join(
        f"""
[[streams]]
id = "{s}"
model = "seir"
start = "{START.isoformat()}"
particles = {particles}
forecast_trajectories = 100

[[streams.alerts]]
name = "surge"
series = "onsets"
threshold = 150
horizon_days = 7
raise_level = 0.7
clear_level = 0.4
"""
        for s in streams
    )
    path.write_text(
        f"""
transport = "kafka"

[service]
seed = 11
checkpoint_dir = "{checkpoint_dir}"
{store}

[metrics]
enabled = {"true" if metrics_port is not None else "false"}
port = {metrics_port or 0}

[kafka]
bootstrap_servers = "{bootstrap}"
group_id = "{group}"
input_topic = "{topic}"
estimates_topic = "{out}.estimates"
alerts_topic = "{out}.alerts"
dead_letter_topic = "{out}.dead-letters"
session_timeout_ms = 6000
{kafka_extra}
{stream_blocks}
"""
    )
    return path


async def _produce(bootstrap: str, topic: str, messages: list[tuple[bytes, bytes]]) -> None:
    producer = AIOKafkaProducer(bootstrap_servers=bootstrap, acks="all")
    await producer.start()
    try:
        for key, value in messages:
            await producer.send_and_wait(topic, value=value, key=key)
    finally:
        await producer.stop()


def produce(bootstrap: str, topic: str, messages: list[tuple[bytes, bytes]]) -> None:
    asyncio.run(_produce(bootstrap, topic, messages))


async def _read_all(bootstrap: str, topic: str, timeout: float) -> list:
    consumer = AIOKafkaConsumer(bootstrap_servers=bootstrap, enable_auto_commit=False, group_id=None)
    await consumer.start()
    try:
        deadline = time.monotonic() + timeout
        partitions = None
        while partitions is None and time.monotonic() < deadline:
            # aiokafka's public topics() does not refresh the consumer's cached
            # cluster view, so ask the client for a fresh snapshot.
            cluster = await consumer._client.fetch_all_metadata()
            partitions = cluster.partitions_for_topic(topic)
            if partitions is None:
                await asyncio.sleep(0.2)
        if partitions is None:
            return []
        tps = [TopicPartition(topic, p) for p in sorted(partitions)]
        consumer.assign(tps)
        await consumer.seek_to_beginning(*tps)
        end = await consumer.end_offsets(tps)
        out = []
        async def behind() -> bool:
            return any([(await consumer.position(tp)) < end[tp] for tp in tps])

        while await behind() and time.monotonic() < deadline:
            batch = await consumer.getmany(timeout_ms=500)
            for msgs in batch.values():
                out.extend(msgs)
        return out
    finally:
        await consumer.stop()


def read_all(bootstrap: str, topic: str, timeout: float = 30.0) -> list:
    """Every record currently in ``topic`` (all partitions)."""
    return asyncio.run(_read_all(bootstrap, topic, timeout))


class ServiceProcess:
    """``casecloud serve`` in a child process, its log in a file."""

    def __init__(self, config: Path, log: Path) -> None:
        self.config, self.log = config, log
        self.proc: subprocess.Popen | None = None

    def start(self) -> "ServiceProcess":
        env = dict(os.environ, PYTHONUNBUFFERED="1")
        self._log = open(self.log, "ab")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--config", str(self.config)],
            stdout=self._log,
            stderr=subprocess.STDOUT,
            env=env,
        )
        return self

    def kill(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(30)
        self._log.close()

    def terminate(self, timeout: float = 60) -> int:
        assert self.proc is not None
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            code = self.proc.wait(timeout)
        finally:
            self._log.close()
        return code

    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def log_tail(self, n: int = 40) -> str:
        return "\n".join(self.log.read_text(errors="replace").splitlines()[-n:])


def newest_step(checkpoint_dir: Path, stream: str) -> int:
    """Step of the stream's newest checkpoint (0 when it has none)."""
    from service.state import LocalCheckpointStore

    infos = LocalCheckpointStore(checkpoint_dir).list(stream)
    return infos[0].step if infos else 0


def wait_for(predicate, timeout: float, what: str, process: ServiceProcess | None = None, interval: float = 0.2):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        if process is not None and not process.alive():
            raise AssertionError(f"service exited while waiting for {what}:\n{process.log_tail()}")
        time.sleep(interval)
    tail = process.log_tail() if process else ""
    raise AssertionError(f"timed out after {timeout}s waiting for {what}\n{tail}")
