"""The fast paths of the weighted summaries return exactly what the plain algorithm does.

Summaries are published and checkpointed, so a faster way to compute them must
give the same bits, not just close values. Two references:

* the plain algorithm, written out here: numpy's stable argsort
  (``np.argsort(..., kind="stable")``), the one-by-one running sum of the weights
  in that order (``np.cumsum``), divided by its last entry, and a left binary
  search for p - 1e-12 (the definition ``filters._summary`` documents);
* for long columns with integer weights, numpy's ``quantile(...,
  method="inverted_cdf")`` of the values repeated by their weights (Hyndman &
  Fan 1996, "Sample quantiles in statistical packages", definition 1), away from
  the ECDF's jumps, as tests/filters/test_properties.py does for short columns.
"""

from __future__ import annotations

import numpy as np
import pytest

from filters import summarise, weighted_quantiles
from filters._summary import (
    _BLOCK,
    _certified_crossings,
    _column_quantiles,
    _float_order,
    _stable_order,
    _stable_orders,
)

PROBS = np.array([0.01, 0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975, 0.99])


def plain_quantiles(column: np.ndarray, weights: np.ndarray, probs: np.ndarray) -> np.ndarray:
    order = np.argsort(np.asarray(column, dtype=float), kind="stable")
    cw = np.cumsum(weights[order])
    cw /= cw[-1]
    idx = np.minimum(np.searchsorted(cw, probs - 1e-12, side="left"), column.size - 1)
    return np.asarray(column, dtype=float)[order[idx]]


def columns_of_every_kind(rng: np.random.Generator, n: int) -> dict[str, np.ndarray]:
    return {
        "narrow counts": rng.integers(1000, 3000, n),
        # Narrow but far from zero: v << bits wraps around 2**31 inside the range unless
        # the minimum is taken off first (bits: the index bits packed beside the value).
        "narrow counts far from zero": rng.integers(-100, 100, n) + 2**30 + 2 ** (31 - max(int(n - 1).bit_length(), 1)),
        "wide counts": rng.integers(0, 2**40, n),
        "negative counts": rng.integers(-50, 50, n),
        "uint32": rng.integers(0, 70_000, n).astype(np.uint32),
        "few huge ints": rng.choice(rng.integers(0, 2**62, 5), n),
        "positive floats": rng.lognormal(-1.3, 0.3, n),
        "signed floats": rng.normal(size=n),
        "tiny and huge": rng.normal(size=n) * rng.choice([1e-300, 1.0, 1e300], n),
        "signed zeros": rng.choice([-0.0, 0.0, 1.0, -1.0, 2.5], n),
        "signed zeros, narrow": rng.choice([-0.0, 0.0, 5e-324, -5e-324], n),  # keys close enough not to be truncated
        "resampled floats": rng.choice(rng.gamma(8.0, 2.5, 40), n),  # many ties, as after resampling
        "whole floats": np.round(rng.normal(size=n) * 10),
        "float32": (rng.random(n) * 1e-3 + 0.5).astype(np.float32),
        "strided view": np.column_stack([rng.poisson(300.0, (n, 3))])[:, 1],
        "one bit apart": 0.3 + np.array([0.0, 5.551115123125783e-17])[rng.integers(0, 2, n)],
    }


@pytest.mark.parametrize("n", [2, 17, 300, 5000])
def test_stable_order_is_numpys_stable_argsort(n):
    rng = np.random.default_rng(n)
    for name, column in columns_of_every_kind(rng, n).items():
        got = _stable_order(column)
        want = np.argsort(np.asarray(column, dtype=float), kind="stable")
        assert np.array_equal(got, want), name


@pytest.mark.parametrize("n", [300, 5000])
def test_stable_orders_of_many_columns_at_once_are_numpys(n):
    rng = np.random.default_rng(n + 7)
    columns = columns_of_every_kind(rng, n)
    got = np.empty((len(columns), n), dtype=np.intp)
    _stable_orders(list(columns.values()), got)
    for j, (name, column) in enumerate(columns.items()):
        assert np.array_equal(got[j], np.argsort(np.asarray(column, dtype=float), kind="stable")), name


def test_float_columns_take_the_packed_key_path():
    # Bug caught: a key that does not preserve the order of negative floats (or of
    # -0.0 and 0.0) would send every signed column to the slow fallback unnoticed.
    rng = np.random.default_rng(3)
    for column in (rng.normal(size=4000), rng.choice([-0.0, 0.0, -5e-324, 1e-323], 4000), rng.lognormal(size=4000)):
        order = _float_order(column, bits=12)
        assert order is not None
        assert np.array_equal(order, np.argsort(column, kind="stable"))
    assert _float_order(np.array([1.0, np.nan, 0.0]), bits=2) is None


