"""The store's clients and its in-memory index of the checkpoint topic.

Everything here runs on the store's private event loop (:mod:`.loop`).
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from aiokafka import AIOKafkaConsumer, AIOKafkaProducer, TopicPartition
from aiokafka import errors as kafka_errors
from aiokafka.admin import AIOKafkaAdminClient, NewTopic
from aiokafka.admin.config_resource import ConfigResource, ConfigResourceType

from schemas import KafkaSettings

from ...errors import ServiceError
from ..format import (
    CheckpointError,
)
from .records import (
    BROKER_DEFAULT_MAX_MESSAGE,
    RECORD_OVERHEAD,
    Blob,
    _require_chunks,
    blob_from_headers,
    chunk_headers,
    decode_pointer,
    encode_chunk_key,
    encode_pointer,
    encode_pointer_key,
    parse_key,
    partition_for,
    unpack,
)

log = logging.getLogger("casecloud.checkpoints.kafka")
# -------------------------------------------------------------------- index
@dataclass
class _ChunkRef:
    partition: int
    offset: int
    blob: Blob  # what the record's headers describe


@dataclass
class _StreamIndex:
    pointer: list[Blob] | None = None  # None: no (readable) pointer record
    pointer_problem: str | None = None
    chunks: dict[int, dict[int, _ChunkRef]] = field(default_factory=dict)  # step -> chunk index -> ref

    def empty(self) -> bool:
        return self.pointer is None and self.pointer_problem is None and not self.chunks


class _Vanished(Exception):
    """A record the index knew of was gone when fetched (pruned and compacted meanwhile)."""


def _explain(exc: BaseException, what: str) -> str:
    """The transport's most specific wording for a Kafka client error."""
    from ...transports.kafka import translate_error

    return str(translate_error(exc, what))


