"""Generators seeded per stream, and their state as JSON-safe data."""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np

__all__ = ["stream_generator", "generator_state", "restore_generator"]


def stream_generator(seed: int, stream_id: str) -> np.random.Generator:
    """A PCG64 Generator seeded from (deployment seed, stream id)."""
    digest = hashlib.sha256(stream_id.encode("utf-8")).digest()
    words = [int.from_bytes(digest[i : i + 4], "little") for i in range(0, 16, 4)]
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence([int(seed), *words])))


def _to_json(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _to_json(v) for k, v in value.items()}
    if isinstance(value, bool):
        return value
    if isinstance(value, (int, np.integer)):
        # 128-bit PCG64 words do not fit JSON numbers; keep them as hex text.
        return {"int": hex(int(value))}
    if isinstance(value, np.ndarray):
        return {"uint": [int(v) for v in value.ravel()], "dtype": str(value.dtype), "shape": list(value.shape)}
    return value


def _from_json(value: Any) -> Any:
    if isinstance(value, dict):
        if set(value) == {"int"}:
            return int(value["int"], 16)
        if set(value) == {"uint", "dtype", "shape"}:
            return np.array(value["uint"], dtype=value["dtype"]).reshape(value["shape"])
        return {k: _from_json(v) for k, v in value.items()}
    return value


def generator_state(rng: np.random.Generator) -> dict[str, Any]:
    """The bit generator's full state as plain JSON-able data."""
    return _to_json(rng.bit_generator.state)


def restore_generator(state: dict[str, Any]) -> np.random.Generator:
    """A Generator positioned exactly where ``generator_state`` captured it."""
    plain = _from_json(state)
    name = plain.get("bit_generator")
    try:
        bit_generator = getattr(np.random, name)()
    except (TypeError, AttributeError):
        raise ValueError(f"unknown bit generator {name!r} in saved state") from None
    bit_generator.state = plain
    return np.random.Generator(bit_generator)
