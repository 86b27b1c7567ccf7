"""Checkpoints: one durable, self-checking file per stream per step.

The service writes a checkpoint after every assimilated message, so a restart
resumes from the cloud instead of replaying history. This module owns the file
format and the rules for reading it back; the stores live in :mod:`.local` and :mod:`.kafka`.

Error tree::

    CheckpointError                 anything this module refuses (has .path, .stream_id)
    +-- CheckpointCorrupt           bad magic, checksum, truncation, malformed header (.reason)
    +-- CheckpointMismatch          the checkpoint belongs to a different model (.expected, .found)
    +-- CheckpointUnsupported       a format version this build cannot read (.version)

Invalid *input* (an object array, a header that is not plain JSON, an unusable
stream id, ``keep < 1``) is a programming error and raises ``ValueError`` /
``TypeError`` with what was given, what is allowed and where.

File format, version 1 (all integers little-endian)::

    offset  size  content
    0       8     magic b"\\x89CCLOUD\\n"
    8       4     format version, uint32 (1)
    12      4     header length H in bytes, uint32
    16      H     header: UTF-8 JSON object, keys sorted (orjson)
    ...           zero padding up to a multiple of 64 bytes: the data section starts here (D)
    D       ...   array bytes, C order, each array starting at a multiple of 64 from D,
                  zero padding between arrays
    end-32  32    SHA-256 of every byte before it

The header object holds ``format``, ``stream_id``, ``step``, ``created`` (as
given by the caller, or null), ``numpy`` (version that wrote the file),
``arrays`` (the manifest: one ``{name, dtype, shape, offset, nbytes}`` per
array, sorted by name, ``dtype`` an explicit little-endian code such as
``"<f8"`` or ``"|b1"``, ``offset`` relative to D) and ``header`` (the
caller's own JSON header, :attr:`Checkpoint.header`). The bytes are a pure
function of the :class:`Checkpoint` (and the numpy version string): the same
state always writes the same file. The trailing digest sits at the very end
in every format version, so any file can be integrity-checked before its
version is interpreted.

Model fingerprint: :meth:`LocalCheckpointStore.load_latest` compares the
caller's expected fingerprint with ``header["filter"]["model_fingerprint"]``
(where the service stores ``ParticleFilter.state()``'s header), or, when the
header has no ``"filter"`` object, with ``header["model_fingerprint"]``.
"""

from __future__ import annotations

import builtins
import hashlib
import math
import struct
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from ..errors import StreamStateError

MAGIC = b"\x89CCLOUD\n"
FORMAT_VERSION = 1
SUFFIX = ".ckpt"
STEP_DIGITS = 12
MAX_STEP = 10**STEP_DIGITS - 1
ALIGN = 64
DIGEST_SIZE = 32
_PREFIX = struct.Struct("<8sII")  # magic, format version, header length
_MAX_HEADER = 2**32 - 1
_MAX_DIR_NAME = 240  # bytes; most file systems allow 255

# Explicit little-endian codes of the numeric dtypes a checkpoint may hold.
ALLOWED_DTYPES: tuple[str, ...] = (
    "|b1",
    "|i1", "<i2", "<i4", "<i8",
    "|u1", "<u2", "<u4", "<u8",
    "<f2", "<f4", "<f8",
    "<c8", "<c16",
)  # fmt: skip
_ALLOWED_TEXT = "bool, int8..int64, uint8..uint64, float16/32/64, complex64/128"


# ---------------------------------------------------------------------- errors
class CheckpointError(StreamStateError):
    """A checkpoint could not be written, read or used."""

    def __init__(self, message: str, *, path: Path | str | None = None, stream_id: str | None = None) -> None:
        super().__init__(message, stream=stream_id)
        self.args = (message,)
        self.path = Path(path) if path is not None else None
        self.stream_id = stream_id

    def __str__(self) -> str:
        return str(self.args[0])


