"""Specification of service/state (format, local store): format, durability rules and fallbacks.

The layout test re-reads a file with nothing but ``struct``, ``hashlib`` and
``json`` from the standard library, following the format described in the
module docstring, so the documentation and the bytes cannot drift apart.
"""

from __future__ import annotations

import hashlib
import json
import os
import stat
import struct
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import filters
import schemas
from service import state as ck
from service.state import (
    Checkpoint,
    CheckpointCorrupt,
    CheckpointError,
    CheckpointMismatch,
    CheckpointUnsupported,
    LocalCheckpointStore,
    describe_checkpoint,
    read_checkpoint_file,
)

FP = "fingerprint-a"


def _arrays() -> dict[str, np.ndarray]:
    rng = np.random.Generator(np.random.PCG64(20240501))
    special = np.array([np.nan, -0.0, np.inf, -np.inf, 5e-324, 1.0 / 3.0])
    # a NaN with a non-default payload must survive bit for bit
    special = np.concatenate([special, np.array([0x7FF8_0000_DEAD_BEEF], dtype=np.uint64).view(np.float64)])
    return {
        "states": rng.integers(0, 10**12, size=(7, 2, 4), dtype=np.int64),
        "params": rng.standard_normal((7, 3)),
        "log_weights": special,
        "flags": np.array([True, False, True]),
        "small": np.arange(-3, 3, dtype=np.int8),
        "u16": np.array([0, 65535], dtype=np.uint16),
        "f32": rng.standard_normal(5).astype(np.float32),
        "f16": np.array([0.5, -2.0], dtype=np.float16),
        "c128": np.array([1 + 2j, -0.0 - 1j]),
        "empty": np.zeros((0, 3), dtype=np.int32),
        "scalar": np.array(4.25),
    }


def _header(fp: str = FP, **extra) -> dict:
    header = {
        "filter": {"model_fingerprint": fp, "time": 12, "log_evidence": -123.456789012345678},
        "last_period": "2024-W05",
        "source": {"topic": "counts", "partition": 3, "offset": 1234567890123},
        "alerts": {"icu>40": {"active": True, "since": 11}},
        "big": 2**64 - 1,
    }
    header.update(extra)
    return header


def _checkpoint(stream_id: str = "region-a", step: int = 1, fp: str = FP, **kwargs) -> Checkpoint:
    return Checkpoint(stream_id=stream_id, step=step, header=_header(fp), arrays=_arrays(), **kwargs)


def _assert_same_arrays(got: dict[str, np.ndarray], want: dict[str, np.ndarray]) -> None:
    assert sorted(got) == sorted(want)
    for name, array in want.items():
        assert got[name].dtype == array.dtype, name
        assert got[name].shape == array.shape, name
        assert got[name].tobytes() == np.ascontiguousarray(array).tobytes(), name


# ---------------------------------------------------------------- round trips
def test_round_trip_is_bit_identical(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path)
    original = _checkpoint(step=42, created="2024-02-01T10:00:00Z")
    info = store.write(original)
    assert info.path == tmp_path / "region-a" / "000000000042.ckpt"
    assert info.size_bytes == info.path.stat().st_size
    assert info.seconds is not None and info.seconds >= 0

    result = store.load_latest("region-a", FP)
    assert result is not None
    assert result.path == info.path and result.skipped == [] and not result.fell_back
    loaded = result.checkpoint
    assert (loaded.stream_id, loaded.step, loaded.created) == ("region-a", 42, "2024-02-01T10:00:00Z")
    assert loaded.header == _header()
    _assert_same_arrays(loaded.arrays, _arrays())
    for array in loaded.arrays.values():
        assert array.flags.writeable and array.flags.c_contiguous


