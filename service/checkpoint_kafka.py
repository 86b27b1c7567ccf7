"""Checkpoints on a compacted Kafka topic, so a stream can move between replicas.

:class:`KafkaCheckpointStore` implements :class:`~service.checkpoints.CheckpointStore`
on one Kafka topic with ``cleanup.policy=compact``. Every replica of a
consumer group reads and writes the same topic, so when a partition of the
input topic moves to another replica, the new owner loads the stream's newest
checkpoint from Kafka instead of from a disk it cannot see. Selected with
``[service] checkpoint_store = "kafka"``; the ``[kafka]`` section's bootstrap
servers and security settings are used, and ``checkpoint_topic`` names the topic.

What is stored
--------------
Exactly the bytes of the local file format (:func:`~service.checkpoints.encode_checkpoint`:
magic, version, JSON header, arrays, trailing SHA-256), compressed with
**zlib** (level 1 by default), then split into chunks of at most
``chunk_bytes`` (512 KiB by default, half the broker's default 1 MiB
``message.max.bytes``, leaving room for key, headers and batch overhead).

zlib, not lzma: a checkpoint is written after every assimilated message, on
the service's critical path (overlapped with the next step, but on the same
CPUs). Measured on a 10,000-particle ``seir_two_band`` cloud (2.32 MB file):
zlib level 1 stores 0.44 MB fresh from the prior and 0.68 MB after 30
assimilated days (jittered parameters compress less), a whole write takes
~40-46 ms and a load ~15-20 ms; lzma preset 0 stores 0.35 / 0.50 MB but a
write takes ~110-170 ms and a load ~50-70 ms. A 25-35% smaller topic is not
worth three times the CPU per message. ``codec="lzma"`` is available for
deployments that prefer a smaller topic; the codec is recorded per
checkpoint, so readers handle both.

Records (all of one stream go to one partition, see below)::

    key                              value                              role
    <sid>|<step:012d>|<chunk:06d>    compressed bytes [i*C, (i+1)*C)    one chunk
    <sid>                            pointer (JSON, below)              commit marker
    either of the above              null                               tombstone (deletion)

``<sid>`` is :func:`~service.checkpoints.encode_stream_id` of the stream id
(the directory name of the local store): reversible, ASCII, never contains
``|``, so keys cannot collide whatever the stream id holds. Chunk records
carry headers that describe the whole checkpoint (``casecloud-kind`` = chunk,
``casecloud-stream`` = the raw id, ``casecloud-step``, ``casecloud-chunk``,
``casecloud-chunks`` (count), ``casecloud-sha256`` (hex digest of the whole
compressed blob), ``casecloud-codec``, ``casecloud-stored-bytes``,
``casecloud-bytes`` (uncompressed size), ``casecloud-format`` = 1).

The pointer value is JSON (keys sorted)::

    {"format": 1, "stream_id": "<id>",
     "checkpoints": [{"step": 42, "chunks": 1, "sha256": "<hex>", "codec": "zlib",
                      "stored_bytes": 379803, "bytes": 2320992}, ...]}   newest first

It lists the retained checkpoints (at most ``keep``), newest first; the first
entry is the newest complete step.

Write protocol (one :meth:`~KafkaCheckpointStore.write`)
--------------------------------------------------------
1. Encode, compress, split, hash (in the calling thread).
2. Send every chunk with ``acks=all`` (idempotent producer) and wait until
   all are acknowledged.
3. Only then send the pointer naming the new step plus the previously retained
   ones (at most ``keep`` in all), and wait for its acknowledgement. ``write``
   returns after this: the checkpoint is durable.
4. Prune: tombstones for every chunk key of the stream that the new pointer
   does not cover (older steps beyond ``keep``, leftovers of an interrupted
   write, surplus chunks of a re-written step). Compaction then removes them.
   A failed prune is logged, not raised (the checkpoint is already durable);
   the next write prunes again.

A reader never sees a half-written checkpoint: all of a stream's records are
in one partition (the first 8 bytes of the SHA-256 of the UTF-8 stream id,
big-endian, modulo the partition count: fixed for the topic's life, so do not
add partitions to the checkpoint topic), Kafka keeps their order within a
partition, and the pointer comes after its chunks. A writer killed
between steps 2 and 3 leaves chunks that no pointer names: they are ignored
by readers and tombstoned by the stream's next write (the service re-writes
the same step when it re-processes the record).

Reading
-------
The store keeps an index in memory: for each stream, its pointer and the
partition/offset/headers of every live chunk record (never the chunk bytes).
Before answering :meth:`~KafkaCheckpointStore.load_latest`, ``list``,
``streams``, ``verify`` or ``read_bytes`` it reads the topic from where it
stopped to the current end offsets, so it sees what other replicas wrote
since. The first read scans the whole topic; compaction keeps it at about
``keep`` checkpoints per stream. Loading a checkpoint then fetches only its
chunks, by offset. Writes update the index with their own offsets, so a
replica that writes a stream does not re-read the topic for each write (the
service loads a stream, which brings the index up to date, whenever it gets
the stream's partition).

``load_latest`` tries the pointer's checkpoints newest first. A checkpoint
whose chunk is missing, whose reassembled bytes do not match the SHA-256, or
whose decompressed file fails the file format's own checks is skipped and
listed in ``LoadResult.skipped`` (as ``(pseudo path, reason)``), and the next
older one is tried, as in the local store; if none is readable,
``CheckpointCorrupt`` lists them all. A model fingerprint that differs from the
expected one raises ``CheckpointMismatch`` at once. If a chunk disappears
between indexing and fetching (another writer pruned it and compaction ran),
the load re-reads the topic and starts over (three attempts). An unreadable
pointer is reported in ``skipped`` and the complete chunk sets found in the
topic are tried instead.

Paths: the ``path`` of ``CheckpointInfo``, ``LoadResult`` and ``VerifyReport``
is a pseudo path ``kafka:<topic>/<sid>/<step:012d>`` (there is no file).
``CheckpointInfo.size_bytes`` is the stored (compressed) size.

Retention and compaction: the store creates the topic when it is missing,
with ``cleanup.policy=compact``, ``segment.ms`` = 1 h and ``segment.bytes`` =
64 MiB (so that closed segments, the only ones compaction cleans, appear
often), ``max.message.bytes`` large enough for a chunk, one partition,
replication factor min(3, brokers) and ``min.insync.replicas`` 2 when there
are three replicas (so an acknowledged ``acks=all`` write is on two brokers),
else 1. Operators may create the topic themselves with other settings, but
it must have ``cleanup.policy=compact`` (a ``delete`` policy would expire the
checkpoint of an idle stream): otherwise the store refuses to start.
Tombstones stay readable for the topic's ``delete.retention.ms`` (1 day by
default) before compaction drops them. :meth:`~KafkaCheckpointStore.forget`
tombstones every record of one stream: the deliberate reset after a model
change, which ``CheckpointMismatch`` advises.

Assumptions, as for the local store: one writer per stream at a time (Kafka
partition ownership of the input topic gives the service that). The API is
synchronous, for ``asyncio.to_thread``: a private asyncio event loop in a
daemon thread owns a long-lived producer and a consumer (no group, manually
assigned, paused while idle); calls are serialised. The stream registry
also loads a stream lazily from the service's event loop thread: that call
blocks the service loop as a local file read would, and cannot deadlock,
since the store's I/O runs on its own loop. :meth:`close` stops the clients
(the service closes a store it built when ``run`` ends); the store starts
them again if it is used after closing. No network traffic happens before
the first call.
"""

