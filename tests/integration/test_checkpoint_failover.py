"""The Kafka checkpoint store against a real broker, and fail-over between two
``casecloud serve`` processes that share nothing on disk.

Part 1 exercises :class:`service.state.kafka.KafkaCheckpointStore` itself:
a 10,000-particle two-band SEIR cloud and a checkpoint larger than several
chunks written and read back bit-identically, keep-K pruning by tombstones,
two store instances (two replicas) seeing each other's writes, and the fall
back over a damaged, a partly deleted and a half-written checkpoint.

Part 2 runs two service processes in one consumer group with
``checkpoint_store = "kafka"`` and separate local directories, stops one with
SIGTERM and later another with SIGKILL, and checks that the survivor restores
the streams it takes over from Kafka: every stream ends bit-identical to a
single-process run, and every period's estimate was published with one
content only (re-publication allowed only byte-identical).
"""

from __future__ import annotations

import asyncio
import hashlib
import re
import time
from collections import defaultdict
from pathlib import Path

import numpy as np
import orjson
import pytest
from aiokafka import AIOKafkaProducer
from aiokafka.admin import AIOKafkaAdminClient
from aiokafka.admin.config_resource import ConfigResource, ConfigResourceType

from filters import CompartmentalModel, FilterConfig, ParticleFilter, simulate_season, stream_generator
from kafka_helpers import ServiceProcess, read_all, season_messages, wait_for, write_config
from schemas import KafkaSettings, example_model_path, load_model_spec
from service.state.kafka import (
    KafkaCheckpointStore,
    chunk_headers,
    encode_chunk_key,
    pack,
    parse_key,
    partition_for,
)
from service.state import (
    Checkpoint,
    CheckpointCorrupt,
    CheckpointError,
    CheckpointMismatch,
    encode_checkpoint,
)
from service.cli import main as cli_main

pytestmark = pytest.mark.integration


# ------------------------------------------------------------------ helpers
def _store(bootstrap: str, topic: str, **kwargs) -> KafkaCheckpointStore:
    return KafkaCheckpointStore(KafkaSettings(bootstrap_servers=bootstrap), topic, **kwargs)


def _cloud(particles: int, steps: int) -> Checkpoint:
    """A real two-band SEIR cloud after ``steps`` assimilated days, as the service checkpoints it."""
    model = CompartmentalModel(load_model_spec(example_model_path("seir_two_band")))
    pf = ParticleFilter(model, FilterConfig(n_particles=particles), stream_generator(5, "cloud"), time=0)
    for observation in simulate_season(model, steps, np.random.default_rng(9)).observations:
        pf.step(observation, with_summary=False)
    header, arrays = pf.state()
    return Checkpoint("region-east|ed/β", pf.step_count, {"filter": header, "last_day": steps}, arrays)