def test_non_contiguous_and_big_endian_inputs_come_back_as_equal_native_arrays(tmp_path: Path) -> None:
    base = np.arange(24, dtype=np.float64).reshape(4, 6)
    arrays = {
        "strided": base[:, ::2],
        "fortran": np.asfortranarray(base),
        "big_endian": base.astype(">f8"),
        "big_int": np.array([1, -2, 3], dtype=">i4"),
    }
    path = LocalCheckpointStore(tmp_path).write(Checkpoint("s", 0, {}, arrays)).path
    loaded = read_checkpoint_file(path).arrays
    np.testing.assert_array_equal(loaded["strided"], base[:, ::2])
    np.testing.assert_array_equal(loaded["fortran"], base)
    assert loaded["big_endian"].dtype == np.dtype("=f8")
    np.testing.assert_array_equal(loaded["big_endian"], base)
    assert loaded["big_int"].dtype == np.dtype("=i4")
    assert loaded["big_int"].tolist() == [1, -2, 3]


def test_same_checkpoint_writes_identical_bytes(tmp_path: Path) -> None:
    first = LocalCheckpointStore(tmp_path / "one").write(_checkpoint(created="t0")).path.read_bytes()
    # the same content built with dict keys in another order
    arrays = dict(reversed(list(_arrays().items())))
    header = dict(reversed(list(_header().items())))
    second_ck = Checkpoint("region-a", 1, header, arrays, created="t0")
    second = LocalCheckpointStore(tmp_path / "two").write(second_ck).path.read_bytes()
    assert first == second
    assert ck.encode_checkpoint(second_ck) == first
    # and the content really depends on the fields: another `created` gives other bytes
    assert ck.encode_checkpoint(_checkpoint(created="t1")) != first


def test_file_layout_matches_the_documented_format(tmp_path: Path) -> None:
    path = LocalCheckpointStore(tmp_path).write(_checkpoint(step=7)).path
    data = path.read_bytes()
    magic, version, header_len = struct.unpack_from("<8sII", data)
    assert magic == b"\x89CCLOUD\n" and version == 1
    assert hashlib.sha256(data[:-32]).digest() == data[-32:]
    envelope = json.loads(data[16 : 16 + header_len])
    assert list(envelope) == sorted(envelope)
    assert {"format", "stream_id", "step", "created", "numpy", "arrays", "header"} <= set(envelope)
    assert (envelope["format"], envelope["stream_id"], envelope["step"]) == (1, "region-a", 7)
    assert envelope["numpy"] == np.__version__
    start = 16 + header_len + (-(16 + header_len) % 64)
    assert start % 64 == 0
    names = [entry["name"] for entry in envelope["arrays"]]
    assert names == sorted(_arrays())
    for entry in envelope["arrays"]:
        assert entry["offset"] % 64 == 0
        assert entry["dtype"][0] in "<|"
        raw = data[start + entry["offset"] : start + entry["offset"] + entry["nbytes"]]
        value = np.frombuffer(raw, dtype=entry["dtype"]).reshape(entry["shape"])
        want = _arrays()[entry["name"]]
        assert value.tobytes() == want.astype(want.dtype.newbyteorder("<")).tobytes()
    last = max(e["offset"] + e["nbytes"] + (-e["nbytes"] % 64) for e in envelope["arrays"])
    assert start + last + 32 == len(data)


# ---------------------------------------------------------- store behaviour
def test_keep_prunes_to_the_newest_k_and_lists_newest_first(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path, keep=3)
    for step in range(1, 6):
        store.write(_checkpoint(step=step))
    assert [info.step for info in store.list("region-a")] == [5, 4, 3]
    assert sorted(p.name for p in (tmp_path / "region-a").iterdir()) == [
        "000000000003.ckpt",
        "000000000004.ckpt",
        "000000000005.ckpt",
    ]
    assert all(info.seconds is None and info.size_bytes > 0 for info in store.list("region-a"))


def test_keep_one_keeps_only_the_newest(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path, keep=1)
    store.write(_checkpoint(step=1))
    store.write(_checkpoint(step=2))
    assert [info.step for info in store.list("region-a")] == [2]


@pytest.mark.parametrize("keep", [0, -1, 2.5, True, "3"])
def test_keep_must_be_a_positive_integer(tmp_path: Path, keep) -> None:
    with pytest.raises(ValueError, match=r"keep must be an integer >= 1; got .*root"):
        LocalCheckpointStore(tmp_path, keep=keep)