from __future__ import annotations

import asyncio
import builtins
import concurrent.futures
import hashlib
import logging
import lzma
import threading
import time
import weakref
import zlib
from collections.abc import Coroutine, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import orjson
from aiokafka import AIOKafkaConsumer, AIOKafkaProducer, TopicPartition
from aiokafka import errors as kafka_errors
from aiokafka.admin import AIOKafkaAdminClient, NewTopic
from aiokafka.admin.config_resource import ConfigResource, ConfigResourceType

from schemas import KafkaSettings

from .checkpoints import (
    MAX_STEP,
    STEP_DIGITS,
    Checkpoint,
    CheckpointCorrupt,
    CheckpointError,
    CheckpointInfo,
    CheckpointMismatch,
    CheckpointStore,
    LoadResult,
    VerifyReport,
    decode_checkpoint,
    decode_stream_id,
    encode_checkpoint,
    encode_stream_id,
    model_fingerprint_of,
)
from .errors import ServiceError

__all__ = [
    "DEFAULT_CHUNK_BYTES",
    "STORE_FORMAT",
    "Blob",
    "ChunkProblem",
    "KafkaCheckpointMismatch",
    "KafkaCheckpointStore",
    "ParsedKey",
    "chunk_headers",
    "decode_pointer",
    "encode_chunk_key",
    "encode_pointer",
    "encode_pointer_key",
    "blob_from_headers",
    "pack",
    "parse_key",
    "partition_for",
    "split_chunks",
    "unpack",
]