class CheckpointCorrupt(CheckpointError):
    """A file is not a readable checkpoint: bad magic, checksum, truncation, bad header.

    ``skipped`` lists ``(path, reason)`` for every file tried when this error
    reports that *no* checkpoint of a stream could be read.
    """

    def __init__(
        self,
        path: Path | str,
        reason: str,
        *,
        stream_id: str | None = None,
        skipped: builtins.list[tuple[Path, str]] | None = None,
        message: str | None = None,
    ) -> None:
        super().__init__(message or f"checkpoint file {path} is corrupt: {reason}", path=path, stream_id=stream_id)
        self.reason = reason
        self.skipped = builtins.list(skipped or [])


class CheckpointMismatch(CheckpointError):
    """The newest readable checkpoint was written for a different model."""

    def __init__(self, stream_id: str, path: Path | str, expected: str, found: str | None) -> None:
        found_text = repr(found) if found is not None else "no model fingerprint at all"
        message = (
            f"checkpoint {path} of stream {stream_id!r} was written for model fingerprint {found_text}, "
            f"but the configured model has fingerprint {expected!r}. The stream's cloud was not loaded "
            "and will not be reinitialised automatically. Either restore the model spec that produced "
            f"{found_text}, or reset the stream deliberately by moving its checkpoint directory "
            f"{Path(path).parent} out of the way (the stream then starts from the prior)."
        )
        super().__init__(message, path=path, stream_id=stream_id)
        self.expected = expected
        self.found = found


class CheckpointUnsupported(CheckpointError):
    """An intact file written in a format version this build cannot read."""

    def __init__(self, path: Path | str, version: int, stream_id: str | None = None) -> None:
        super().__init__(
            f"checkpoint file {path} uses format version {version}; this casecloud reads version "
            f"{FORMAT_VERSION} only. Run a casecloud release that reads version {version}, or reset "
            "the stream deliberately by moving its checkpoint directory out of the way.",
            path=path,
            stream_id=stream_id,
        )
        self.version = version


