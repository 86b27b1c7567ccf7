"""The Kafka checkpoint store's pure logic, no broker: chunking and reassembly
around the chunk boundary, detection of a damaged or missing chunk, the
compression round trip, record keys for unusual stream ids, the pointer and
chunk-header formats, and the in-memory index that turns records into
"which checkpoints exist".

Outside references: compressed bytes are inflated with the standard library's
one-shot ``zlib.decompress`` / ``lzma.decompress`` and hashed with
``hashlib.sha256`` directly, independently of the store's own (bounded,
incremental) decoding path.
"""

from __future__ import annotations

import hashlib
import lzma
import zlib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from filters import CompartmentalModel, FilterConfig, ParticleFilter, stream_generator
from schemas import DeploymentConfig, KafkaSettings, example_model_path, load_model_spec
from service.state import build_checkpoint_store
from service.state.kafka.index import _Engine
from service.state.kafka import (
    Blob,
    ChunkProblem,
    KafkaCheckpointMismatch,
    KafkaCheckpointStore,
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
from service.state import Checkpoint, CheckpointMismatch, LocalCheckpointStore, encode_checkpoint

UNUSUAL_IDS = [
    "ward-a",
    "Ward-A",  # differs from the next only in case
    "ward-a.",
    "a|b",  # the key separator itself
    "|",
    "a|000000000001|000000",  # looks like a chunk key
    "région/nord",
    "名古屋-ed",
    "space in id",
    "%41",  # looks like an escape
    "emoji-🦠",
    "x" * 80,
]


def _incompressible(n: int, seed: int = 0) -> bytes:
    return np.random.default_rng(seed).integers(0, 256, n, dtype=np.uint8).tobytes()


def _cloud_bytes(particles: int = 2000) -> bytes:
    """The checkpoint file of a real two-band SEIR cloud (what the service stores)."""
    model = CompartmentalModel(load_model_spec(example_model_path("seir_two_band")))
    pf = ParticleFilter(model, FilterConfig(n_particles=particles), stream_generator(7, "unit"), time=0)
    header, arrays = pf.state()
    return encode_checkpoint(Checkpoint("unit", 0, {"filter": header}, arrays))


# ------------------------------------------------------------- chunking
@pytest.mark.parametrize("chunk", [1, 7, 1024])
def test_split_chunks_around_the_boundary(chunk):
    for size in sorted({0, 1, chunk - 1, chunk, chunk + 1, 2 * chunk - 1, 2 * chunk, 2 * chunk + 1, 5 * chunk}):
        data = _incompressible(size, seed=size)
        pieces = split_chunks(data, chunk)
        assert b"".join(pieces) == data
        if size == 0:
            assert pieces == [b""]  # one empty chunk, so that every checkpoint has a chunk 0
        else:
            assert len(pieces) == -(-size // chunk)  # ceil(size / chunk)
            assert all(len(p) == chunk for p in pieces[:-1]) and 0 < len(pieces[-1]) <= chunk


@pytest.mark.parametrize("codec", ["zlib", "lzma"])
def test_pack_unpack_round_trip_when_the_stored_size_sits_on_a_chunk_boundary(codec):
    data = _incompressible(10_000, seed=1)
    stored = len(pack(0, data, chunk_bytes=10**6, codec=codec)[1][0])
    for chunk, expected in [(stored, 1), (stored - 1, 2), (stored + 1, 1), ((stored + 1) // 2, 2), (stored // 2, 2 + stored % 2)]:
        blob, chunks = pack(3, data, chunk_bytes=chunk, codec=codec)
        assert blob.chunks == len(chunks) == expected, (chunk, stored)
        assert blob.stored_bytes == stored and blob.raw_bytes == len(data) and blob.step == 3
        assert all(len(c) <= chunk for c in chunks)
        assert unpack(blob, dict(enumerate(chunks))) == data
        # independently: the joined chunks are the codec's plain output, hashed as recorded
        joined = b"".join(chunks)
        assert hashlib.sha256(joined).hexdigest() == blob.sha256
        assert (zlib.decompress(joined) if codec == "zlib" else lzma.decompress(joined)) == data


@pytest.mark.parametrize("codec", ["zlib", "lzma"])
def test_compression_round_trip_of_a_real_cloud(codec):
    data = _cloud_bytes()
    blob, chunks = pack(0, data, chunk_bytes=4096, codec=codec)
    assert blob.chunks == len(chunks) > 1
    assert unpack(blob, {i: c for i, c in reversed(list(enumerate(chunks)))}) == data  # order of arrival is irrelevant
    joined = b"".join(chunks)
    assert (zlib.decompress(joined) if codec == "zlib" else lzma.decompress(joined)) == data
    assert blob.stored_bytes < len(data) / 2, "integer counts and parameters should compress well"


# ------------------------------------------------------------ corruption
@pytest.fixture(scope="module")
def packed():
    data = _incompressible(50_000, seed=2)
    blob, chunks = pack(9, data, chunk_bytes=8192)
    assert blob.chunks == 7
    return data, blob, chunks


@pytest.mark.parametrize("victim", [0, 3, 6])
def test_one_flipped_byte_in_one_chunk_is_detected(packed, victim):
    data, blob, chunks = packed
    damaged = dict(enumerate(chunks))
    piece = bytearray(damaged[victim])
    piece[len(piece) // 2] ^= 0x01
    damaged[victim] = bytes(piece)
    with pytest.raises(ChunkProblem, match="SHA-256 of the reassembled chunks"):
        unpack(blob, damaged)


def test_missing_truncated_and_swapped_chunks_are_detected(packed):
    data, blob, chunks = packed
    with pytest.raises(ChunkProblem, match=r"chunk\(s\) 2, 5 of 7 are missing"):
        unpack(blob, {i: c for i, c in enumerate(chunks) if i not in (2, 5)})
    with pytest.raises(ChunkProblem, match="hold"):
        unpack(blob, {**dict(enumerate(chunks)), 6: chunks[6][:-1]})
    swapped = dict(enumerate(chunks))
    swapped[1], swapped[2] = chunks[2], chunks[1]
    with pytest.raises(ChunkProblem, match="SHA-256"):
        unpack(blob, swapped)


def test_bytes_that_hash_right_but_do_not_decompress_as_recorded_are_refused():
    garbage = _incompressible(3000, seed=3)
    blob = Blob(1, 1, hashlib.sha256(garbage).hexdigest(), "zlib", len(garbage), 10_000)
    with pytest.raises(ChunkProblem, match="zlib decompression failed"):
        unpack(blob, {0: garbage})
    data = b"abc" * 10_000
    stored = zlib.compress(data)
    short = Blob(1, 1, hashlib.sha256(stored).hexdigest(), "zlib", len(stored), len(data) - 1)
    with pytest.raises(ChunkProblem, match="does not decompress to the recorded"):
        unpack(short, {0: stored})  # inflating stops at the recorded size: no unbounded output
    long = Blob(1, 1, short.sha256, "zlib", len(stored), len(data) + 1)
    with pytest.raises(ChunkProblem, match="does not decompress to the recorded"):
        unpack(long, {0: stored})


# ------------------------------------------------------------------ keys
@pytest.mark.parametrize("stream_id", UNUSUAL_IDS)
def test_keys_of_unusual_stream_ids_round_trip(stream_id):
    pointer = encode_pointer_key(stream_id)
    chunk = encode_chunk_key(stream_id, 42, 7)
    assert pointer.isascii() and chunk.isascii()
    assert pointer.count(b"|") == 0 and chunk.count(b"|") == 2
    assert parse_key(pointer) == ParsedKey(stream_id)
    assert parse_key(chunk) == ParsedKey(stream_id, 42, 7)
    assert chunk == pointer + b"|000000000042|000007"


def test_keys_are_distinct_for_distinct_ids():
    keys = {encode_pointer_key(s) for s in UNUSUAL_IDS} | {encode_chunk_key(s, 1, 0) for s in UNUSUAL_IDS}
    assert len(keys) == 2 * len(UNUSUAL_IDS)


@settings(derandomize=True, database=None, max_examples=300, deadline=None)
@given(st.text(min_size=1, max_size=40), st.integers(0, 10**12 - 1), st.integers(0, 999_999))
def test_any_stream_id_round_trips_through_its_keys(stream_id, step, chunk):
    assert parse_key(encode_pointer_key(stream_id)) == ParsedKey(stream_id)
    assert parse_key(encode_chunk_key(stream_id, step, chunk)) == ParsedKey(stream_id, step, chunk)


@pytest.mark.parametrize(
    "key",
    [None, b"", b"\xff\xfe", b"Ward", b"ward|1|0", b"ward|000000000001", b"ward|00000000000x|000000", b"ward|000000000001|000000|x", b"%zz"],
)
def test_foreign_keys_are_not_taken_for_ours(key):
    assert parse_key(key) is None


def test_every_record_of_a_stream_goes_to_one_stable_partition():
    assert [partition_for(s, 1) for s in UNUSUAL_IDS] == [0] * len(UNUSUAL_IDS)
    spread = {partition_for(f"ward-{i}", 4) for i in range(100)}
    assert spread == {0, 1, 2, 3}
    # the documented rule: the first 8 bytes of SHA-256(UTF-8 id), big-endian, modulo the partition count
    assert partition_for("a|b", 7) == int.from_bytes(hashlib.sha256("a|b".encode()).digest()[:8], "big") % 7


# ------------------------------------------------------- headers, pointer
def test_chunk_headers_describe_the_whole_checkpoint():
    blob, chunks = pack(5, b"x" * 5000, chunk_bytes=1024)
    for i in range(blob.chunks):
        key = parse_key(encode_chunk_key("a|b", 5, i))
        assert blob_from_headers(chunk_headers("a|b", blob, i), key) == blob
    headers = chunk_headers("a|b", blob, 0)
    assert blob_from_headers(headers, ParsedKey("a|b", 6, 0)) is None  # step of the key differs
    assert blob_from_headers(headers, ParsedKey("a|c", 5, 0)) is None  # stream differs
    assert blob_from_headers(headers, ParsedKey("a|b", 5, 1)) is None  # chunk index differs
    assert blob_from_headers([h for h in headers if h[0] != "casecloud-sha256"], ParsedKey("a|b", 5, 0)) is None
    assert blob_from_headers(None, ParsedKey("a|b", 5, 0)) is None


def test_pointer_round_trip_and_refusals():
    blobs = [pack(s, bytes([s]) * 100)[0] for s in (9, 8, 4)]
    data = encode_pointer("a|b", blobs)
    assert decode_pointer(data, "a|b") == blobs
    with pytest.raises(ValueError, match="key is for"):
        decode_pointer(data, "a|c")
    with pytest.raises(ValueError, match="not JSON"):
        decode_pointer(b"{", "a|b")
    with pytest.raises(ValueError, match="not strictly decreasing"):
        decode_pointer(encode_pointer("a|b", blobs[::-1]), "a|b")
    with pytest.raises(ValueError, match="format"):
        decode_pointer(data.replace(b'"format":1', b'"format":2'), "a|b")
    with pytest.raises(ValueError, match="sha256"):
        decode_pointer(data.replace(blobs[0].sha256.encode(), b"00"), "a|b")


# ------------------------------------------------------------- the index
def _engine() -> _Engine:
    return _Engine(KafkaSettings(), "t", chunk_bytes=1024, partitions=1, replication_factor=1, topic_config={})


class _Log:
    """Records fed to an engine's index as a consumer would deliver them."""

    def __init__(self) -> None:
        self.engine = _engine()
        self.offset = 0

    def put(self, key: bytes, value: bytes | None, headers=None) -> None:
        self.engine._apply(0, self.offset, key, value, headers)
        self.offset += 1

    def checkpoint(self, stream: str, blob: Blob, chunks: list[bytes], pointer: list[Blob] | None) -> None:
        for i, c in enumerate(chunks):
            self.put(encode_chunk_key(stream, blob.step, i), c, chunk_headers(stream, blob, i))
        if pointer is not None:
            self.put(encode_pointer_key(stream), encode_pointer(stream, pointer))

    def candidates(self, stream: str):
        return self.engine._candidates(stream, lambda s, n: Path(f"{s}/{n}"))


def test_index_ignores_chunks_that_no_pointer_names_and_forgets_tombstoned_ones():
    log = _Log()
    b1, c1 = pack(1, b"one" * 2000, chunk_bytes=1024)
    b2, c2 = pack(2, b"two" * 2000, chunk_bytes=1024)
    log.checkpoint("s", b1, c1, None)  # a first write killed before its pointer
    assert log.candidates("s") == ([], []) and log.engine.retained("s") == []
    log.checkpoint("s", b1, c1, [b1])
    log.checkpoint("s", b2, c2[:1], None)  # killed half way through the chunks of step 2
    assert log.candidates("s") == ([b1], [])
    assert log.engine._dead_keys("s") == [encode_chunk_key("s", 2, 0)]  # the orphan is pruned by the next write
    log.checkpoint("s", b2, c2, [b2, b1])
    assert log.candidates("s") == ([b2, b1], []) and log.engine._dead_keys("s") == []
    log.put(encode_pointer_key("s"), encode_pointer("s", [b2]))  # keep = 1 now
    assert log.engine._dead_keys("s") == [encode_chunk_key("s", 1, i) for i in range(b1.chunks)]
    for key in log.engine._dead_keys("s"):
        log.put(key, None)
    assert sorted(log.engine.index["s"].chunks) == [2] and log.engine._dead_keys("s") == []
    log.put(encode_pointer_key("s"), None)  # forgetting the stream entirely
    for i in range(b2.chunks):
        log.put(encode_chunk_key("s", 2, i), None)
    assert "s" not in log.engine.index


def test_rewriting_a_step_with_fewer_chunks_leaves_the_surplus_for_pruning():
    log = _Log()
    big, big_chunks = pack(4, _incompressible(5000, seed=4), chunk_bytes=1024)
    small, small_chunks = pack(4, b"z" * 5000, chunk_bytes=1024)
    log.checkpoint("s", big, big_chunks, [big])
    log.checkpoint("s", small, small_chunks, [small])
    assert small.chunks == 1 < big.chunks
    assert log.candidates("s") == ([small], [])
    assert log.engine._dead_keys("s") == [encode_chunk_key("s", 4, i) for i in range(1, big.chunks)]


def test_an_unreadable_pointer_falls_back_to_complete_chunk_sets_and_says_so():
    log = _Log()
    b1, c1 = pack(1, b"one" * 100)
    b2, c2 = pack(2, b"two" * 100)
    log.checkpoint("s", b1, c1, [b1])
    log.checkpoint("s", b2, c2, None)
    log.put(encode_pointer_key("s"), b"not json")
    blobs, problems = log.candidates("s")
    assert blobs == [b2, b1]
    assert len(problems) == 1 and "pointer record (partition 0, offset" in problems[0][1] and "not JSON" in problems[0][1]


def test_records_of_other_formats_in_the_topic_are_ignored():
    log = _Log()
    log.put(b"Other Key", b"value")  # not an encoded stream id (upper case, space)
    log.put(encode_chunk_key("s", 1, 0), b"chunk without headers")
    assert log.engine.index == {}


# ------------------------------------------------------- store and wiring
def test_store_arguments_are_checked_and_nothing_connects_before_use():
    settings = KafkaSettings(bootstrap_servers="127.0.0.1:1")
    for kwargs, message in [
        ({"keep": 0}, "keep"),
        ({"chunk_bytes": 100}, "chunk_bytes"),
        ({"codec": "gzip"}, "codec"),
        ({"level": 10}, "level"),
        ({"partitions": 0}, "partitions"),
    ]:
        with pytest.raises(ValueError, match=message):
            KafkaCheckpointStore(settings, "t", **kwargs)
    store = KafkaCheckpointStore(settings, "t")  # no broker listens there: construction must not care
    store.close()
    assert store.path_for("a|b", 42) == Path("kafka:t/a%7Cb/000000000042")


def test_mismatch_advice_names_the_topic_not_a_directory():
    error = KafkaCheckpointMismatch("s", Path("kafka:t/s/000000000001"), "want", "had", "t")
    assert isinstance(error, CheckpointMismatch) and error.expected == "want" and error.found == "had"
    assert "Kafka topic 't'" in str(error) and "forget('s')" in str(error) and "directory" not in str(error)


def test_config_selects_the_store(tmp_path):
    base = {"streams": [{"id": "s", "model": "sir", "start": "2026-01-01"}]}
    local = DeploymentConfig.model_validate({**base, "service": {"checkpoint_dir": str(tmp_path), "keep_checkpoints": 4}})
    store = build_checkpoint_store(local)
    assert isinstance(store, LocalCheckpointStore) and store.root == tmp_path and store.keep == 4
    remote = DeploymentConfig.model_validate(
        {
            **base,
            "service": {"checkpoint_store": "kafka", "checkpoint_topic": "ckpt.x", "keep_checkpoints": 5},
            "kafka": {"bootstrap_servers": "127.0.0.1:1"},
        }
    )
    store = build_checkpoint_store(remote)
    try:
        assert isinstance(store, KafkaCheckpointStore)
        assert (store.topic, store.keep, store.settings.bootstrap_servers) == ("ckpt.x", 5, "127.0.0.1:1")
    finally:
        store.close()