log = logging.getLogger("casecloud.checkpoints.kafka")

STORE_FORMAT = 1
DEFAULT_CHUNK_BYTES = 512 * 1024
MIN_CHUNK_BYTES = 1024
MAX_CHUNK_BYTES = 64 * 1024 * 1024
CHUNK_DIGITS = 6
MAX_CHUNKS = 10**CHUNK_DIGITS - 1
RECORD_OVERHEAD = 64 * 1024  # key, headers, batch header: far less than this
BROKER_DEFAULT_MAX_MESSAGE = 1_048_588
CODECS = ("zlib", "lzma")
DEFAULT_LEVEL = {"zlib": 1, "lzma": 0}
LOAD_ATTEMPTS = 3
HEADER_PREFIX = "casecloud-"

T = TypeVar("T")


# ------------------------------------------------------------------- format
class ChunkProblem(ValueError):
    """Stored chunks do not reassemble into the checkpoint they describe (``reason``)."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


@dataclass(frozen=True)
class Blob:
    """One stored checkpoint: its step and how its compressed bytes are chunked."""

    step: int
    chunks: int
    sha256: str  # hex SHA-256 of the whole compressed blob (all chunks joined)
    codec: str
    stored_bytes: int  # compressed size
    raw_bytes: int  # size of the checkpoint file bytes

    def to_json(self) -> dict[str, Any]:
        return {
            "step": self.step,
            "chunks": self.chunks,
            "sha256": self.sha256,
            "codec": self.codec,
            "stored_bytes": self.stored_bytes,
            "bytes": self.raw_bytes,
        }

    @classmethod
    def from_json(cls, obj: Any, where: str) -> "Blob":
        if not isinstance(obj, dict):
            raise ValueError(f"{where} is {type(obj).__name__}; an object is required")
        try:
            blob = cls(
                step=obj["step"],
                chunks=obj["chunks"],
                sha256=obj["sha256"],
                codec=obj["codec"],
                stored_bytes=obj["stored_bytes"],
                raw_bytes=obj["bytes"],
            )
        except KeyError as exc:
            raise ValueError(f"{where} lacks the field {exc.args[0]!r}") from None
        blob.check(where)
        return blob

    def check(self, where: str) -> None:
        for name, value, low, high in (
            ("step", self.step, 0, MAX_STEP),
            ("chunks", self.chunks, 1, MAX_CHUNKS),
            ("stored_bytes", self.stored_bytes, 0, 2**62),
            ("bytes", self.raw_bytes, 0, 2**62),
        ):
            if type(value) is not int or not low <= value <= high:
                raise ValueError(f"{where}: {name} is {value!r}; an integer in [{low}, {high}] is required")
        if type(self.sha256) is not str or len(self.sha256) != 64 or any(c not in "0123456789abcdef" for c in self.sha256):
            raise ValueError(f"{where}: sha256 is {self.sha256!r}; 64 lower-case hex digits are required")
        if self.codec not in CODECS:
            raise ValueError(f"{where}: codec is {self.codec!r}; this casecloud reads {', '.join(CODECS)}")


def _compress(data: bytes, codec: str, level: int) -> bytes:
    if codec == "zlib":
        return zlib.compress(data, level)
    if codec == "lzma":
        return lzma.compress(data, format=lzma.FORMAT_XZ, check=lzma.CHECK_NONE, preset=level)
    raise ValueError(f"codec {codec!r} is not supported; allowed: {', '.join(CODECS)}")


def _decompress(blob: bytes, codec: str, size: int) -> bytes:
    """Inflate at most ``size`` bytes (so a damaged blob cannot balloon); ChunkProblem otherwise."""
    try:
        if codec == "zlib":
            inflater = zlib.decompressobj()
            out = inflater.decompress(blob, size)
            complete = inflater.eof and not inflater.unconsumed_tail and not inflater.unused_data
        elif codec == "lzma":
            decoder = lzma.LZMADecompressor(format=lzma.FORMAT_XZ)
            out = decoder.decompress(blob, max_length=size)
            complete = decoder.eof and not decoder.unused_data
        else:
            raise ChunkProblem(f"codec {codec!r} is not supported; allowed: {', '.join(CODECS)}")
    except (zlib.error, lzma.LZMAError) as exc:
        raise ChunkProblem(f"{codec} decompression failed: {exc}") from None
    if not complete or len(out) != size:
        raise ChunkProblem(
            f"{codec} data does not decompress to the recorded {size} bytes "
            f"(got {len(out)} bytes{'' if complete else ' before the limit, with data left over'})"
        )
    return out


def split_chunks(data: bytes, chunk_bytes: int) -> list[bytes]:
    """``data`` cut into pieces of ``chunk_bytes`` (the last one shorter); one empty piece for no data."""
    if isinstance(chunk_bytes, bool) or not isinstance(chunk_bytes, int) or chunk_bytes < 1:
        raise ValueError(f"chunk_bytes must be an integer >= 1; got {chunk_bytes!r}")
    if not data:
        return [b""]
    return [data[i : i + chunk_bytes] for i in range(0, len(data), chunk_bytes)]


def pack(step: int, data: bytes, *, chunk_bytes: int = DEFAULT_CHUNK_BYTES, codec: str = "zlib", level: int | None = None) -> tuple[Blob, list[bytes]]:
    """Compress a checkpoint file's bytes and split them: the description and the chunks."""
    level = DEFAULT_LEVEL.get(codec, 0) if level is None else level
    stored = _compress(data, codec, level)
    chunks = split_chunks(stored, chunk_bytes)
    if len(chunks) > MAX_CHUNKS:
        raise ValueError(
            f"checkpoint of step {step} compresses to {len(stored)} bytes, {len(chunks)} chunks of {chunk_bytes} "
            f"bytes; at most {MAX_CHUNKS} chunks allowed (raise chunk_bytes)"
        )
    blob = Blob(step, len(chunks), hashlib.sha256(stored).hexdigest(), codec, len(stored), len(data))
    blob.check("pack()")
    return blob, chunks


