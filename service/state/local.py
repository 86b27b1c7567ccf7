"""The local directory store: one folder per stream, one file per checkpoint.

Layout of a :class:`LocalCheckpointStore`::

    root/<encoded stream id>/000000000042.ckpt

Stream ids are encoded reversibly into a safe directory name: ``a-z``,
``0-9``, ``-`` and ``_`` stay as they are; every other byte of the UTF-8
encoding (upper-case letters included, so that case-insensitive file systems
cannot merge two streams; ``.`` and ``/`` included, so no id can climb out of
the root) becomes ``%XX`` with upper-case hex. The real id is also stored in
each file's header and checked on load.

Writes go to a temporary file in the stream's directory (``.<name>.<random>.tmp``),
are flushed and fsynced, renamed over the final name with ``os.replace`` and
the directory is fsynced. Exactly one writer per stream is assumed (Kafka
partition ownership gives the service that); under that assumption a write
also deletes temporary files left by an earlier crash. The store is
synchronous: the asyncio service calls it through ``asyncio.to_thread``.

No pickle is used anywhere: arrays are raw bytes described by the manifest.
"""

from __future__ import annotations

import builtins
import os
import tempfile
import time
from pathlib import Path

from .format import (
    STEP_DIGITS,
    SUFFIX,
    Checkpoint,
    CheckpointCorrupt,
    CheckpointError,
    CheckpointInfo,
    CheckpointMismatch,
    LoadResult,
    VerifyReport,
    decode_stream_id,
    encode_checkpoint,
    encode_stream_id,
    model_fingerprint_of,
    read_checkpoint_file,
)
from .store import CheckpointStore


