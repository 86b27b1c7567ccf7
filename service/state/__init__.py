"""Stream state: the checkpoint file format and the stores that keep checkpoints.

``format`` owns the bytes of one checkpoint; ``store`` the interface every store
implements; ``local`` the directory store; ``kafka`` the compacted-topic store
used to scale out. Nothing here knows about records, transports' consumers or
the analysts' commands.
"""

from .format import (
    FORMAT_VERSION,
    MAGIC,
    Checkpoint,
    CheckpointCorrupt,
    CheckpointError,
    CheckpointInfo,
    CheckpointMismatch,
    CheckpointUnsupported,
    LoadResult,
    VerifyReport,
    decode_checkpoint,
    decode_stream_id,
    describe_checkpoint,
    encode_checkpoint,
    encode_stream_id,
    model_fingerprint_of,
    read_checkpoint_file,
)
from .local import LocalCheckpointStore
from .store import CheckpointStore, build_checkpoint_store

__all__ = [
    "FORMAT_VERSION",
    "MAGIC",
    "Checkpoint",
    "CheckpointCorrupt",
    "CheckpointError",
    "CheckpointInfo",
    "CheckpointMismatch",
    "CheckpointStore",
    "CheckpointUnsupported",
    "LoadResult",
    "LocalCheckpointStore",
    "VerifyReport",
    "build_checkpoint_store",
    "decode_checkpoint",
    "decode_stream_id",
    "describe_checkpoint",
    "encode_checkpoint",
    "encode_stream_id",
    "model_fingerprint_of",
    "read_checkpoint_file",
]