def weight_cases(rng: np.random.Generator, n: int) -> dict[str, np.ndarray]:
    skewed = rng.random(n) ** 6
    sparse = np.where(rng.random(n) < 0.3, rng.random(n), 0.0)
    tiny = np.exp(-rng.random(n) * 700)  # spans 300 orders of magnitude
    posterior = np.exp(rng.normal(0.0, 3.0, n))
    return {
        "equal": np.full(n, 1.0 / n),  # running sums meet p exactly: the exact path
        "equal, unnormalised": np.ones(n),
        "skewed": skewed / skewed.sum(),
        "sparse": sparse / sparse.sum(),
        "tiny": tiny / tiny.sum(),
        "posterior": posterior / posterior.sum(),
        "dyadic": rng.integers(0, 8, n) / 1024.0,  # sums exact in binary: crossings on the targets
    }


@pytest.mark.parametrize("n", [4 * _BLOCK - 1, 4 * _BLOCK, 1000, 10_000])
def test_quantiles_equal_the_plain_algorithm(n):
    rng = np.random.default_rng(n + 1)
    columns = columns_of_every_kind(rng, n)
    names = list(columns)
    for wname, weights in weight_cases(rng, n).items():
        got = _column_quantiles([columns[c] for c in names], weights, PROBS)
        for j, name in enumerate(names):
            want = plain_quantiles(columns[name], weights, PROBS)
            assert np.array_equal(got[:, j], want), (wname, name)


def test_quantiles_on_the_edge_of_the_margin_equal_the_plain_algorithm():
    # Targets placed right at a running sum (within a few ulps either way), where
    # only the exact running sum can decide: the fast path must hand those over.
    rng = np.random.default_rng(11)
    n = 2000
    values = rng.normal(size=n)
    weights = rng.random(n)
    order = np.argsort(values, kind="stable")
    cw = np.cumsum(weights[order])
    cw /= cw[-1]
    picks = cw[rng.integers(0, n - 1, 100)]
    near = [picks]
    for direction in (0.0, 1.0):
        stepped = picks
        for _ in range(6):
            stepped = np.nextafter(stepped, direction)
            near.append(stepped)
    probs = np.sort(np.concatenate(near) + 1e-12)
    got = weighted_quantiles(values, weights, probs)
    assert np.array_equal(got, plain_quantiles(values, weights, probs))
    # One target at a time too: a column is handed over whole when any of its targets
    # is undecided, so only single targets test each decision on its own.
    for p in probs:
        assert weighted_quantiles(values, weights, np.array([p]))[0] == plain_quantiles(values, weights, np.array([p]))[0]


def test_certified_crossings_decide_typical_rows_and_hand_over_ties():
    rng = np.random.default_rng(5)
    n = 3000
    blocks = -(-n // _BLOCK)
    padded = np.zeros((2, blocks * _BLOCK))
    posterior = np.exp(rng.normal(0.0, 2.0, n))
    padded[0, :n] = posterior / posterior.sum()
    padded[1, :n] = 1.0 / n
    targets = PROBS - 1e-12
    idx = _certified_crossings(padded.reshape(2, blocks, _BLOCK), n, targets)
    assert idx is not None
    # The typical row is decided without running sums, and decided right ...
    cw = np.cumsum(padded[0, :n])
    cw /= cw[-1]
    assert np.array_equal(idx[0], np.searchsorted(cw, targets, side="left"))
    # ... equal weights put p * n on a running sum: handed to the exact path.
    assert np.all(idx[1] == -1)
    # Negative or non-finite weights void the error bound: nothing is decided.
    padded[0, 7] = -1e-3
    assert _certified_crossings(padded.reshape(2, blocks, _BLOCK), n, targets) is None


@pytest.mark.parametrize("n", [1000, 6000])
def test_long_columns_match_numpy_inverted_cdf_of_the_expanded_sample(n):
    rng = np.random.default_rng(n)
    values = rng.normal(size=n)
    counts = rng.integers(0, 5, n)
    total = int(counts.sum())
    probs = np.array([0.0173, 0.25 + 0.3 / total, 0.5 + 0.4 / total, 0.9 + 0.2 / total, 0.9871])
    # Away from the ECDF's jumps (p * total not within 1e-9 of a whole number), as in test_properties.
    assert np.all(np.abs(probs * total - np.round(probs * total)) > 1e-9 * total)
    got = weighted_quantiles(values, counts / total, probs)
    want = np.quantile(np.repeat(values, counts), probs, method="inverted_cdf")
    assert np.array_equal(got, want)


def test_summary_of_a_cloud_equals_the_plain_algorithm():
    rng = np.random.default_rng(8)
    n = 10_000
    counts = rng.multinomial(250_000, [0.7, 0.1, 0.05, 0.15], size=n)
    quantities = {
        "S": counts[:, 0],
        "I": counts[:, 2],
        "beta": rng.choice(rng.lognormal(-1.3, 0.25, 3000), n),
        "R_eff": rng.lognormal(0.3, 0.2, n),
    }
    weights = np.exp(rng.normal(0.0, 1.5, n))
    weights /= weights.sum()
    summary = summarise(quantities, weights)
    for j, (name, values) in enumerate(quantities.items()):
        assert np.array_equal(summary.quantiles[:, j], plain_quantiles(values, weights, np.array(summary.probs))), name