def _fsync_dir(path: Path) -> None:
    if os.name != "posix":  # directories cannot be opened for fsync on Windows
        return
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class LocalCheckpointStore(CheckpointStore):
    """Checkpoints in a local directory: ``root/<encoded stream id>/<step>.ckpt``.

    Parameters
    ----------
    root : directory holding one sub-directory per stream (created on first write).
    keep : how many of the newest checkpoints to keep per stream (>= 1).
    """

    def __init__(self, root: Path | str, keep: int = 3) -> None:
        if isinstance(keep, bool) or not isinstance(keep, int) or keep < 1:
            raise ValueError(f"LocalCheckpointStore keep must be an integer >= 1; got {keep!r} (root {root})")
        self.root = Path(root)
        self.keep = keep

    def __repr__(self) -> str:
        return f"LocalCheckpointStore(root={str(self.root)!r}, keep={self.keep})"

    # ------------------------------------------------------------- layout
    def stream_dir(self, stream_id: str) -> Path:
        return self.root / encode_stream_id(stream_id)

    def path_for(self, stream_id: str, step: int) -> Path:
        return self.stream_dir(stream_id) / f"{step:0{STEP_DIGITS}d}{SUFFIX}"

    @staticmethod
    def _step_of(path: Path) -> int | None:
        stem = path.name[: -len(SUFFIX)]
        if path.name.endswith(SUFFIX) and len(stem) == STEP_DIGITS and stem.isascii() and stem.isdigit():
            return int(stem)
        return None

    def _files(self, stream_id: str) -> builtins.list[tuple[int, Path]]:
        directory = self.stream_dir(stream_id)
        if not directory.is_dir():
            return []
        found = [(step, p) for p in directory.iterdir() if (step := self._step_of(p)) is not None and p.is_file()]
        return sorted(found, reverse=True)

    # -------------------------------------------------------------- write
    def write(self, checkpoint: Checkpoint) -> CheckpointInfo:
        started = time.perf_counter()
        data = encode_checkpoint(checkpoint)
        directory = self.stream_dir(checkpoint.stream_id)
        final = self.path_for(checkpoint.stream_id, checkpoint.step)
        if not directory.is_dir():
            directory.mkdir(parents=True, exist_ok=True)
            _fsync_dir(directory.parent)
        fd, tmp_name = tempfile.mkstemp(prefix=f".{final.name}.", suffix=".tmp", dir=directory)
        tmp = Path(tmp_name)
        try:
            with os.fdopen(fd, "wb") as handle:
                handle.write(data)
                handle.flush()
                os.fsync(handle.fileno())
            os.replace(tmp, final)
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
        _fsync_dir(directory)
        seconds = time.perf_counter() - started
        self._prune(checkpoint.stream_id)
        return CheckpointInfo(checkpoint.stream_id, checkpoint.step, final, len(data), seconds)

    def _prune(self, stream_id: str) -> None:
        for _, path in self._files(stream_id)[self.keep :]:
            path.unlink(missing_ok=True)
        # Single writer per stream: a temporary file still here is from a crashed write.
        for path in self.stream_dir(stream_id).glob(f".*{SUFFIX}.*.tmp"):
            path.unlink(missing_ok=True)

    # --------------------------------------------------------------- read
    def load_latest(self, stream_id: str, expected_fingerprint: str | None) -> LoadResult | None:
        files = self._files(stream_id)
        if not files:
            return None
        skipped: builtins.list[tuple[Path, str]] = []
        for step, path in files:
            try:
                checkpoint = self._read(stream_id, step, path)
            except FileNotFoundError:
                continue  # pruned by a concurrent write since the listing
            except CheckpointCorrupt as exc:
                skipped.append((path, exc.reason))
                continue
            if expected_fingerprint is not None:
                found = model_fingerprint_of(checkpoint.header)
                if found != expected_fingerprint:
                    raise CheckpointMismatch(stream_id, path, expected_fingerprint, found)
            return LoadResult(checkpoint, path, skipped)
        listing = "; ".join(f"{path}: {reason}" for path, reason in skipped)
        raise CheckpointCorrupt(
            self.stream_dir(stream_id),
            f"all {len(skipped)} checkpoint files are corrupt ({listing})",
            stream_id=stream_id,
            skipped=skipped,
            message=(
                f"no readable checkpoint for stream {stream_id!r} in {self.stream_dir(stream_id)}: "
                f"all {len(skipped)} files are corrupt: {listing}. Restore a good file from backup, or reset "
                "the stream deliberately by moving the directory out of the way."
            ),
        )

    def _read(self, stream_id: str, step: int, path: Path) -> Checkpoint:
        try:
            checkpoint = read_checkpoint_file(path)
        except CheckpointError as exc:
            exc.stream_id = stream_id
            raise
        if checkpoint.stream_id != stream_id:
            raise CheckpointCorrupt(
                path, f"the file belongs to stream {checkpoint.stream_id!r}, not {stream_id!r}", stream_id=stream_id
            )
        if checkpoint.step != step:
            raise CheckpointCorrupt(
                path, f"the file is named for step {step} but its header says step {checkpoint.step}", stream_id=stream_id
            )
        return checkpoint

    def list(self, stream_id: str) -> builtins.list[CheckpointInfo]:
        infos: builtins.list[CheckpointInfo] = []
        for step, path in self._files(stream_id):
            try:
                size = path.stat().st_size
            except FileNotFoundError:
                continue  # pruned by a concurrent write since the listing
            infos.append(CheckpointInfo(stream_id, step, path, size))
        return infos

    def streams(self) -> builtins.list[str]:
        if not self.root.is_dir():
            return []
        found: builtins.list[str] = []
        for entry in self.root.iterdir():
            if not entry.is_dir():
                continue
            try:
                stream_id = decode_stream_id(entry.name)
            except ValueError:
                continue  # not ours
            if self._files(stream_id):
                found.append(stream_id)
        return sorted(found)

    def verify(self, stream_id: str) -> builtins.list[VerifyReport]:
        reports: builtins.list[VerifyReport] = []
        for step, path in self._files(stream_id):
            try:
                size = path.stat().st_size
                self._read(stream_id, step, path)
            except FileNotFoundError:
                continue  # pruned by a concurrent write since the listing
            except CheckpointError as exc:
                reason = exc.reason if isinstance(exc, CheckpointCorrupt) else str(exc)
                reports.append(VerifyReport(path, step, size, False, reason))
            else:
                reports.append(VerifyReport(path, step, size, True))
        return reports