def _require_chunks(blob: Blob, present: Any) -> None:
    missing = [i for i in range(blob.chunks) if i not in present]
    if missing:
        shown = ", ".join(str(i) for i in missing[:10]) + (" ..." if len(missing) > 10 else "")
        raise ChunkProblem(f"chunk(s) {shown} of {blob.chunks} are missing")


def unpack(blob: Blob, chunks: Mapping[int, bytes]) -> bytes:
    """The checkpoint file bytes from ``chunks`` (index -> bytes); ChunkProblem says what is wrong."""
    _require_chunks(blob, chunks)
    stored = b"".join(chunks[i] for i in range(blob.chunks))
    if len(stored) != blob.stored_bytes:
        raise ChunkProblem(f"the {blob.chunks} chunks hold {len(stored)} bytes; the checkpoint records {blob.stored_bytes}")
    digest = hashlib.sha256(stored).hexdigest()
    if digest != blob.sha256:
        raise ChunkProblem(f"SHA-256 of the reassembled chunks is {digest}, expected {blob.sha256}")
    return _decompress(stored, blob.codec, blob.raw_bytes)


# --------------------------------------------------------------------- keys
@dataclass(frozen=True)
class ParsedKey:
    """A record key of the checkpoint topic: a pointer (``step is None``) or a chunk."""

    stream_id: str
    step: int | None = None
    chunk: int | None = None


def encode_pointer_key(stream_id: str) -> bytes:
    return encode_stream_id(stream_id).encode("ascii")


def encode_chunk_key(stream_id: str, step: int, chunk: int) -> bytes:
    if not 0 <= step <= MAX_STEP or not 0 <= chunk <= MAX_CHUNKS:
        raise ValueError(f"step {step!r} must be in [0, {MAX_STEP}] and chunk {chunk!r} in [0, {MAX_CHUNKS}]")
    return f"{encode_stream_id(stream_id)}|{step:0{STEP_DIGITS}d}|{chunk:0{CHUNK_DIGITS}d}".encode("ascii")


def parse_key(key: bytes | None) -> ParsedKey | None:
    """The stream/step/chunk of a key made by this module, or None for any other key."""
    if not key:
        return None
    try:
        text = key.decode("ascii")
    except UnicodeDecodeError:
        return None
    parts = text.split("|")
    try:
        stream_id = decode_stream_id(parts[0])
    except ValueError:
        return None
    if len(parts) == 1:
        return ParsedKey(stream_id)
    if len(parts) != 3:
        return None
    step, chunk = parts[1], parts[2]
    if len(step) != STEP_DIGITS or len(chunk) != CHUNK_DIGITS or not (step + chunk).isdigit():
        return None
    return ParsedKey(stream_id, int(step), int(chunk))


def partition_for(stream_id: str, partitions: int) -> int:
    """The checkpoint-topic partition of every record of ``stream_id`` (stable, documented)."""
    digest = hashlib.sha256(stream_id.encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "big") % partitions