def _noise(stream: str, step: int, nbytes: int, fingerprint: str = "fp-1") -> Checkpoint:
    """A checkpoint of incompressible float64 noise (``nbytes`` of array data)."""
    values = np.random.default_rng(step).random(nbytes // 8)
    return Checkpoint(stream, step, {"model_fingerprint": fingerprint}, {"noise": values})


async def _produce_raw(bootstrap: str, topic: str, records: list[tuple[bytes, bytes | None, list, int]]) -> None:
    producer = AIOKafkaProducer(bootstrap_servers=bootstrap, acks="all", max_request_size=2 * 1024 * 1024)
    await producer.start()
    try:
        for key, value, headers, partition in records:
            await producer.send_and_wait(topic, value=value, key=key, headers=headers, partition=partition)
    finally:
        await producer.stop()


def produce_raw(bootstrap: str, topic: str, records) -> None:
    asyncio.run(_produce_raw(bootstrap, topic, records))


async def _cleanup_policy(bootstrap: str, topic: str) -> str | None:
    admin = AIOKafkaAdminClient(bootstrap_servers=bootstrap)
    await admin.start()
    try:
        for response in await admin.describe_configs([ConfigResource(ConfigResourceType.TOPIC, topic, {"cleanup.policy": None})]):
            for resource in response.to_object()["resources"]:
                for entry in resource["config_entries"]:
                    if entry.get("config_names", entry.get("config_name")) == "cleanup.policy":
                        return entry["config_value"]
        return None
    finally:
        await admin.close()


def _records_of(bootstrap: str, topic: str, stream: str) -> list:
    return [r for r in read_all(bootstrap, topic) if (k := parse_key(r.key)) is not None and k.stream_id == stream]


# ------------------------------------------------------- part 1: the store
def test_large_cloud_round_trip_through_chunks_bit_identical(kafka_broker):
    bootstrap = kafka_broker.bootstrap_servers
    cloud = _cloud(10_000, steps=5)
    raw = encode_checkpoint(cloud)
    assert len(raw) > 2_000_000  # ~2.3 MB: four times the default 512 KiB chunk

    default = _store(bootstrap, "ckpt.big")  # 512 KiB chunks
    small = _store(bootstrap, "ckpt.big-small-chunks", chunk_bytes=64 * 1024)
    noise = _noise("noise", 1, 2_300_000)  # does not compress: 5 chunks of 512 KiB
    try:
        infos = [default.write(cloud), small.write(cloud), default.write(noise)]
        for store, checkpoint in ((default, cloud), (small, cloud), (default, noise)):
            data = store.read_bytes(checkpoint.stream_id)
            assert data == encode_checkpoint(checkpoint)  # bit-identical
            loaded = store.load_latest(checkpoint.stream_id, expected_fingerprint=None)
            assert loaded is not None and not loaded.skipped
            assert encode_checkpoint(loaded.checkpoint) == encode_checkpoint(checkpoint)
            for name, array in checkpoint.arrays.items():
                np.testing.assert_array_equal(loaded.checkpoint.arrays[name], array)
        print(f"10,000-particle seir_two_band cloud: {len(raw)} bytes, stored {infos[0].size_bytes} bytes zlib")
    finally:
        default.close()
        small.close()

    # What is in the topic: chunks no larger than the chunk size, the pointer after its chunks.
    for topic, stream, limit, count in (
        ("ckpt.big", cloud.stream_id, 512 * 1024, -(-infos[0].size_bytes // (512 * 1024))),
        ("ckpt.big-small-chunks", cloud.stream_id, 64 * 1024, -(-infos[1].size_bytes // (64 * 1024))),
        ("ckpt.big", "noise", 512 * 1024, 5),
    ):
        assert topic == "ckpt.big" or count > 1
        records = _records_of(bootstrap, topic, stream)
        chunks = [r for r in records if parse_key(r.key).step is not None]
        pointer = [r for r in records if parse_key(r.key).step is None]
        assert len(chunks) == count and count > 0 and all(0 < len(r.value) <= limit for r in chunks)
        assert len(pointer) == 1 and pointer[0].offset > max(r.offset for r in chunks)
        assert len({r.partition for r in records}) == 1
        whole = b"".join(r.value for r in sorted(chunks, key=lambda r: parse_key(r.key).chunk))
        sha = dict(chunks[0].headers)["casecloud-sha256"].decode()
        assert hashlib.sha256(whole).hexdigest() == sha
    assert asyncio.run(_cleanup_policy(bootstrap, "ckpt.big")) == "compact"


def test_keep_k_prunes_with_tombstones_and_replicas_see_each_other(kafka_broker):
    bootstrap = kafka_broker.bootstrap_servers
    topic = "ckpt.prune"
    one = _store(bootstrap, topic, keep=2, chunk_bytes=16 * 1024)
    two = _store(bootstrap, topic, keep=2, chunk_bytes=16 * 1024)
    try:
        for step in range(1, 6):
            one.write(_noise("ward|1", step, 40_000))
        assert [i.step for i in one.list("ward|1")] == [5, 4]
        # A second replica (its own clients, index built from the topic) sees the same.
        assert [i.step for i in two.list("ward|1")] == [5, 4]
        assert two.streams() == ["ward|1"]
        assert all(r.ok for r in two.verify("ward|1"))

        # Replica two takes the stream over and writes; replica one re-reads before answering.
        loaded = two.load_latest("ward|1", "fp-1")
        assert loaded.checkpoint.step == 5
        two.write(_noise("ward|1", 6, 40_000))
        again = one.load_latest("ward|1", "fp-1")
        assert again.checkpoint.step == 6 and encode_checkpoint(again.checkpoint) == encode_checkpoint(_noise("ward|1", 6, 40_000))
        assert [i.step for i in one.list("ward|1")] == [6, 5]

        # The same step written again (a re-processed record) replaces it in place.
        two.write(_noise("ward|1", 6, 40_000))
        assert [i.step for i in one.list("ward|1")] == [6, 5]
    finally:
        one.close()
        two.close()

    records = _records_of(bootstrap, topic, "ward|1")
    tombstoned = {parse_key(r.key).step for r in records if r.value is None}
    live: dict[bytes, object] = {}
    for r in records:  # what compaction will leave: the newest record per key
        live[r.key] = r
    steps_left = {parse_key(k).step for k, r in live.items() if r.value is not None and parse_key(k).step is not None}
    assert tombstoned == {1, 2, 3, 4}
    assert steps_left == {5, 6}
    # A fresh reader after closing: nothing cached anywhere.
    with _store(bootstrap, topic) as fresh:
        assert [i.step for i in fresh.list("ward|1")] == [6, 5]


def test_damaged_missing_and_half_written_checkpoints_fall_back(kafka_broker):
    bootstrap = kafka_broker.bootstrap_servers
    topic = "ckpt.damage"
    stream = "north/ed"
    store = _store(bootstrap, topic, keep=3, chunk_bytes=8 * 1024)
    try:
        for step in (1, 2, 3):
            store.write(_noise(stream, step, 30_000))
        part = partition_for(stream, 1)

        # A writer killed half way through step 4: chunks and no pointer. Not a checkpoint yet.
        blob, chunks = pack(4, encode_checkpoint(_noise(stream, 4, 30_000)), chunk_bytes=8 * 1024)
        produce_raw(bootstrap, topic, [(encode_chunk_key(stream, 4, i), chunks[i], chunk_headers(stream, blob, i), part) for i in range(2)])
        loaded = store.load_latest(stream, "fp-1")
        assert loaded.checkpoint.step == 3 and loaded.skipped == []

        # Step 3's chunk 1 is overwritten with a flipped byte: detected, step 2 is used and the skip reported.
        good = encode_checkpoint(_noise(stream, 3, 30_000))
        blob3, chunks3 = pack(3, good, chunk_bytes=8 * 1024)
        bad = bytearray(chunks3[1])
        bad[100] ^= 0xFF
        produce_raw(bootstrap, topic, [(encode_chunk_key(stream, 3, 1), bytes(bad), chunk_headers(stream, blob3, 1), part)])
        loaded = store.load_latest(stream, "fp-1")
        assert loaded.checkpoint.step == 2
        assert len(loaded.skipped) == 1 and "SHA-256" in loaded.skipped[0][1] and "000000000003" in str(loaded.skipped[0][0])
        reports = {r.step: r for r in store.verify(stream)}
        assert not reports[3].ok and reports[2].ok and reports[1].ok

        # Step 2 loses a chunk (a stray tombstone): step 1 is used, both skips reported, newest first.
        produce_raw(bootstrap, topic, [(encode_chunk_key(stream, 2, 0), None, [], part)])
        loaded = store.load_latest(stream, "fp-1")
        assert loaded.checkpoint.step == 1
        assert [str(p).rsplit("/", 1)[1] for p, _ in loaded.skipped] == ["000000000003", "000000000002"]
        assert "missing" in loaded.skipped[1][1]

        # Another model's fingerprint is refused outright.
        with pytest.raises(CheckpointMismatch, match="forget"):
            store.load_latest(stream, "fp-2")

        # All three damaged: CheckpointCorrupt lists every one.
        produce_raw(bootstrap, topic, [(encode_chunk_key(stream, 1, 0), None, [], part)])
        with pytest.raises(CheckpointCorrupt) as caught:
            store.load_latest(stream, "fp-1")
        assert len(caught.value.skipped) == 3

        # The next write supersedes the damage and prunes it (and the orphan of step 4).
        store.write(_noise(stream, 5, 30_000))
        assert store.load_latest(stream, "fp-1").checkpoint.step == 5
        assert store.forget(stream) > 0
        assert store.load_latest(stream, None) is None and stream not in store.streams()
    finally:
        store.close()


def test_a_topic_that_would_expire_checkpoints_is_refused(kafka_broker):
    kafka_broker.create_topic("ckpt.not-compacted", 1, configs={"cleanup.policy": "delete"})
    with _store(kafka_broker.bootstrap_servers, "ckpt.not-compacted") as store:
        with pytest.raises(CheckpointError, match="cleanup.policy=compact"):
            store.streams()


# ------------------------------------------------- part 2: service fail-over
STREAMS = [f"ward-{c}" for c in "abcdef"]
PARTITION = {s: i % 2 for i, s in enumerate(STREAMS)}
DAYS = 45
INPUT = "failover.observations"


def _produce_days(bootstrap: str, seasons: dict[str, list[bytes]], lo: int, hi: int) -> None:
    produce_raw(bootstrap, INPUT, [(s.encode(), seasons[s][d], [], PARTITION[s]) for d in range(lo, hi) for s in STREAMS])


def _assigned(process: ServiceProcess) -> set[int]:
    """The input partitions the process was given at its latest assignment (from its log)."""
    lines = re.findall(r"partitions assigned: (\[.*\])", process.log.read_text(errors="replace"))
    if not lines:
        return set()
    return {int(p) for topic, p in re.findall(r"\('([^']+)', (\d+)\)", lines[-1]) if topic == INPUT}


def _split_between(*processes: ServiceProcess) -> bool:
    """Every process owns a partition, and together they own both, once each."""
    owned = [_assigned(p) for p in processes]
    return all(owned) and sum(len(o) for o in owned) == 2 and set().union(*owned) == {0, 1}


def _first_estimate_after(bootstrap: str, streams: list[str], after: float) -> float:
    """Kafka timestamp (s) of the earliest estimate of ``streams`` published at or after ``after``."""
    return min(
        r.timestamp / 1000
        for r in read_all(bootstrap, f"{INPUT}.estimates")
        if r.timestamp / 1000 >= after and orjson.loads(r.value)["stream"] in streams
    )


def _steps(watch: KafkaCheckpointStore) -> dict[str, int]:
    out = {}
    for s in STREAMS:
        infos = watch.list(s)
        out[s] = infos[0].step if infos else 0
    return out


def test_failover_restores_streams_from_kafka_bit_identically(kafka_broker, tmp_path, capsys):
    """Two replicas, separate disks; SIGTERM one, later SIGKILL a third; the
    survivor restores the moved streams from the Kafka store and continues."""
    bootstrap = kafka_broker.bootstrap_servers
    kafka_broker.create_topic(INPUT, 2)
    seasons = {s: season_messages(s, DAYS, seed=i) for i, s in enumerate(STREAMS)}
    ckpt_topic = "failover.checkpoints"
    config = {
        name: write_config(
            tmp_path / f"{name}.toml", bootstrap, INPUT, "failover", tmp_path / f"{name}-local", STREAMS,
            particles=300, checkpoint_topic=ckpt_topic,
        )
        for name in ("a", "b", "a2")
    }
    watch = _store(bootstrap, ckpt_topic)
    figures: dict[str, float] = {}
    processes: list[ServiceProcess] = []

    def start(name: str, cfg: Path) -> ServiceProcess:
        processes.append(ServiceProcess(cfg, tmp_path / f"{name}.log").start())
        return processes[-1]

    try:
        _produce_days(bootstrap, seasons, 0, 15)
        a, b = start("a", config["a"]), start("b", config["b"])
        wait_for(lambda: _split_between(a, b), 60, "the two replicas to share the partitions", b)
        wait_for(lambda: set(_steps(watch).values()) == {15}, 120, "days 0-15 in both replicas", a)

        # Round 1: SIGTERM the first replica just after a backlog arrives for it.
        moved = [s for s in STREAMS if PARTITION[s] in _assigned(a)]
        _produce_days(bootstrap, seasons, 15, 24)
        stopped = time.time()
        assert a.terminate() == 0, a.log_tail()
        exited = time.time()  # everything published after this is the survivor's
        _produce_days(bootstrap, seasons, 24, 30)
        wait_for(lambda: set(_steps(watch).values()) == {30}, 120, "the survivor to finish days 15-30", b)
        assert _assigned(b) == {0, 1}
        figures["sigterm"] = _first_estimate_after(bootstrap, moved, exited) - stopped

        # Round 2: a new replica joins, takes a partition, and is SIGKILLed while it works.
        a2 = start("a2", config["a2"])
        wait_for(lambda: _split_between(a2, b), 60, "the new replica to own a partition", a2)
        moved = [s for s in STREAMS if PARTITION[s] in _assigned(a2)]
        _produce_days(bootstrap, seasons, 30, 38)
        wait_for(lambda: any(_steps(watch)[s] > 31 for s in moved), 60, "the new replica to make progress", a2, interval=0.02)
        killed = time.time()
        a2.kill()
        _produce_days(bootstrap, seasons, 38, DAYS)
        wait_for(lambda: set(_steps(watch).values()) == {DAYS}, 120, "the survivor to finish after the kill", b)
        assert _assigned(b) == {0, 1}
        figures["sigkill"] = _first_estimate_after(bootstrap, moved, killed) - killed
        assert b.terminate() == 0, b.log_tail()

        # The same input through one process, for comparison.
        ref_topic = "failover.ref.checkpoints"
        ref_cfg = write_config(
            tmp_path / "ref.toml", bootstrap, INPUT, "failover-ref", tmp_path / "ref-local", STREAMS,
            particles=300, out_prefix="failover.ref", checkpoint_topic=ref_topic,
        )
        ref = start("ref", ref_cfg)
        with _store(bootstrap, ref_topic) as ref_watch:
            wait_for(lambda: set(_steps(ref_watch).values()) == {DAYS}, 180, "the single-process run", ref)
            assert ref.terminate() == 0, ref.log_tail()
            for s in STREAMS:
                assert watch.read_bytes(s) == ref_watch.read_bytes(s), f"stream {s} differs from the single-process run"
                assert all(r.ok for r in watch.verify(s)) and len(watch.list(s)) <= 3
    finally:
        watch.close()
        for process in processes:
            if process.alive():
                process.kill()

    # Nothing went to disk: the replicas' local checkpoint directories were never used.
    for name in ("a", "b", "a2", "ref"):
        local = tmp_path / f"{name}-local"
        assert not local.exists() or not any(local.iterdir()), f"{local} holds files"

    # Every period estimated, re-publications byte-identical, and equal to the single run's.
    def by_period(topic: str) -> dict[tuple[str, str], set[bytes]]:
        out: dict[tuple[str, str], set[bytes]] = defaultdict(set)
        for r in read_all(bootstrap, topic):
            e = orjson.loads(r.value)
            out[(e["stream"], e["period"])].add(r.value)
        return out

    pair, single = by_period(f"{INPUT}.estimates"), by_period("failover.ref.estimates")
    assert len(single) == len(pair) == DAYS * len(STREAMS)
    for key, values in pair.items():
        assert len(values) == 1, f"{key} was estimated twice with different content"
        assert values == single[key], f"{key} differs from the single-process run"

    # The operator's view of the same topic: casecloud checkpoint verify|show with the replicas' config.
    capsys.readouterr()
    assert cli_main(["checkpoint", "verify", "--config", str(config["b"])]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 3 * len(STREAMS) and all(line.endswith("\tok") for line in lines)
    assert cli_main(["checkpoint", "show", "--config", str(config["a"]), "--stream", "ward-c", "--json"]) == 0
    shown = orjson.loads(capsys.readouterr().out)
    assert shown["ok"] and shown["step"] == DAYS and shown["path"] == f"kafka:{ckpt_topic}/ward-c/{DAYS:012d}"
    with capsys.disabled():
        print(f"\nrecovery (stop -> survivor's first estimate of the moved streams): "
              f"SIGTERM {figures['sigterm']:.2f} s, SIGKILL {figures['sigkill']:.2f} s (session timeout 6 s)")