def test_writing_the_same_step_again_overwrites(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path)
    store.write(Checkpoint("s", 5, {"v": "first"}, {}))
    store.write(Checkpoint("s", 5, {"v": "second"}, {}))
    assert [info.step for info in store.list("s")] == [5]
    result = store.load_latest("s", None)
    assert result is not None and result.checkpoint.header == {"v": "second"}


def test_unknown_stream_has_no_checkpoint(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path / "not-yet-created")
    assert store.load_latest("nobody", FP) is None
    assert store.list("nobody") == []
    assert store.streams() == []
    assert store.verify("nobody") == []


def test_streams_lists_streams_with_checkpoints_and_ignores_foreign_directories(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path)
    store.write(Checkpoint("b", 0, {}, {}))
    store.write(Checkpoint("a", 0, {}, {}))
    (tmp_path / "Not Encoded").mkdir()
    (tmp_path / "empty-stream").mkdir()
    (tmp_path / "stray-file.txt").write_text("x")
    assert store.streams() == ["a", "b"]


# ------------------------------------------------------------- damaged files
def _three_steps(tmp_path: Path) -> LocalCheckpointStore:
    store = LocalCheckpointStore(tmp_path, keep=5)
    for step in (1, 2, 3):
        store.write(_checkpoint(step=step))
    return store