class _Engine:
    """Everything that lives on the private event loop: clients and the index."""

    def __init__(self, settings: KafkaSettings, topic: str, *, chunk_bytes: int, partitions: int,
                 replication_factor: int | None, topic_config: Mapping[str, str]) -> None:
        self.settings = settings
        self.topic = topic
        self.chunk_bytes = chunk_bytes
        self.new_partitions = partitions
        self.replication_factor = replication_factor
        self.topic_config = dict(topic_config)
        self.producer: AIOKafkaProducer | None = None
        self.consumer: AIOKafkaConsumer | None = None
        self.tps: list[TopicPartition] = []
        self.scanned: dict[TopicPartition, int] = {}
        self.index: dict[str, _StreamIndex] = {}
        self.caught_up_once = False
        self._lock: asyncio.Lock | None = None

    # ----------------------------------------------------------- lifecycle
    @property
    def lock(self) -> asyncio.Lock:
        if self._lock is None:
            self._lock = asyncio.Lock()
        return self._lock

    def _where(self) -> str:
        return f"Kafka checkpoint topic {self.topic!r} at {self.settings.bootstrap_servers}"

    async def start(self) -> None:
        if self.consumer is not None:
            return
        s = self.settings
        from ...transports.kafka import client_security

        security = client_security(s)  # exactly as the transport connects
        client_id = f"{s.client_id}-checkpoints"
        try:
            partitions = await self._ensure_topic(client_id, security)
            self.producer = AIOKafkaProducer(
                bootstrap_servers=s.bootstrap_servers,
                client_id=client_id,
                acks="all",
                enable_idempotence=True,
                linger_ms=0,
                max_request_size=self.chunk_bytes + RECORD_OVERHEAD,
                **security,
            )
            await self.producer.start()
            self.consumer = AIOKafkaConsumer(
                bootstrap_servers=s.bootstrap_servers,
                client_id=client_id,
                group_id=None,
                enable_auto_commit=False,
                auto_offset_reset="earliest",
                max_partition_fetch_bytes=max(4 * 1024 * 1024, self.chunk_bytes + RECORD_OVERHEAD),
                **security,
            )
            await self.consumer.start()
        except BaseException as exc:
            await self.stop()
            if isinstance(exc, ServiceError) or not isinstance(exc, Exception):
                raise
            raise CheckpointError(_explain(exc, f"open the {self._where()}")) from exc
        self.tps = [TopicPartition(self.topic, p) for p in range(partitions)]
        self.consumer.assign(self.tps)
        self.consumer.pause(*self.tps)
        self.scanned = {tp: 0 for tp in self.tps}
        self.index.clear()
        self.caught_up_once = False

    async def stop(self) -> None:
        from ...transports.kafka import stop_quietly

        await stop_quietly(self.consumer, self.producer, what="checkpoint-store Kafka client")
        self.consumer = self.producer = None
        self.index.clear()
        self.caught_up_once = False

    async def _ensure_topic(self, client_id: str, security: dict[str, Any]) -> int:
        """Create the topic (compacted) if missing, check its cleanup policy, return its partition count."""
        admin = AIOKafkaAdminClient(bootstrap_servers=self.settings.bootstrap_servers, client_id=client_id, **security)
        await admin.start()
        try:
            rf = self.replication_factor
            if rf is None:
                rf = max(1, min(3, len((await admin.describe_cluster())["brokers"])))
            configs = {
                "cleanup.policy": "compact",
                "min.insync.replicas": "2" if rf >= 3 else "1",
                "segment.ms": str(3_600_000),
                "segment.bytes": str(64 * 1024 * 1024),
                "max.message.bytes": str(max(BROKER_DEFAULT_MAX_MESSAGE, self.chunk_bytes + RECORD_OVERHEAD)),
                **self.topic_config,
            }
            response = await admin.create_topics([NewTopic(self.topic, self.new_partitions, rf, topic_configs=configs)])
            for name, code, message in response.topic_errors:
                if code == 0:
                    log.info("created checkpoint topic %s (%d partitions, replication %d, %s)", name, self.new_partitions, rf, configs)
                elif code != kafka_errors.TopicAlreadyExistsError.errno:
                    raise CheckpointError(
                        f"cannot create the {self._where()} with {configs}: "
                        f"{kafka_errors.for_code(code).__name__}: {message}"
                    )
            policy = None
            # A topic another replica has just created may not show its
            # configs yet: ask again for a few seconds before judging.
            for attempt in range(20):
                described = await admin.describe_configs(
                    [ConfigResource(ConfigResourceType.TOPIC, self.topic, {"cleanup.policy": None})]
                )
                for response in described:
                    for resource in response.to_object()["resources"]:
                        for entry in resource["config_entries"]:
                            if (entry.get("config_names") or entry.get("config_name")) == "cleanup.policy":
                                policy = entry["config_value"]
                if policy is not None:
                    break
                await asyncio.sleep(0.25)
            if policy is None or {p.strip() for p in policy.split(",")} != {"compact"}:
                raise CheckpointError(
                    f"the {self._where()} has cleanup.policy={policy!r}; a checkpoint topic must have "
                    "cleanup.policy=compact (with 'delete' the checkpoint of an idle stream would expire). "
                    f"Change it (kafka-configs --alter --entity-type topics --entity-name {self.topic} "
                    "--add-config cleanup.policy=compact) or configure another checkpoint_topic."
                )
            topics = await admin.describe_topics([self.topic])
            found = [t for t in topics if t["topic"] == self.topic and t["error_code"] == 0]
            if not found or not found[0]["partitions"]:
                raise CheckpointError(f"the {self._where()} has no partitions in the cluster metadata: {topics}")
            return len(found[0]["partitions"])
        finally:
            await admin.close()

    # ---------------------------------------------------------------- index
    def _apply(self, partition: int, offset: int, key: bytes | None, value: bytes | None, headers: Any) -> None:
        parsed = parse_key(key)
        if parsed is None:
            return  # not a record of this store
        st = self.index.setdefault(parsed.stream_id, _StreamIndex())
        if parsed.step is None:
            st.pointer, st.pointer_problem = None, None
            if value is not None:
                try:
                    st.pointer = decode_pointer(value, parsed.stream_id)
                except ValueError as exc:
                    st.pointer_problem = f"the pointer record (partition {partition}, offset {offset}) is unreadable: {exc}"
        else:
            assert parsed.chunk is not None
            steps = st.chunks.setdefault(parsed.step, {})
            blob = blob_from_headers(headers, parsed) if value is not None else None
            if blob is None:
                # A tombstone (or a record whose headers do not describe it: unusable either way).
                steps.pop(parsed.chunk, None)
                if not steps:
                    del st.chunks[parsed.step]
            else:
                steps[parsed.chunk] = _ChunkRef(partition, offset, blob)
        if st.empty():
            del self.index[parsed.stream_id]

    async def catch_up(self) -> None:
        """Read every partition from where the index stopped to its current end."""
        assert self.consumer is not None
        consumer = self.consumer
        end = await consumer.end_offsets(self.tps)
        for tp in self.tps:
            if self.scanned[tp] >= end[tp]:
                continue
            consumer.seek(tp, self.scanned[tp])
            consumer.resume(tp)
            try:
                while True:
                    batch = await consumer.getmany(tp, timeout_ms=1000, max_records=1000)
                    for record in batch.get(tp, ()):
                        self._apply(tp.partition, record.offset, record.key, record.value, record.headers)
                    position = await consumer.position(tp)
                    if position >= end[tp]:
                        break
            finally:
                consumer.pause(tp)
            self.scanned[tp] = position
        self.caught_up_once = True

    async def _fetch(self, wanted: dict[tuple[int, int], bytes]) -> dict[tuple[int, int], bytes]:
        """Values of the records at ``(partition, offset)`` whose key is as given; _Vanished if one is gone."""
        assert self.consumer is not None
        consumer = self.consumer
        found: dict[tuple[int, int], bytes] = {}
        by_partition: dict[int, list[int]] = {}
        for partition, offset in wanted:
            by_partition.setdefault(partition, []).append(offset)
        for partition, offsets in sorted(by_partition.items()):
            tp = TopicPartition(self.topic, partition)
            last = max(offsets)
            consumer.seek(tp, min(offsets))
            consumer.resume(tp)
            try:
                while True:
                    batch = await consumer.getmany(tp, timeout_ms=1000, max_records=100)
                    for record in batch.get(tp, ()):
                        spot = (partition, record.offset)
                        if spot in wanted and record.key == wanted[spot] and record.value is not None:
                            found[spot] = record.value
                    if await consumer.position(tp) > last:
                        break
            finally:
                consumer.pause(tp)
        if len(found) != len(wanted):
            raise _Vanished()
        return found

    # ------------------------------------------------------------ queries
    def _candidates(self, stream_id: str, path_of) -> tuple[list[Blob], list[tuple[Path, str]]]:
        """The checkpoints to try, newest first, and problems already known (an unreadable pointer)."""
        st = self.index.get(stream_id)
        if st is None:
            return [], []
        if st.pointer is not None:
            return list(st.pointer), []
        if st.pointer_problem is None:
            return [], []  # chunks without a pointer: a first write that never completed
        blobs: list[Blob] = []
        for step in sorted(st.chunks, reverse=True):
            newest = max(st.chunks[step].values(), key=lambda ref: ref.offset)
            blobs.append(newest.blob)
        return blobs, [(Path(str(path_of(stream_id, None))), st.pointer_problem)]

    async def blob_bytes(self, stream_id: str, blob: Blob) -> bytes:
        """The checkpoint file bytes of ``blob``: ChunkProblem if damaged, _Vanished if pruned meanwhile."""
        st = self.index.get(stream_id)
        refs = st.chunks.get(blob.step, {}) if st is not None else {}
        usable = {i: ref for i, ref in refs.items() if ref.blob == blob}
        _require_chunks(blob, usable)
        keys = {(ref.partition, ref.offset): encode_chunk_key(stream_id, blob.step, i) for i, ref in usable.items()}
        values = await self._fetch(keys)
        return unpack(blob, {i: values[(ref.partition, ref.offset)] for i, ref in usable.items()})

    def retained(self, stream_id: str) -> list[Blob]:
        st = self.index.get(stream_id)
        if st is None:
            return []
        if st.pointer is not None:
            return list(st.pointer)
        return self._candidates(stream_id, lambda s, n: "")[0]

    # ---------------------------------------------------------------- write
    async def write(self, stream_id: str, blob: Blob, chunks: list[bytes], keep: int) -> None:
        assert self.producer is not None and self.tps
        if not self.caught_up_once:
            await self.catch_up()  # learn the stream's retained checkpoints before replacing the pointer
        partition = partition_for(stream_id, len(self.tps))
        sends = []
        for i, chunk in enumerate(chunks):
            sends.append(await self.producer.send(
                self.topic, value=chunk, key=encode_chunk_key(stream_id, blob.step, i),
                partition=partition, headers=chunk_headers(stream_id, blob, i),
            ))
        metas = await asyncio.gather(*sends)
        for i, meta in enumerate(metas):
            self._apply(meta.partition, meta.offset, encode_chunk_key(stream_id, blob.step, i), chunks[i], chunk_headers(stream_id, blob, i))
        keepers = [blob] + [b for b in self.retained(stream_id) if b.step != blob.step]
        keepers = sorted(keepers, key=lambda b: b.step, reverse=True)[:keep]
        pointer = encode_pointer(stream_id, keepers)
        meta = await (await self.producer.send(self.topic, value=pointer, key=encode_pointer_key(stream_id), partition=partition))
        self._apply(meta.partition, meta.offset, encode_pointer_key(stream_id), pointer, None)
        try:
            await self._prune(stream_id, partition)
        except Exception as exc:  # the checkpoint is durable; the next write prunes again
            log.warning("stream %s: pruning old checkpoints in topic %s failed: %s", stream_id, self.topic, exc)

    def _dead_keys(self, stream_id: str) -> list[bytes]:
        st = self.index.get(stream_id)
        if st is None:
            return []
        live = {b.step: b for b in (st.pointer or [])}
        dead = []
        for step, refs in st.chunks.items():
            for i, ref in refs.items():
                blob = live.get(step)
                if blob is None or ref.blob != blob:
                    dead.append(encode_chunk_key(stream_id, step, i))
        return sorted(dead)

    async def _prune(self, stream_id: str, partition: int) -> None:
        assert self.producer is not None
        dead = self._dead_keys(stream_id)
        sends = [await self.producer.send(self.topic, value=None, key=key, partition=partition) for key in dead]
        for key, meta in zip(dead, await asyncio.gather(*sends)):
            self._apply(meta.partition, meta.offset, key, None, None)

    async def forget(self, stream_id: str) -> int:
        """Tombstone every record of the stream; returns how many."""
        assert self.producer is not None and self.tps
        await self.catch_up()
        st = self.index.get(stream_id)
        if st is None:
            return 0
        partition = partition_for(stream_id, len(self.tps))
        keys = [encode_chunk_key(stream_id, step, i) for step, refs in st.chunks.items() for i in refs]
        keys.append(encode_pointer_key(stream_id))
        sends = [await self.producer.send(self.topic, value=None, key=key, partition=partition) for key in keys]
        for key, meta in zip(keys, await asyncio.gather(*sends)):
            self._apply(meta.partition, meta.offset, key, None, None)
        return len(keys)


