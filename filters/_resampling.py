"""Resampling schemes: each maps normalised weights to ancestor indices.

All schemes are unbiased (the expected number of offspring of particle i is
n * w_i). Systematic and stratified use one uniform per stratum and have lower
variance than multinomial; residual keeps floor(n * w_i) copies
deterministically (Douc, Cappe & Moulines 2005).
"""

from __future__ import annotations

from typing import Callable, Literal

import numpy as np

__all__ = ["RESAMPLERS", "ResamplingScheme", "resample"]

ResamplingScheme = Literal["systematic", "stratified", "residual", "multinomial"]


def _from_points(weights: np.ndarray, points: np.ndarray) -> np.ndarray:
    cumulative = np.cumsum(weights)
    cumulative[-1] = 1.0  # guard against round-off leaving the last bin short
    return np.searchsorted(cumulative, points, side="right").astype(np.intp)


def systematic(weights: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    points = (rng.random() + np.arange(n)) / n
    return _from_points(weights, points)


def stratified(weights: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    points = (rng.random(n) + np.arange(n)) / n
    return _from_points(weights, points)


def multinomial(weights: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    points = np.sort(rng.random(n))
    return _from_points(weights, points)


def residual(weights: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    scaled = n * weights
    copies = np.floor(scaled).astype(np.intp)
    deterministic = np.repeat(np.arange(weights.size), copies)
    remaining = n - int(copies.sum())
    if remaining == 0:
        return deterministic
    rest = scaled - copies
    rest = rest / rest.sum()
    return np.concatenate([deterministic, multinomial(rest, remaining, rng)])


RESAMPLERS: dict[str, Callable[[np.ndarray, int, np.random.Generator], np.ndarray]] = {
    "systematic": systematic,
    "stratified": stratified,
    "residual": residual,
    "multinomial": multinomial,
}


def resample(
    weights: np.ndarray, rng: np.random.Generator, scheme: str = "systematic", n: int | None = None
) -> np.ndarray:
    """Ancestor indices of length ``n`` (default: as many as weights)."""
    try:
        fn = RESAMPLERS[scheme]
    except KeyError:
        raise ValueError(
            f"resampling scheme {scheme!r} is not known; allowed: {sorted(RESAMPLERS)}"
        ) from None
    return fn(weights, weights.size if n is None else n, rng)
