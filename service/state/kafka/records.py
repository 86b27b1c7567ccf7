"""What the Kafka checkpoint store writes: compressed chunks, record keys and headers, the pointer record.

Pure functions over bytes; no client and no event loop (see the package docstring for the layout).
"""

from __future__ import annotations

import hashlib
import logging
import lzma
import zlib
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, TypeVar

import orjson

from ..format import (
    MAX_STEP,
    STEP_DIGITS,
    decode_stream_id,
    encode_stream_id,
)

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