def test_truncated_newest_falls_back_to_previous_and_says_so(tmp_path: Path) -> None:
    store = _three_steps(tmp_path)
    newest = store.path_for("region-a", 3)
    data = newest.read_bytes()
    newest.write_bytes(data[: len(data) // 2])
    result = store.load_latest("region-a", FP)
    assert result is not None
    assert result.checkpoint.step == 2 and result.path == store.path_for("region-a", 2)
    assert result.fell_back
    assert len(result.skipped) == 1
    path, reason = result.skipped[0]
    assert path == newest
    assert reason.startswith("truncated") and str(len(data) // 2) in reason and str(len(data)) in reason


@pytest.mark.parametrize("keep_bytes", [0, 5, 20, -1])
def test_any_truncation_is_detected(tmp_path: Path, keep_bytes: int) -> None:
    path = LocalCheckpointStore(tmp_path).write(_checkpoint()).path
    data = path.read_bytes()
    path.write_bytes(data[:keep_bytes])
    with pytest.raises(CheckpointCorrupt) as info:
        read_checkpoint_file(path)
    assert info.value.path == path
    assert "truncated" in info.value.reason or "checksum" in info.value.reason
    assert str(path) in str(info.value)


def test_flipped_byte_is_detected_by_the_checksum(tmp_path: Path) -> None:
    store = _three_steps(tmp_path)
    newest = store.path_for("region-a", 3)
    data = bytearray(newest.read_bytes())
    data[len(data) - 100] ^= 0x01  # inside the array bytes: the header still parses
    newest.write_bytes(bytes(data))
    with pytest.raises(CheckpointCorrupt, match="checksum mismatch") as info:
        read_checkpoint_file(newest)
    assert info.value.path == newest
    result = store.load_latest("region-a", FP)
    assert result is not None and result.checkpoint.step == 2
    assert [(p, r.split(":")[0]) for p, r in result.skipped] == [(newest, "checksum mismatch")]
    reports = store.verify("region-a")
    assert [(r.step, r.ok) for r in reports] == [(3, False), (2, True), (1, True)]
    assert "checksum mismatch" in (reports[0].reason or "")


def test_flipped_byte_in_the_header_is_detected(tmp_path: Path) -> None:
    path = LocalCheckpointStore(tmp_path).write(_checkpoint()).path
    data = bytearray(path.read_bytes())
    at = data.index(b"region-a")
    data[at] = ord("R")  # still valid JSON, still a plausible header
    path.write_bytes(bytes(data))
    with pytest.raises(CheckpointCorrupt, match="checksum mismatch"):
        read_checkpoint_file(path)


def test_garbage_file_is_detected(tmp_path: Path) -> None:
    store = _three_steps(tmp_path)
    garbage = store.path_for("region-a", 9)
    garbage.write_bytes(np.random.Generator(np.random.PCG64(7)).bytes(4096))
    result = store.load_latest("region-a", FP)
    assert result is not None and result.checkpoint.step == 3
    assert result.skipped[0][0] == garbage
    assert result.skipped[0][1].startswith("not a casecloud checkpoint")


@pytest.mark.parametrize("content", [b"", b"\x89CC", b"{}", b"\x89CCLOUD\n" + bytes(40)])
def test_tiny_or_empty_files_are_corrupt_not_crashes(tmp_path: Path, content: bytes) -> None:
    path = tmp_path / "000000000001.ckpt"
    path.write_bytes(content)
    with pytest.raises(CheckpointCorrupt):
        read_checkpoint_file(path)
    description = describe_checkpoint(path)
    assert description["ok"] is False and description["reason"]


def test_all_files_corrupt_raises_listing_every_file(tmp_path: Path) -> None:
    store = _three_steps(tmp_path)
    paths = [store.path_for("region-a", step) for step in (3, 2, 1)]
    paths[0].write_bytes(b"garbage")
    paths[1].write_bytes(paths[1].read_bytes()[:-1])
    data = bytearray(paths[2].read_bytes())
    data[-1] ^= 0xFF
    paths[2].write_bytes(bytes(data))
    with pytest.raises(CheckpointCorrupt) as info:
        store.load_latest("region-a", FP)
    error = info.value
    assert error.stream_id == "region-a"
    assert error.path == tmp_path / "region-a"
    assert [p for p, _ in error.skipped] == paths
    message = str(error)
    for path in paths:
        assert str(path) in message
    assert "region-a" in message and "all 3 files are corrupt" in message


def test_file_of_another_stream_is_not_accepted(tmp_path: Path) -> None:
    store = _three_steps(tmp_path)
    other = store.write(Checkpoint("region-b", 4, _header(), {})).path
    stolen = store.path_for("region-a", 4)
    stolen.write_bytes(other.read_bytes())
    result = store.load_latest("region-a", FP)
    assert result is not None and result.checkpoint.step == 3
    assert result.skipped == [(stolen, "the file belongs to stream 'region-b', not 'region-a'")]


def test_file_renamed_to_another_step_is_not_accepted(tmp_path: Path) -> None:
    store = _three_steps(tmp_path)
    os.replace(store.path_for("region-a", 1), store.path_for("region-a", 8))
    result = store.load_latest("region-a", FP)
    assert result is not None and result.checkpoint.step == 3
    assert result.skipped == [(store.path_for("region-a", 8), "the file is named for step 8 but its header says step 1")]


def _rewrite_version(path: Path, version: int) -> None:
    body = bytearray(path.read_bytes()[:-32])
    struct.pack_into("<I", body, 8, version)
    path.write_bytes(bytes(body) + hashlib.sha256(body).digest())


def test_intact_file_of_a_newer_format_is_refused_not_skipped(tmp_path: Path) -> None:
    store = _three_steps(tmp_path)
    newest = store.path_for("region-a", 3)
    _rewrite_version(newest, 2)
    with pytest.raises(CheckpointUnsupported, match="format version 2; this casecloud reads version 1") as info:
        store.load_latest("region-a", FP)
    assert info.value.path == newest and info.value.version == 2 and info.value.stream_id == "region-a"
    assert describe_checkpoint(newest)["checksum_ok"] is True


# -------------------------------------------------------------- fingerprints
def test_fingerprint_mismatch_is_refused_with_a_clear_message(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path)
    store.write(_checkpoint(step=1, fp="old-model"))
    with pytest.raises(CheckpointMismatch) as info:
        store.load_latest("region-a", "new-model")
    error = info.value
    path = store.path_for("region-a", 1)
    assert (error.expected, error.found, error.path, error.stream_id) == ("new-model", "old-model", path, "region-a")
    message = str(error)
    for part in ("'old-model'", "'new-model'", "'region-a'", str(path), "reset the stream deliberately", "restore the model spec"):
        assert part in message


def test_mismatch_never_falls_back_to_an_older_matching_file(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path)
    store.write(_checkpoint(step=1, fp="new-model"))
    store.write(_checkpoint(step=2, fp="old-model"))
    with pytest.raises(CheckpointMismatch):
        store.load_latest("region-a", "new-model")
    assert [info.step for info in store.list("region-a")] == [2, 1]  # nothing deleted or rewritten


def test_mismatch_is_checked_on_the_newest_readable_file(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path)
    store.write(_checkpoint(step=1, fp="old-model"))
    store.write(_checkpoint(step=2, fp="new-model"))
    store.path_for("region-a", 2).write_bytes(b"junk")
    with pytest.raises(CheckpointMismatch):
        store.load_latest("region-a", "new-model")


def test_fingerprint_fields(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path)
    store.write(Checkpoint("top", 1, {"model_fingerprint": "m1"}, {}))
    store.write(Checkpoint("none", 1, {"period": 3}, {}))
    # the nested filter header wins over a top-level field
    store.write(Checkpoint("both", 1, {"filter": {"model_fingerprint": "m2"}, "model_fingerprint": "m1"}, {}))
    result = store.load_latest("top", "m1")
    assert result is not None and result.checkpoint.step == 1
    assert store.load_latest("both", "m2") is not None
    with pytest.raises(CheckpointMismatch, match="no model fingerprint at all"):
        store.load_latest("none", "m1")
    # without an expectation nothing is compared
    assert store.load_latest("none", None) is not None
    assert store.load_latest("top", None) is not None


# ---------------------------------------------------------------- stream ids
UNSAFE_IDS = [
    "a/b",
    "../../etc",
    ".",
    "..",
    "région/ED ≥65",
    "感染症/東京",
    "UPPER",
    "upper",
    "x%41",
    "%",
    "with space\tand\nnewline",
    "con",
    "-leading-dash",
    "🦠",
]


def test_unsafe_stream_ids_round_trip_in_their_own_directories(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path)
    for i, stream_id in enumerate(UNSAFE_IDS):
        store.write(Checkpoint(stream_id, i, {"id": stream_id}, {"i": np.array([i])}))
    assert store.streams() == sorted(UNSAFE_IDS)
    children = sorted(p for p in tmp_path.iterdir())
    assert len(children) == len(UNSAFE_IDS)  # 'UPPER' and 'upper' did not merge; nothing escaped the root
    for child in children:
        assert child.parent == tmp_path
        assert set(child.name) <= set("abcdefghijklmnopqrstuvwxyz0123456789-_%ABCDEF")
    for i, stream_id in enumerate(UNSAFE_IDS):
        result = store.load_latest(stream_id, None)
        assert result is not None
        assert result.checkpoint.stream_id == stream_id and result.checkpoint.header == {"id": stream_id}
        assert result.checkpoint.arrays["i"].tolist() == [i]


def test_encoded_names_are_distinct_under_case_folding() -> None:
    names = [ck.encode_stream_id(s) for s in UNSAFE_IDS]
    assert len({n.casefold() for n in names}) == len(UNSAFE_IDS)


@settings(derandomize=True, database=None, max_examples=300, deadline=None)
@given(st.text(min_size=1, max_size=40))
def test_stream_id_encoding_is_reversible_and_safe(stream_id: str) -> None:
    try:
        name = ck.encode_stream_id(stream_id)
    except ValueError as exc:  # lone surrogates are not text a stream id can be
        assert "not valid Unicode" in str(exc)
        return
    assert ck.decode_stream_id(name) == stream_id
    assert name not in {".", ".."} and "/" not in name and "\\" not in name and "\x00" not in name


@pytest.mark.parametrize("name", ["A", "a%4", "a%zz", "a.b", "%61", "%2e", "", "%C3", "%2F%"])
def test_decode_rejects_names_that_are_not_canonical_encodings(name: str) -> None:
    with pytest.raises(ValueError, match="not"):
        ck.decode_stream_id(name)


def test_overlong_stream_id_is_refused_with_its_length() -> None:
    with pytest.raises(ValueError, match=r"encodes to a 300-character directory name; at most 240"):
        ck.encode_stream_id("é" * 50)


# -------------------------------------------------------------- bad content
@pytest.mark.parametrize(
    ("value", "pattern"),
    [
        (np.array([{"a": 1}, None], dtype=object), r"'bad' has dtype object .*allowed dtypes: bool"),
        (np.array(["x", "y"]), r"'bad' has dtype <U1"),
        (np.array([b"x"]), r"'bad' has dtype \|S1"),
        (np.zeros(2, dtype=[("a", "<f8")]), r"'bad' has dtype"),
        (np.array(["2024-01-01"], dtype="datetime64[D]"), r"'bad' has dtype datetime64"),
        (np.array([1, 2], dtype="timedelta64[s]"), r"'bad' has dtype timedelta64"),
    ],
)
def test_non_numeric_arrays_are_rejected(value: np.ndarray, pattern: str) -> None:
    with pytest.raises(ValueError, match=pattern):
        Checkpoint("s", 1, {}, {"bad": value})


def test_non_array_values_are_rejected() -> None:
    with pytest.raises(TypeError, match=r"array 'w' is a list; a numpy.ndarray of a numeric dtype is required"):
        Checkpoint("s", 1, {}, {"w": [1.0, 2.0]})  # type: ignore[dict-item]
    with pytest.raises(ValueError, match="array names must be non-empty str"):
        Checkpoint("s", 1, {}, {"": np.zeros(1)})


@pytest.mark.parametrize(
    ("header", "pattern"),
    [
        ({"filter": {"log_evidence": float("nan")}}, r"Checkpoint.header\['filter'\]\['log_evidence'\] is nan"),
        ({"x": float("inf")}, r"\['x'\] is inf; only finite floats"),
        ({"probs": (0.1, 0.9)}, r"\['probs'\] is a builtins.tuple .*tuples: use lists"),
        ({"v": np.complex128(1.5)}, r"\['v'\] is a numpy.complex128"),
        ({"v": np.float32("nan")}, r"\['v'\] is nan"),
        ({"v": {1, 2}}, r"\['v'\] is a builtins.set"),
        ({1: "a"}, r"has the key 1 of type int; header keys must be str"),
        ({"n": 2**64}, r"\['n'\] is the integer 18446744073709551616, outside the 64-bit range"),
        ({"b": b"raw"}, r"\['b'\] is a builtins.bytes"),
    ],
)
def test_headers_must_be_plain_json(header: dict, pattern: str) -> None:
    with pytest.raises(ValueError, match=pattern):
        Checkpoint("s", 1, header, {})


def test_numpy_scalars_in_the_header_become_plain_numbers() -> None:
    checkpoint = Checkpoint("s", 1, {"f": np.float64(1.5), "i": np.int64(-3), "b": np.bool_(True)}, {})
    assert checkpoint.header == {"f": 1.5, "i": -3, "b": True}
    assert [type(v) for v in checkpoint.header.values()] == [float, int, bool]


@pytest.mark.parametrize(
    ("kwargs", "pattern"),
    [
        ({"stream_id": ""}, "stream_id must be a non-empty str"),
        ({"step": -1}, r"step must be an integer in \[0, 999999999999\]; got -1"),
        ({"step": 10**12}, "step must be an integer"),
        ({"step": 1.0}, "step must be an integer"),
        ({"step": True}, "step must be an integer"),
        ({"created": 1700000000}, "created must be a str or None"),
    ],
)
def test_checkpoint_fields_are_validated(kwargs: dict, pattern: str) -> None:
    fields = {"stream_id": "s", "step": 1, "header": {}, "arrays": {}} | kwargs
    with pytest.raises(ValueError, match=pattern):
        Checkpoint(**fields)


def test_numpy_integer_step_is_accepted_as_int() -> None:
    checkpoint = Checkpoint("s", np.int64(3), {}, {})  # type: ignore[arg-type]
    assert type(checkpoint.step) is int and checkpoint.step == 3


# ------------------------------------------------------------------ atomicity
def test_stray_temp_file_from_a_crash_does_not_confuse_loading(tmp_path: Path) -> None:
    store = LocalCheckpointStore(tmp_path)
    store.write(_checkpoint(step=2))
    complete = ck.encode_checkpoint(_checkpoint(step=3))
    stray = tmp_path / "region-a" / ".000000000003.ckpt.k2j4h5.tmp"
    stray.write_bytes(complete[: len(complete) // 3])  # the crash hit mid-write
    result = store.load_latest("region-a", FP)
    assert result is not None and result.checkpoint.step == 2 and result.skipped == []
    assert [info.step for info in store.list("region-a")] == [2]
    assert [report.step for report in store.verify("region-a")] == [2]
    store.write(_checkpoint(step=3))
    assert not stray.exists()  # the next write cleans up after the crash
    assert sorted(p.name for p in (tmp_path / "region-a").iterdir()) == ["000000000002.ckpt", "000000000003.ckpt"]


def test_failed_rename_leaves_the_previous_checkpoint_and_no_temp_file(tmp_path: Path, monkeypatch) -> None:
    store = LocalCheckpointStore(tmp_path)
    store.write(Checkpoint("s", 1, {"v": "old"}, {}))
    before = store.path_for("s", 1).read_bytes()

    def crash(src, dst):
        raise OSError("simulated power loss during rename")

    monkeypatch.setattr(os, "replace", crash)
    with pytest.raises(OSError, match="simulated power loss"):
        store.write(Checkpoint("s", 1, {"v": "new"}, {}))
    monkeypatch.undo()
    assert sorted(p.name for p in (tmp_path / "s").iterdir()) == ["000000000001.ckpt"]
    assert store.path_for("s", 1).read_bytes() == before
    result = store.load_latest("s", None)
    assert result is not None and result.checkpoint.header == {"v": "old"}


def test_writes_are_fsynced_before_the_rename(tmp_path: Path, monkeypatch) -> None:
    events: list[str] = []
    real_fsync, real_replace = os.fsync, os.replace

    def fsync(fd):
        events.append("fsync-dir" if stat.S_ISDIR(os.fstat(fd).st_mode) else "fsync-file")
        return real_fsync(fd)

    def replace(src, dst):
        events.append("replace")
        return real_replace(src, dst)

    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "replace", replace)
    LocalCheckpointStore(tmp_path / "root").write(Checkpoint("s", 1, {}, {}))
    # new stream directory: its parent is synced; then file, rename, stream directory
    assert events == ["fsync-dir", "fsync-file", "replace", "fsync-dir"]


def test_files_pruned_by_a_concurrent_write_are_passed_over(tmp_path: Path, monkeypatch) -> None:
    store = _three_steps(tmp_path)
    listing = store._files("region-a")
    gone = store.path_for("region-a", 1)
    gone.unlink()  # as if a write pruned it between our listing and our reading
    monkeypatch.setattr(store, "_files", lambda stream_id: listing)
    assert [info.step for info in store.list("region-a")] == [3, 2]
    assert [report.step for report in store.verify("region-a")] == [3, 2]
    store.path_for("region-a", 3).write_bytes(b"junk")
    store.path_for("region-a", 2).write_bytes(b"junk")
    with pytest.raises(CheckpointCorrupt, match="all 2 files are corrupt"):
        store.load_latest("region-a", FP)


# --------------------------------------------------------- describe / verify
def test_describe_shows_header_arrays_and_integrity(tmp_path: Path) -> None:
    path = LocalCheckpointStore(tmp_path).write(_checkpoint(step=4, created="c")).path
    good = describe_checkpoint(path)
    assert good["ok"] is True and good["checksum_ok"] is True and good["reason"] is None
    assert (good["format"], good["stream_id"], good["step"], good["created"]) == (1, "region-a", 4, "c")
    assert good["size_bytes"] == path.stat().st_size and good["header"] == _header()
    shapes = {a["name"]: (a["dtype"], tuple(a["shape"])) for a in good["arrays"]}
    assert shapes["states"] == ("<i8", (7, 2, 4)) and shapes["flags"] == ("|b1", (3,))
    json.dumps(good)  # printable as JSON by the command line

    data = bytearray(path.read_bytes())
    data[-40] ^= 0x10
    path.write_bytes(bytes(data))
    bad = describe_checkpoint(path)
    assert bad["ok"] is False and bad["checksum_ok"] is False
    assert bad["reason"].startswith("checksum mismatch")
    assert bad["header"] == _header()  # still shown for forensics


def test_error_classes_carry_their_context(tmp_path: Path) -> None:
    for cls in (CheckpointCorrupt, CheckpointMismatch, CheckpointUnsupported):
        assert issubclass(cls, CheckpointError)
    error = CheckpointCorrupt(tmp_path / "f.ckpt", "why", stream_id="s")
    assert (error.path, error.reason, error.stream_id) == (tmp_path / "f.ckpt", "why", "s")


def test_public_names() -> None:
    assert set(ck.__all__) == {
        "FORMAT_VERSION",
        "MAGIC",
        "Checkpoint",
        "build_checkpoint_store",
        "CheckpointCorrupt",
        "CheckpointError",
        "CheckpointInfo",
        "CheckpointMismatch",
        "CheckpointStore",
        "CheckpointUnsupported",
        "LoadResult",
        "LocalCheckpointStore",
        "VerifyReport",
        "decode_checkpoint",
        "decode_stream_id",
        "describe_checkpoint",
        "encode_checkpoint",
        "encode_stream_id",
        "model_fingerprint_of",
        "read_checkpoint_file",
    }
    assert all(hasattr(ck, name) for name in ck.__all__)


def test_no_pickle_is_involved() -> None:
    source = "".join(f.read_text(encoding="utf-8") for f in sorted(Path(ck.__file__).parent.rglob("*.py")))
    assert "import pickle" not in source and "allow_pickle=True" not in source and "np.load(" not in source


# ------------------------------------------------ a real filter, resumed
def test_resumed_filter_is_bit_identical_to_an_uninterrupted_run(tmp_path: Path) -> None:
    model = filters.CompartmentalModel(schemas.load_model_spec(schemas.example_model_path("seir")))
    season = filters.simulate_season(model, 14, filters.stream_generator(99, "truth"))
    config = filters.FilterConfig(n_particles=500)

    def fresh() -> filters.ParticleFilter:
        return filters.ParticleFilter(model, config, filters.stream_generator(1, "x"))

    uninterrupted = fresh()
    expected = [uninterrupted.step(obs, with_summary=False) for obs in season.observations]

    first = fresh()
    before = [first.step(obs, with_summary=False) for obs in season.observations[:6]]
    header, arrays = first.state()
    store = LocalCheckpointStore(tmp_path)
    store.write(Checkpoint("x", first.step_count, {"filter": header, "period": 6}, arrays))
    del first

    result = store.load_latest("x", model.fingerprint())
    assert result is not None
    resumed = filters.ParticleFilter.from_state(model, result.checkpoint.header["filter"], result.checkpoint.arrays)
    after = [resumed.step(obs, with_summary=False) for obs in season.observations[6:]]

    assert [(r.step, r.log_evidence_increment, r.ess, r.resampled, r.collapsed) for r in before + after] == [
        (r.step, r.log_evidence_increment, r.ess, r.resampled, r.collapsed) for r in expected
    ]
    assert any(r.resampled for r in after)  # the restored generator was really exercised
    assert resumed.log_evidence == uninterrupted.log_evidence
    assert filters.generator_state(resumed.rng) == filters.generator_state(uninterrupted.rng)
    _assert_same_arrays(resumed.particles.arrays(), uninterrupted.particles.arrays())
