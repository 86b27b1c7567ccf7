"""Checkpoints on a compacted Kafka topic, so a stream can move between replicas.

:class:`KafkaCheckpointStore` implements :class:`~service.state.CheckpointStore`
on one Kafka topic with ``cleanup.policy=compact``. Every replica of a
consumer group reads and writes the same topic, so when a partition of the
input topic moves to another replica, the new owner loads the stream's newest
checkpoint from Kafka instead of from a disk it cannot see. Selected with
``[service] checkpoint_store = "kafka"``; the ``[kafka]`` section's bootstrap
servers and security settings are used, and ``checkpoint_topic`` names the topic.

What is stored
--------------
Exactly the bytes of the local file format (:func:`~service.state.encode_checkpoint`:
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

``<sid>`` is :func:`~service.state.encode_stream_id` of the stream id
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

from .records import (
    DEFAULT_CHUNK_BYTES,
    STORE_FORMAT,
    Blob,
    ChunkProblem,
    ParsedKey,
    blob_from_headers,
    chunk_headers,
    decode_pointer,
    encode_chunk_key,
    encode_pointer,
    encode_pointer_key,
    pack,
    parse_key,
    partition_for,
    split_chunks,
    unpack,
)
from .store import KafkaCheckpointMismatch, KafkaCheckpointStore

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
