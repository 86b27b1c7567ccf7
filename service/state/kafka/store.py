"""KafkaCheckpointStore: the CheckpointStore interface over a compacted topic.
"""

from __future__ import annotations

import builtins
import logging
import time
import weakref
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from aiokafka import errors as kafka_errors

from schemas import KafkaSettings

from ..format import (
    STEP_DIGITS,
    Checkpoint,
    CheckpointCorrupt,
    CheckpointError,
    CheckpointInfo,
    CheckpointMismatch,
    LoadResult,
    VerifyReport,
    decode_checkpoint,
    encode_checkpoint,
    encode_stream_id,
    model_fingerprint_of,
)
from ..store import CheckpointStore
from .index import _Engine, _explain, _Vanished
from .loop import _CallTimeout, _LoopThread, _shutdown
from .records import (
    CODECS,
    DEFAULT_CHUNK_BYTES,
    DEFAULT_LEVEL,
    LOAD_ATTEMPTS,
    MAX_CHUNK_BYTES,
    MIN_CHUNK_BYTES,
    Blob,
    ChunkProblem,
    pack,
)

log = logging.getLogger("casecloud.checkpoints.kafka")
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