# ------------------------------------------------------- headers, pointer
def chunk_headers(stream_id: str, blob: Blob, index: int) -> list[tuple[str, bytes]]:
    h = HEADER_PREFIX
    return [
        (h + "kind", b"chunk"),
        (h + "format", str(STORE_FORMAT).encode()),
        (h + "stream", stream_id.encode("utf-8")),
        (h + "step", str(blob.step).encode()),
        (h + "chunk", str(index).encode()),
        (h + "chunks", str(blob.chunks).encode()),
        (h + "sha256", blob.sha256.encode()),
        (h + "codec", blob.codec.encode()),
        (h + "stored-bytes", str(blob.stored_bytes).encode()),
        (h + "bytes", str(blob.raw_bytes).encode()),
    ]


def blob_from_headers(headers: Any, key: ParsedKey) -> Blob | None:
    """The :class:`Blob` a chunk record's headers describe, or None if they do not fit its key."""
    found: dict[str, bytes] = {}
    for name, value in headers or ():
        if isinstance(name, str) and name.startswith(HEADER_PREFIX):
            found[name[len(HEADER_PREFIX) :]] = value or b""
    try:
        if found.get("kind") != b"chunk" or int(found["format"]) != STORE_FORMAT:
            return None
        blob = Blob(
            step=int(found["step"]),
            chunks=int(found["chunks"]),
            sha256=found["sha256"].decode("ascii"),
            codec=found["codec"].decode("ascii"),
            stored_bytes=int(found["stored-bytes"]),
            raw_bytes=int(found["bytes"]),
        )
        blob.check("chunk headers")
        if found["stream"].decode("utf-8") != key.stream_id or blob.step != key.step or int(found["chunk"]) != key.chunk:
            return None
    except (KeyError, ValueError, UnicodeDecodeError):
        return None
    if key.chunk is None or key.chunk >= blob.chunks:
        return None
    return blob


def encode_pointer(stream_id: str, blobs: list[Blob]) -> bytes:
    doc = {"format": STORE_FORMAT, "stream_id": stream_id, "checkpoints": [b.to_json() for b in blobs]}
    return orjson.dumps(doc, option=orjson.OPT_SORT_KEYS)


def decode_pointer(data: bytes, stream_id: str) -> list[Blob]:
    """The retained checkpoints a pointer names, newest first; ValueError says what is wrong."""
    try:
        doc = orjson.loads(data)
    except orjson.JSONDecodeError as exc:
        raise ValueError(f"pointer is not JSON: {exc}") from None
    if not isinstance(doc, dict):
        raise ValueError(f"pointer is a JSON {type(doc).__name__}; an object is required")
    if doc.get("format") != STORE_FORMAT:
        raise ValueError(f"pointer format is {doc.get('format')!r}; this casecloud reads format {STORE_FORMAT}")
    if doc.get("stream_id") != stream_id:
        raise ValueError(f"pointer names stream {doc.get('stream_id')!r}, but its key is for {stream_id!r}")
    items = doc.get("checkpoints")
    if not isinstance(items, list):
        raise ValueError("pointer has no 'checkpoints' list")
    blobs = [Blob.from_json(item, f"pointer checkpoints[{i}]") for i, item in enumerate(items)]
    steps = [b.step for b in blobs]
    if steps != sorted(set(steps), reverse=True):
        raise ValueError(f"pointer steps {steps} are not strictly decreasing")
    return blobs


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
    from .transports.kafka import translate_error

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
        from .transports.kafka import client_security

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
        from .transports.kafka import stop_quietly

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


class _CallTimeout(Exception):
    """A call to the store's event loop did not finish in time."""


