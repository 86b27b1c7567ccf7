"""The interface every checkpoint store implements, and the choice of store from a deployment config.
"""

from __future__ import annotations

import abc
import builtins

from schemas import DeploymentConfig

from .format import Checkpoint, CheckpointInfo, LoadResult, VerifyReport


# ---------------------------------------------------------------------- stores
class CheckpointStore(abc.ABC):
    """Where stream checkpoints live; the service sees only this interface.

    The local directory store is the first implementation; a shared store
    (so that a stream can move between replicas) can follow without the
    service changing.
    """

    @abc.abstractmethod
    def write(self, checkpoint: Checkpoint) -> CheckpointInfo:
        """Store ``checkpoint`` durably and atomically; the same step again overwrites."""

    @abc.abstractmethod
    def load_latest(self, stream_id: str, expected_fingerprint: str | None) -> LoadResult | None:
        """The newest intact checkpoint of ``stream_id``, or None when it has none.

        Corrupt newer files are skipped and listed in ``LoadResult.skipped``;
        if every file is corrupt, CheckpointCorrupt lists them all. A model
        fingerprint different from ``expected_fingerprint`` raises
        CheckpointMismatch at once (no older file is tried).
        """

    @abc.abstractmethod
    def list(self, stream_id: str) -> builtins.list[CheckpointInfo]:
        """The stream's checkpoint files, newest first (not verified)."""

    @abc.abstractmethod
    def streams(self) -> builtins.list[str]:
        """Ids of the streams that have at least one checkpoint file, sorted."""

    @abc.abstractmethod
    def verify(self, stream_id: str) -> builtins.list[VerifyReport]:
        """One integrity report per checkpoint file of the stream, newest first."""


def build_checkpoint_store(config: DeploymentConfig) -> CheckpointStore:
    """The store ``[service] checkpoint_store`` selects: a local directory, or a
    compacted Kafka topic (``checkpoint_topic``, reached with the ``[kafka]`` settings)."""
    s = config.service
    if s.checkpoint_store == "kafka":
        from .kafka import KafkaCheckpointStore

        return KafkaCheckpointStore(config.kafka, s.checkpoint_topic, keep=s.keep_checkpoints)
    from .local import LocalCheckpointStore

    return LocalCheckpointStore(s.checkpoint_dir, keep=s.keep_checkpoints)
