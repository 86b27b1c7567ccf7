"""Smoke tests of the local Kafka broker with two independent clients:
aiokafka (what casecloud uses) and kcat (librdkafka, from Debian)."""

from __future__ import annotations

import asyncio
import json
import shutil
import subprocess
import uuid

import pytest
from aiokafka import AIOKafkaConsumer, AIOKafkaProducer

pytestmark = pytest.mark.integration  # starts the broker: excluded by -m "not integration"

IO_TIMEOUT = 60.0  # seconds for any one client round trip


def _topic(prefix: str) -> str:
    return f"{prefix}-{uuid.uuid4().hex[:10]}"


def _kcat() -> str:
    kcat = shutil.which("kcat")
    if kcat is None:
        pytest.fail("kcat is not installed (needed as an independent Kafka client); "
                    "run: apt-get install -y kcat")
    return kcat


async def _produce(bootstrap: str, topic: str, messages) -> None:
    producer = AIOKafkaProducer(bootstrap_servers=bootstrap, acks="all")
    await producer.start()
    try:
        for key, value, headers in messages:
            await producer.send_and_wait(topic, value=value, key=key, headers=headers)
    finally:
        await producer.stop()


async def _consume(bootstrap: str, topic: str, group: str, count: int, commit: bool = False):
    """Read ``count`` records from the start of ``topic``; return them and,
    if ``commit``, the group's committed offsets per partition after a commit."""
    consumer = AIOKafkaConsumer(
        topic,
        bootstrap_servers=bootstrap,
        group_id=group,
        enable_auto_commit=False,
        auto_offset_reset="earliest",
    )
    await consumer.start()
    try:
        records = []
        loop = asyncio.get_running_loop()
        deadline = loop.time() + IO_TIMEOUT
        while len(records) < count:
            if loop.time() > deadline:
                raise AssertionError(f"got {len(records)} of {count} records from {topic} in {IO_TIMEOUT}s: {records}")
            batches = await consumer.getmany(timeout_ms=500)
            for batch in batches.values():
                records.extend(batch)
        committed = {}
        if commit:
            await consumer.commit()
            for tp in consumer.assignment():
                committed[tp.partition] = await consumer.committed(tp)
        return records, committed
    finally:
        await consumer.stop()


def test_aiokafka_round_trip(kafka_broker):
    topic = _topic("smoke-aiokafka")
    kafka_broker.create_topic(topic, partitions=2)
    sent = [
        (b"region-1", b'{"cases": 3}', [("source", b"sensor-a"), ("seq", b"1")]),
        (b"region-2", b'{"cases": 5}', [("source", b"sensor-b"), ("seq", b"2")]),
        (b"region-3", b'{"cases": 8}', [("source", b"sensor-c"), ("seq", b"3")]),
    ]
    group = f"smoke-group-{uuid.uuid4().hex[:8]}"

    async def scenario():
        await _produce(kafka_broker.bootstrap_servers, topic, sent)
        return await _consume(kafka_broker.bootstrap_servers, topic, group, len(sent), commit=True)

    records, committed = asyncio.run(asyncio.wait_for(scenario(), 2 * IO_TIMEOUT))

    got = {r.key: (r.value, list(r.headers)) for r in records}
    assert len(records) == 3
    assert got == {key: (value, headers) for key, value, headers in sent}
    assert {r.partition for r in records} <= {0, 1}
    # manual commit: the group's offsets cover exactly the three records
    assert set(committed) == {0, 1}
    assert sum(committed.values()) == 3


def test_kcat_interoperates_with_aiokafka(kafka_broker):
    kcat = _kcat()
    bootstrap = kafka_broker.bootstrap_servers

    # kcat produces, aiokafka consumes
    topic_in = _topic("smoke-kcat-in")
    kafka_broker.create_topic(topic_in, partitions=2)
    lines = {b"k1": b"alpha", b"k2": b"beta gamma", b"k3": b'{"x": 1}'}
    stdin = b"".join(k + b":" + v + b"\n" for k, v in lines.items())
    proc = subprocess.run(
        [kcat, "-P", "-b", bootstrap, "-t", topic_in, "-K:", "-X", "acks=all"],
        input=stdin, capture_output=True, timeout=IO_TIMEOUT,
    )
    assert proc.returncode == 0, f"kcat -P failed ({proc.returncode}): {proc.stderr.decode(errors='replace')}"
    records, _ = asyncio.run(asyncio.wait_for(
        _consume(bootstrap, topic_in, f"smoke-kcat-{uuid.uuid4().hex[:8]}", len(lines)), 2 * IO_TIMEOUT))
    assert {r.key: r.value for r in records} == lines

    # aiokafka produces, kcat consumes
    topic_out = _topic("smoke-kcat-out")
    kafka_broker.create_topic(topic_out, partitions=2)
    sent = [
        (b"a", b"first", [("h1", b"x")]),
        (b"b", b"second", [("h1", b"y"), ("h2", b"z")]),
        (b"c", b"third", []),
    ]
    asyncio.run(asyncio.wait_for(_produce(bootstrap, topic_out, sent), IO_TIMEOUT))
    proc = subprocess.run(
        [kcat, "-C", "-b", bootstrap, "-t", topic_out, "-o", "beginning", "-e", "-J", "-q"],
        capture_output=True, timeout=IO_TIMEOUT,
    )
    assert proc.returncode == 0, f"kcat -C failed ({proc.returncode}): {proc.stderr.decode(errors='replace')}"
    out = [json.loads(line) for line in proc.stdout.decode().splitlines() if line.strip()]
    assert len(out) == 3, out
    by_key = {}
    for msg in out:
        assert msg["topic"] == topic_out
        flat = msg.get("headers") or []  # kcat -J: ["name1", "value1", "name2", ...]
        by_key[msg["key"]] = (msg["payload"], list(zip(flat[0::2], flat[1::2])))
    assert by_key == {
        "a": ("first", [("h1", "x")]),
        "b": ("second", [("h1", "y"), ("h2", "z")]),
        "c": ("third", []),
    }