class _LoopThread:
    """A private asyncio event loop in a daemon thread; started on demand."""

    def __init__(self, name: str) -> None:
        self.name = name
        self._guard = threading.Lock()
        self.loop: asyncio.AbstractEventLoop | None = None
        self.thread: threading.Thread | None = None

    def _ensure(self) -> asyncio.AbstractEventLoop:
        with self._guard:
            if self.loop is None:
                loop = asyncio.new_event_loop()
                ready = threading.Event()

                def run() -> None:
                    asyncio.set_event_loop(loop)
                    loop.call_soon(ready.set)
                    loop.run_forever()

                thread = threading.Thread(target=run, name=self.name, daemon=True)
                thread.start()
                ready.wait()
                self.loop, self.thread = loop, thread
            return self.loop

    def call(self, coro: Coroutine[Any, Any, T], timeout: float) -> T:
        loop = self._ensure()
        if threading.current_thread() is self.thread:
            coro.close()
            raise RuntimeError("KafkaCheckpointStore must not be called from its own event loop thread")
        future = asyncio.run_coroutine_threadsafe(coro, loop)
        try:
            return future.result(timeout)
        except concurrent.futures.TimeoutError:
            if future.done():
                raise  # the coroutine itself raised TimeoutError
            future.cancel()
            raise _CallTimeout() from None

    def shutdown(self, final: Coroutine[Any, Any, Any] | None, timeout: float) -> None:
        with self._guard:
            loop, thread = self.loop, self.thread
            self.loop = self.thread = None
        if loop is None or thread is None:
            if final is not None:
                final.close()
            return
        try:
            if final is not None and thread.is_alive():
                try:
                    asyncio.run_coroutine_threadsafe(final, loop).result(timeout)
                except Exception as exc:  # best effort
                    log.warning("closing the Kafka checkpoint store: %s", exc)
        finally:
            if thread.is_alive():
                loop.call_soon_threadsafe(loop.stop)
                thread.join(timeout)
            if not thread.is_alive():
                loop.close()


def _shutdown(runner: _LoopThread, engine: _Engine, timeout: float) -> None:
    async def final() -> None:
        async with engine.lock:
            await engine.stop()

    runner.shutdown(final(), timeout)
    engine._lock = None  # an asyncio.Lock belongs to one loop; the next one gets a new lock


class KafkaCheckpointMismatch(CheckpointMismatch):
    """CheckpointMismatch with advice that fits a checkpoint topic (not a directory)."""

    def __init__(self, stream_id: str, path: Path, expected: str, found: str | None, topic: str) -> None:
        super().__init__(stream_id, path, expected, found)
        found_text = repr(found) if found is not None else "no model fingerprint at all"
        self.args = (
            f"checkpoint {path} of stream {stream_id!r} was written for model fingerprint {found_text}, "
            f"but the configured model has fingerprint {expected!r}. The stream's cloud was not loaded and will "
            f"not be reinitialised automatically. Either restore the model spec that produced {found_text}, or "
            f"reset the stream deliberately by removing its checkpoints from Kafka topic {topic!r} "
            f"(KafkaCheckpointStore.forget({stream_id!r}) writes the tombstones); the stream then starts from the prior.",
        )