# ------------------------------------------------------------------ data types
def _plain_json(value: Any, where: str) -> Any:
    """A copy of ``value`` made of dict/list/str/int/float/bool/None only, or ValueError."""
    if isinstance(value, (np.bool_, np.integer, np.floating)):
        value = value.item()  # numpy scalars become the equal Python number
    if value is None or isinstance(value, bool):
        return value
    if isinstance(value, str):
        return str(value)
    if isinstance(value, int):
        if not -(2**63) <= value <= 2**64 - 1:
            raise ValueError(f"{where} is the integer {value}, outside the 64-bit range JSON readers accept; store it as text")
        return int(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError(f"{where} is {value!r}; only finite floats are allowed in a checkpoint header (use null)")
        return float(value)
    if isinstance(value, Mapping):
        out: dict[str, Any] = {}
        for key, item in value.items():
            if type(key) is not str:
                raise ValueError(f"{where} has the key {key!r} of type {type(key).__name__}; header keys must be str")
            out[key] = _plain_json(item, f"{where}[{key!r}]")
        return out
    if isinstance(value, builtins.list):
        return [_plain_json(item, f"{where}[{i}]") for i, item in enumerate(value)]
    raise ValueError(
        f"{where} is a {type(value).__module__}.{type(value).__qualname__} ({value!r:.60}); a checkpoint header "
        "allows only dict (str keys), list, str, int, finite float, bool and None (tuples: use lists)"
    )


def _checked_array(name: Any, value: Any) -> np.ndarray:
    if type(name) is not str or not name:
        raise ValueError(f"checkpoint array names must be non-empty str; got {name!r}")
    if not isinstance(value, np.ndarray):
        raise TypeError(
            f"checkpoint array {name!r} is a {type(value).__name__}; a numpy.ndarray of a numeric dtype is required"
        )
    code = _le_code(value.dtype)
    if code not in ALLOWED_DTYPES:
        raise ValueError(
            f"checkpoint array {name!r} has dtype {value.dtype} ({value.dtype.str}); allowed dtypes: "
            f"{_ALLOWED_TEXT}. Object, string, structured and datetime arrays cannot be stored"
        )
    return value


@dataclass(frozen=True, eq=False)
class Checkpoint:
    """One stream's saved state at one step.

    Parameters
    ----------
    stream_id : the stream's id (any non-empty text).
    step : the number of assimilated messages, 0 <= step <= 999_999_999_999.
    header : JSON-able dict (filter header, last period, source position, alert
        state, ...). Validated and copied into plain JSON types at construction.
    arrays : named numeric arrays (bool, integers, floats, complex). Arrays in a
        non-native byte order come back in native order with equal values.
    created : a timestamp text chosen by the caller, or None. It is stored as
        given: the file bytes depend on nothing but these fields.
    """

    stream_id: str
    step: int
    header: dict[str, Any] = field(default_factory=dict)
    arrays: dict[str, np.ndarray] = field(default_factory=dict)
    created: str | None = None

    def __post_init__(self) -> None:
        if type(self.stream_id) is not str or not self.stream_id:
            raise ValueError(f"Checkpoint.stream_id must be a non-empty str; got {self.stream_id!r}")
        if isinstance(self.step, bool) or not isinstance(self.step, (int, np.integer)) or not 0 <= self.step <= MAX_STEP:
            raise ValueError(
                f"Checkpoint.step must be an integer in [0, {MAX_STEP}]; got {self.step!r} (stream {self.stream_id!r})"
            )
        object.__setattr__(self, "step", int(self.step))
        if self.created is not None and type(self.created) is not str:
            raise ValueError(f"Checkpoint.created must be a str or None; got {self.created!r} (stream {self.stream_id!r})")
        if not isinstance(self.header, Mapping):
            raise ValueError(f"Checkpoint.header must be a dict; got {type(self.header).__name__} (stream {self.stream_id!r})")
        object.__setattr__(self, "header", _plain_json(self.header, "Checkpoint.header"))
        if not isinstance(self.arrays, Mapping):
            raise ValueError(f"Checkpoint.arrays must be a dict of numpy arrays; got {type(self.arrays).__name__}")
        object.__setattr__(self, "arrays", {k: _checked_array(k, v) for k, v in self.arrays.items()})


@dataclass(frozen=True)
class CheckpointInfo:
    """Where a checkpoint file is. ``seconds`` is the write time (None when listed)."""

    stream_id: str
    step: int
    path: Path
    size_bytes: int
    seconds: float | None = None


@dataclass(frozen=True)
class LoadResult:
    """The checkpoint loaded, the file it came from, and newer files that were skipped."""

    checkpoint: Checkpoint
    path: Path
    skipped: builtins.list[tuple[Path, str]] = field(default_factory=builtins.list)

    @property
    def fell_back(self) -> bool:
        """True when a newer checkpoint was corrupt and an older one was used."""
        return bool(self.skipped)


@dataclass(frozen=True)
class VerifyReport:
    """The integrity of one checkpoint file: ``ok``, or the ``reason`` it is not."""

    path: Path
    step: int
    size_bytes: int
    ok: bool
    reason: str | None = None


# ----------------------------------------------------------------- the format
def _pad(n: int) -> int:
    return -n % ALIGN


def _le_code(dtype: np.dtype) -> str:
    return dtype.str if dtype.byteorder == "|" else dtype.newbyteorder("<").str


def encode_checkpoint(checkpoint: Checkpoint) -> bytes:
    """The exact bytes of ``checkpoint``'s file (a pure function of the checkpoint)."""
    manifest: builtins.list[dict[str, Any]] = []
    blobs: builtins.list[bytes] = []
    offset = 0
    for name in sorted(checkpoint.arrays):
        array = checkpoint.arrays[name]
        code = _le_code(array.dtype)
        raw = np.ascontiguousarray(array, dtype=np.dtype(code)).tobytes(order="C")
        manifest.append({"name": name, "dtype": code, "shape": [int(d) for d in array.shape], "offset": offset, "nbytes": len(raw)})
        blobs.append(raw)
        offset += len(raw) + _pad(len(raw))
    envelope = {
        "format": FORMAT_VERSION,
        "stream_id": checkpoint.stream_id,
        "step": checkpoint.step,
        "created": checkpoint.created,
        "numpy": np.__version__,
        "arrays": manifest,
        "header": checkpoint.header,
    }
    head = orjson.dumps(envelope, option=orjson.OPT_SORT_KEYS)
    if len(head) > _MAX_HEADER:
        raise ValueError(f"checkpoint header of stream {checkpoint.stream_id!r} is {len(head)} bytes; at most {_MAX_HEADER} allowed")
    out = bytearray(_PREFIX.pack(MAGIC, FORMAT_VERSION, len(head)))
    out += head
    out += bytes(_pad(len(out)))
    for raw in blobs:
        out += raw
        out += bytes(_pad(len(raw)))
    out += hashlib.sha256(out).digest()
    return bytes(out)


@dataclass
class _Parsed:
    """What could be read of a file, even when it is not intact."""

    size: int
    version: int | None = None
    envelope: dict[str, Any] | None = None
    data_start: int | None = None
    checksum_ok: bool = False
    reason: str | None = None


def _parse_envelope(data: bytes, header_len: int) -> tuple[dict[str, Any] | None, str | None]:
    end = _PREFIX.size + header_len
    try:
        envelope = orjson.loads(data[_PREFIX.size : end])
    except orjson.JSONDecodeError as exc:
        return None, f"header (bytes {_PREFIX.size}..{end}) is not valid JSON: {exc}"
    if not isinstance(envelope, dict):
        return None, f"header is a JSON {type(envelope).__name__}, a JSON object is required"
    return envelope, None


def _manifest_problem(envelope: dict[str, Any]) -> str | None:
    """Why the header's fields are unusable, or None."""
    checks = (
        ("format", lambda v: type(v) is int, "an integer"),
        ("stream_id", lambda v: type(v) is str and v != "", "a non-empty string"),
        ("step", lambda v: type(v) is int and 0 <= v <= MAX_STEP, f"an integer in [0, {MAX_STEP}]"),
        ("created", lambda v: v is None or type(v) is str, "a string or null"),
        ("numpy", lambda v: type(v) is str, "a string"),
        ("arrays", lambda v: type(v) is builtins.list, "a list"),
        ("header", lambda v: type(v) is dict, "an object"),
    )
    for key, ok, allowed in checks:
        if key not in envelope:
            return f"header field {key!r} is missing"
        if not ok(envelope[key]):
            return f"header field {key!r} is {envelope[key]!r:.80}; it must be {allowed}"
    names: set[str] = set()
    for i, entry in enumerate(envelope["arrays"]):
        where = f"header field 'arrays'[{i}]"
        if not isinstance(entry, dict) or not {"name", "dtype", "shape", "offset", "nbytes"} <= set(entry):
            return f"{where} is {entry!r:.80}; it must be an object with name, dtype, shape, offset, nbytes"
        name, code, shape = entry["name"], entry["dtype"], entry["shape"]
        if type(name) is not str or not name or name in names:
            return f"{where} has name {name!r}; names must be unique non-empty strings"
        names.add(name)
        if code not in ALLOWED_DTYPES:
            return f"{where} ({name!r}) has dtype {code!r}; allowed: {', '.join(ALLOWED_DTYPES)}"
        if type(shape) is not builtins.list or not all(type(d) is int and d >= 0 for d in shape):
            return f"{where} ({name!r}) has shape {shape!r}; it must be a list of non-negative integers"
        for key in ("offset", "nbytes"):
            if type(entry[key]) is not int or entry[key] < 0:
                return f"{where} ({name!r}) has {key} {entry[key]!r}; it must be a non-negative integer"
        expected = math.prod(shape) * np.dtype(code).itemsize
        if entry["nbytes"] != expected:
            return f"{where} ({name!r}) has nbytes {entry['nbytes']} but shape {shape} of {code} needs {expected}"
    return None


def _data_end(envelope: dict[str, Any]) -> int:
    ends = [e["offset"] + e["nbytes"] + _pad(e["nbytes"]) for e in envelope["arrays"]]
    return max(ends, default=0)


def _parse(data: bytes) -> _Parsed:
    """Check a file's bytes step by step; the first problem found becomes ``reason``."""
    size = len(data)
    parsed = _Parsed(size=size)
    minimum = _PREFIX.size + DIGEST_SIZE
    head = data[: len(MAGIC)]
    if head != MAGIC[: len(head)]:
        parsed.reason = f"not a casecloud checkpoint: the file starts with {head!r}, expected the magic bytes {MAGIC!r}"
        return parsed
    if size < minimum:
        parsed.reason = f"truncated: the file has {size} bytes, fewer than the {minimum} of an empty checkpoint"
        return parsed
    _, version, header_len = _PREFIX.unpack_from(data)
    parsed.version = version
    stored = data[-DIGEST_SIZE:]
    computed = hashlib.sha256(memoryview(data)[:-DIGEST_SIZE]).digest()
    parsed.checksum_ok = stored == computed
    if version == FORMAT_VERSION and _PREFIX.size + header_len <= size:
        envelope, problem = _parse_envelope(data, header_len)
        if envelope is not None and problem is None and _manifest_problem(envelope) is None:
            parsed.envelope = envelope
            parsed.data_start = _PREFIX.size + header_len + _pad(_PREFIX.size + header_len)
    if not parsed.checksum_ok:
        if parsed.envelope is not None and parsed.data_start is not None:
            expected_size = parsed.data_start + _data_end(parsed.envelope) + DIGEST_SIZE
            if expected_size > size:
                parsed.reason = f"truncated: the file has {size} bytes, its header describes {expected_size}"
                return parsed
        if version == FORMAT_VERSION and _PREFIX.size + header_len + DIGEST_SIZE > size:
            parsed.reason = f"truncated: the file has {size} bytes, its {header_len}-byte header alone needs {_PREFIX.size + header_len + DIGEST_SIZE}"
            return parsed
        parsed.reason = f"checksum mismatch: stored SHA-256 {stored.hex()}, computed {computed.hex()}"
        return parsed
    if version != FORMAT_VERSION:
        parsed.reason = f"format version {version} is not supported (this build reads {FORMAT_VERSION})"
        return parsed
    if _PREFIX.size + header_len > size - DIGEST_SIZE:
        parsed.reason = f"header length {header_len} runs past the end of the {size}-byte file"
        return parsed
    envelope, problem = _parse_envelope(data, header_len)
    if envelope is None:
        parsed.reason = problem
        return parsed
    problem = _manifest_problem(envelope)
    if problem is not None:
        parsed.reason = problem
        return parsed
    parsed.envelope = envelope
    parsed.data_start = _PREFIX.size + header_len + _pad(_PREFIX.size + header_len)
    if envelope["format"] != version:
        parsed.reason = f"header says format {envelope['format']} but the file prefix says {version}"
    elif parsed.data_start + _data_end(envelope) != size - DIGEST_SIZE:
        parsed.reason = (
            f"the array manifest describes a data section ending at byte {parsed.data_start + _data_end(envelope)}, "
            f"but the file's data ends at byte {size - DIGEST_SIZE}"
        )
    return parsed


def decode_checkpoint(path: Path, data: bytes) -> Checkpoint:
    """Bytes of a checkpoint file -> Checkpoint, with every check of read_checkpoint_file; ``path`` names the source in errors."""
    parsed = _parse(data)
    if parsed.checksum_ok and parsed.version is not None and parsed.version != FORMAT_VERSION:
        raise CheckpointUnsupported(path, parsed.version)
    if parsed.reason is not None:
        raise CheckpointCorrupt(path, parsed.reason)
    assert parsed.envelope is not None and parsed.data_start is not None
    envelope, base = parsed.envelope, parsed.data_start
    arrays: dict[str, np.ndarray] = {}
    for entry in envelope["arrays"]:
        dtype = np.dtype(entry["dtype"])
        start = base + entry["offset"]
        flat = np.frombuffer(data, dtype=dtype, count=math.prod(entry["shape"]), offset=start)
        native = dtype.newbyteorder("=") if dtype.byteorder != "|" else dtype
        arrays[entry["name"]] = flat.reshape(entry["shape"]).astype(native, copy=True)
    try:
        return Checkpoint(
            stream_id=envelope["stream_id"],
            step=envelope["step"],
            header=envelope["header"],
            arrays=arrays,
            created=envelope["created"],
        )
    except (TypeError, ValueError) as exc:
        raise CheckpointCorrupt(path, f"the header does not describe a valid checkpoint: {exc}") from None


def read_checkpoint_file(path: Path | str) -> Checkpoint:
    """Read and verify one checkpoint file.

    Raises CheckpointCorrupt (with the reason) or CheckpointUnsupported; an
    unreadable path raises the usual OSError.
    """
    path = Path(path)
    return decode_checkpoint(path, path.read_bytes())


def describe_checkpoint(path: Path | str) -> dict[str, Any]:
    """Everything that can be said about one file, for ``casecloud checkpoint show|verify``.

    Never raises for a damaged file: ``checksum_ok`` and ``ok`` are False and
    ``reason`` says why; the header is shown whenever it could be parsed.
    """
    path = Path(path)
    data = path.read_bytes()
    parsed = _parse(data)
    envelope = parsed.envelope or {}
    return {
        "path": str(path),
        "size_bytes": parsed.size,
        "ok": parsed.reason is None,
        "checksum_ok": parsed.checksum_ok,
        "reason": parsed.reason,
        "format": parsed.version,
        "stream_id": envelope.get("stream_id"),
        "step": envelope.get("step"),
        "created": envelope.get("created"),
        "numpy": envelope.get("numpy"),
        "arrays": [
            {"name": e["name"], "dtype": e["dtype"], "shape": builtins.list(e["shape"]), "nbytes": e["nbytes"]}
            for e in envelope.get("arrays", [])
        ],
        "header": envelope.get("header"),
    }


def model_fingerprint_of(header: Mapping[str, Any]) -> str | None:
    """The model fingerprint recorded in a checkpoint header.

    ``header["filter"]["model_fingerprint"]`` when ``header["filter"]`` is an
    object, else ``header.get("model_fingerprint")``.
    """
    nested = header.get("filter")
    value = nested.get("model_fingerprint") if isinstance(nested, Mapping) else header.get("model_fingerprint")
    return value if isinstance(value, str) else None


# ------------------------------------------------------------------ stream ids
_SAFE = frozenset(b"abcdefghijklmnopqrstuvwxyz0123456789-_")
_HEX = "0123456789ABCDEF"


def encode_stream_id(stream_id: str) -> str:
    """A directory name for ``stream_id``: reversible, path-safe, case-insensitive-safe."""
    if type(stream_id) is not str or not stream_id:
        raise ValueError(f"stream id must be a non-empty str; got {stream_id!r}")
    try:
        raw = stream_id.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise ValueError(f"stream id {stream_id!r} is not valid Unicode text: {exc}") from None
    name = "".join(chr(b) if b in _SAFE else f"%{b:02X}" for b in raw)
    if len(name) > _MAX_DIR_NAME:
        raise ValueError(
            f"stream id {stream_id!r:.80} encodes to a {len(name)}-character directory name; at most "
            f"{_MAX_DIR_NAME} allowed (each character outside a-z 0-9 - _ takes 3 per UTF-8 byte)"
        )
    return name


def decode_stream_id(name: str) -> str:
    """The stream id of a directory name made by :func:`encode_stream_id` (ValueError otherwise)."""
    out = bytearray()
    i = 0
    while i < len(name):
        ch = name[i]
        pair = name[i + 1 : i + 3]
        if ch == "%" and len(pair) == 2 and all(c in _HEX for c in pair):
            out.append(int(pair, 16))
            i += 3
        elif ord(ch) < 128 and ord(ch) in _SAFE:
            out.append(ord(ch))
            i += 1
        else:
            raise ValueError(f"{name!r} is not an encoded stream id: unexpected {ch!r} at position {i}")
    try:
        stream_id = out.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ValueError(f"{name!r} is not an encoded stream id: {exc}") from None
    if not stream_id or encode_stream_id(stream_id) != name:
        raise ValueError(f"{name!r} is not the canonical encoding of any stream id")
    return stream_id