class KafkaCheckpointStore(CheckpointStore):
    """Checkpoints in a compacted Kafka topic that every replica reads (see the module docstring).

    Parameters
    ----------
    settings : the ``[kafka]`` section: bootstrap servers, client id and security.
    topic : the checkpoint topic (created compacted if missing).
    keep : how many of the newest checkpoints to keep per stream (>= 1).
    chunk_bytes : largest chunk value in bytes (default 512 KiB; the topic's
        ``max.message.bytes`` must exceed it by the record overhead).
    codec, level : ``"zlib"`` (default, level 1) or ``"lzma"`` (preset 0).
    partitions, replication_factor, topic_config : used only when the store
        creates the topic (replication defaults to min(3, brokers)).
    timeout : seconds any one call may take before it fails with CheckpointError.
    """

    def __init__(
        self,
        settings: KafkaSettings,
        topic: str,
        keep: int = 3,
        *,
        chunk_bytes: int = DEFAULT_CHUNK_BYTES,
        codec: str = "zlib",
        level: int | None = None,
        partitions: int = 1,
        replication_factor: int | None = None,
        topic_config: Mapping[str, str] | None = None,
        timeout: float = 120.0,
    ) -> None:
        where = f"(KafkaCheckpointStore topic {topic!r})"
        if isinstance(keep, bool) or not isinstance(keep, int) or keep < 1:
            raise ValueError(f"keep must be an integer >= 1; got {keep!r} {where}")
        if isinstance(chunk_bytes, bool) or not isinstance(chunk_bytes, int) or not MIN_CHUNK_BYTES <= chunk_bytes <= MAX_CHUNK_BYTES:
            raise ValueError(f"chunk_bytes must be an integer in [{MIN_CHUNK_BYTES}, {MAX_CHUNK_BYTES}]; got {chunk_bytes!r} {where}")
        if codec not in CODECS:
            raise ValueError(f"codec must be one of {', '.join(CODECS)}; got {codec!r} {where}")
        level = DEFAULT_LEVEL[codec] if level is None else level
        if isinstance(level, bool) or not isinstance(level, int) or not 0 <= level <= 9:
            raise ValueError(f"level must be an integer in [0, 9]; got {level!r} {where}")
        if type(topic) is not str or not topic:
            raise ValueError(f"topic must be a non-empty str; got {topic!r}")
        if isinstance(partitions, bool) or not isinstance(partitions, int) or partitions < 1:
            raise ValueError(f"partitions must be an integer >= 1; got {partitions!r} {where}")
        self.settings = settings
        self.topic = topic
        self.keep = keep
        self.chunk_bytes = chunk_bytes
        self.codec = codec
        self.level = level
        self.timeout = timeout
        self._engine = _Engine(
            settings, topic, chunk_bytes=chunk_bytes, partitions=partitions,
            replication_factor=replication_factor, topic_config=topic_config or {},
        )
        self._runner = _LoopThread(f"casecloud-checkpoints-{topic}")
        self._finalizer = weakref.finalize(self, _shutdown, self._runner, self._engine, timeout)

    def __repr__(self) -> str:
        return (
            f"KafkaCheckpointStore(bootstrap={self.settings.bootstrap_servers!r}, topic={self.topic!r}, "
            f"keep={self.keep}, chunk_bytes={self.chunk_bytes}, codec={self.codec!r})"
        )

    # ------------------------------------------------------------ plumbing
    def path_for(self, stream_id: str, step: int | None) -> Path:
        """The pseudo path naming a checkpoint (``step`` None: the stream's pointer)."""
        tail = "pointer" if step is None else f"{step:0{STEP_DIGITS}d}"
        return Path(f"kafka:{self.topic}") / encode_stream_id(stream_id) / tail

    def _call(self, make: Any, what: str, stream_id: str | None = None) -> Any:
        engine = self._engine

        async def run() -> Any:
            async with engine.lock:
                await engine.start()
                try:
                    return await make()
                except (kafka_errors.KafkaError, OSError) as exc:
                    raise CheckpointError(_explain(exc, f"{what} in the {engine._where()}"), stream_id=stream_id) from exc

        try:
            return self._runner.call(run(), self.timeout)
        except _CallTimeout:
            raise CheckpointError(
                f"{engine._where()}: cannot {what}: no answer within {self.timeout:g} s (is the broker reachable?)",
                stream_id=stream_id,
            ) from None

    def close(self) -> None:
        """Stop the Kafka clients and the loop thread (the store reopens them if used again)."""
        _shutdown(self._runner, self._engine, self.timeout)

    def __enter__(self) -> "KafkaCheckpointStore":
        return self

    def __exit__(self, *exc_info: Any) -> None:
        self.close()

    # -------------------------------------------------------------- write
    def write(self, checkpoint: Checkpoint) -> CheckpointInfo:
        started = time.perf_counter()
        stream_id, step = checkpoint.stream_id, checkpoint.step
        blob, chunks = pack(step, encode_checkpoint(checkpoint), chunk_bytes=self.chunk_bytes, codec=self.codec, level=self.level)
        engine = self._engine
        self._call(lambda: engine.write(stream_id, blob, chunks, self.keep), f"write checkpoint step {step}", stream_id)
        return CheckpointInfo(stream_id, step, self.path_for(stream_id, step), blob.stored_bytes, time.perf_counter() - started)

    # --------------------------------------------------------------- read
    def _decode(self, stream_id: str, blob: Blob, data: bytes) -> Checkpoint:
        path = self.path_for(stream_id, blob.step)
        checkpoint = decode_checkpoint(path, data)
        if checkpoint.stream_id != stream_id:
            raise CheckpointCorrupt(path, f"the checkpoint belongs to stream {checkpoint.stream_id!r}, not {stream_id!r}", stream_id=stream_id)
        if checkpoint.step != blob.step:
            raise CheckpointCorrupt(path, f"the checkpoint is stored as step {blob.step} but its header says step {checkpoint.step}", stream_id=stream_id)
        return checkpoint

    def load_latest(self, stream_id: str, expected_fingerprint: str | None) -> LoadResult | None:
        encode_stream_id(stream_id)  # ValueError for an unusable id, as the local store
        engine = self._engine

        async def load() -> LoadResult | None:
            for _ in range(LOAD_ATTEMPTS):
                await engine.catch_up()
                candidates, skipped = engine._candidates(stream_id, self.path_for)
                if not candidates and not skipped:
                    return None
                try:
                    for blob in candidates:
                        path = self.path_for(stream_id, blob.step)
                        try:
                            checkpoint = self._decode(stream_id, blob, await engine.blob_bytes(stream_id, blob))
                        except (ChunkProblem, CheckpointCorrupt) as exc:
                            skipped.append((path, exc.reason))
                            continue
                        except CheckpointError as exc:
                            exc.stream_id = stream_id
                            raise
                        if expected_fingerprint is not None:
                            found = model_fingerprint_of(checkpoint.header)
                            if found != expected_fingerprint:
                                raise KafkaCheckpointMismatch(stream_id, path, expected_fingerprint, found, self.topic)
                        return LoadResult(checkpoint, path, skipped)
                except _Vanished:
                    continue  # pruned by a concurrent writer and compacted: read again
                listing = "; ".join(f"{p}: {r}" for p, r in skipped)
                raise CheckpointCorrupt(
                    self.path_for(stream_id, None),
                    f"all {len(skipped)} stored checkpoints are unreadable ({listing})",
                    stream_id=stream_id,
                    skipped=skipped,
                    message=(
                        f"no readable checkpoint for stream {stream_id!r} in Kafka topic {self.topic!r}: "
                        f"{listing}. Reset the stream deliberately with KafkaCheckpointStore.forget({stream_id!r}) "
                        "(it then starts from the prior), or restore the topic from a backup."
                    ),
                )
            raise CheckpointError(
                f"stream {stream_id!r}: its checkpoints in Kafka topic {self.topic!r} changed while being read "
                f"{LOAD_ATTEMPTS} times in a row; is another replica writing the same stream?",
                stream_id=stream_id,
            )

        return self._call(load, "load the newest checkpoint", stream_id)

    def read_bytes(self, stream_id: str, step: int | None = None) -> bytes | None:
        """The verified checkpoint file bytes of ``step`` (default: newest), None if not stored.

        Raises CheckpointCorrupt if the stored chunks are damaged.
        """
        engine = self._engine

        async def read() -> bytes | None:
            for _ in range(LOAD_ATTEMPTS):
                await engine.catch_up()
                blobs = [b for b in engine.retained(stream_id) if step is None or b.step == step]
                if not blobs:
                    return None
                try:
                    data = await engine.blob_bytes(stream_id, blobs[0])
                except ChunkProblem as exc:
                    raise CheckpointCorrupt(self.path_for(stream_id, blobs[0].step), exc.reason, stream_id=stream_id) from None
                except _Vanished:
                    continue
                self._decode(stream_id, blobs[0], data)
                return data
            raise CheckpointError(f"stream {stream_id!r}: checkpoints changed while being read", stream_id=stream_id)

        return self._call(read, "read a checkpoint", stream_id)

    def list(self, stream_id: str) -> builtins.list[CheckpointInfo]:
        engine = self._engine

        async def listing() -> builtins.list[CheckpointInfo]:
            await engine.catch_up()
            return [CheckpointInfo(stream_id, b.step, self.path_for(stream_id, b.step), b.stored_bytes) for b in engine.retained(stream_id)]

        return self._call(listing, "list checkpoints", stream_id)

    def streams(self) -> builtins.list[str]:
        engine = self._engine

        async def streams() -> builtins.list[str]:
            await engine.catch_up()
            return sorted(s for s in engine.index if engine.retained(s))

        return self._call(streams, "list streams")

    def verify(self, stream_id: str) -> builtins.list[VerifyReport]:
        engine = self._engine

        async def verify() -> builtins.list[VerifyReport]:
            for _ in range(LOAD_ATTEMPTS):
                await engine.catch_up()
                reports: builtins.list[VerifyReport] = []
                candidates, problems = engine._candidates(stream_id, self.path_for)
                try:
                    for blob in candidates:
                        path = self.path_for(stream_id, blob.step)
                        try:
                            self._decode(stream_id, blob, await engine.blob_bytes(stream_id, blob))
                        except (ChunkProblem, CheckpointCorrupt) as exc:
                            reports.append(VerifyReport(path, blob.step, blob.stored_bytes, False, exc.reason))
                        except CheckpointError as exc:
                            reports.append(VerifyReport(path, blob.step, blob.stored_bytes, False, str(exc)))
                        else:
                            reports.append(VerifyReport(path, blob.step, blob.stored_bytes, True))
                except _Vanished:
                    continue
                return reports + [VerifyReport(path, -1, 0, False, reason) for path, reason in problems]
            raise CheckpointError(f"stream {stream_id!r}: checkpoints changed while being verified", stream_id=stream_id)

        return self._call(verify, "verify checkpoints", stream_id)

    def forget(self, stream_id: str) -> int:
        """Delete every checkpoint of ``stream_id`` (tombstones); the number of tombstones written.

        The deliberate reset after a model change: the stream then starts from the prior.
        """
        engine = self._engine
        return self._call(lambda: engine.forget(stream_id), "delete the stream's checkpoints", stream_id)
