"""Weighted summaries of the cloud, computed without resampling."""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

__all__ = ["DEFAULT_PROBS", "Summary", "summarise", "weighted_quantiles"]

DEFAULT_PROBS = (0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975)


def weighted_quantiles(values: np.ndarray, weights: np.ndarray, probs: np.ndarray) -> np.ndarray:
    """Quantiles of the weighted empirical distribution, column by column.

    Returns the smallest value whose cumulative weight reaches each
    probability (the inverse of the weighted ECDF).

    Parameters
    ----------
    values : ndarray of shape (n,) or (n, q)
    weights : ndarray of shape (n,), non-negative, summing to one
    probs : ndarray of shape (k,)

    Returns
    -------
    ndarray of shape (k,) or (k, q)
    """
    values = np.asarray(values, dtype=float)
    weights = np.asarray(weights, dtype=float)
    flat = values.ndim == 1
    v = values[:, None] if flat else values
    out = _column_quantiles([v[:, j] for j in range(v.shape[1])], weights, np.asarray(probs, dtype=float))
    return out[:, 0] if flat else out


def _column_quantiles(columns: list[np.ndarray], weights: np.ndarray, probs: np.ndarray) -> np.ndarray:
    """(k, q) weighted quantiles of q columns of length n (integer or float).

    Per column: a stable sort order, cumulative weights along it (summed one by
    one, in that order), and a binary search for the first cumulative weight,
    divided by the total, that is >= p - 1e-12. The same result as comparing
    every cumulative weight with every probability, in O(n log n) time and O(n)
    memory per column. Long columns find the crossings from block sums instead
    (:func:`_certified_crossings`) wherever that provably picks the same index.
    """
    targets = probs - 1e-12  # tolerate round-off in the cumulative weights
    out = np.empty((probs.size, len(columns)))
    n = columns[0].size if columns else 0
    if n < 4 * _BLOCK or targets.ndim != 1 or targets.size == 0:
        for j, column in enumerate(columns):
            order = _stable_order(column)
            out[:, j] = column[order[_crossings(weights[order], targets)]]
        return out
    q = len(columns)
    blocks = -(-n // _BLOCK)
    orders = _workspace("orders", (q, blocks * _BLOCK), np.intp)
    orders[:, n:] = n  # the padding to whole blocks points at a zero weight
    _stable_orders(columns, orders)
    extended = np.zeros(n + 1)
    extended[:n] = weights
    sorted_w = _workspace("sorted_w", orders.shape, np.float64)
    np.take(extended, orders, out=sorted_w, mode="clip")  # (every index is in range: "clip" only skips a buffer)
    idx = _certified_crossings(sorted_w.reshape(q, blocks, _BLOCK), n, targets)
    for j, column in enumerate(columns):
        row = idx[j] if idx is not None and idx[j, 0] >= 0 else _crossings(sorted_w[j, :n], targets)
        out[:, j] = column[orders[j, row]]
    return out


_SCRATCH = threading.local()


def _workspace(name: str, shape: tuple[int, ...], dtype: type) -> np.ndarray:
    """A scratch array kept by this thread from one summary to the next.

    A summary of 10,000 particles needs a few MB of temporaries; allocated
    afresh each time they come from the OS and go back to it (numpy's large
    buffers are mmap'd by the C allocator), which cost hundreds of page faults
    per filter step, more than the sorting they serve.
    """
    arrays = getattr(_SCRATCH, "arrays", None)
    if arrays is None:
        arrays = _SCRATCH.arrays = {}
    found = arrays.get(name)
    if found is None or found.shape != shape or found.dtype != dtype:
        found = arrays[name] = np.empty(shape, dtype=dtype)
    return found


def _stable_orders(columns: list[np.ndarray], orders: np.ndarray) -> None:
    """:func:`_stable_order` of q columns of length n >= 2 into ``orders[:, :n]``.

    The common kinds are sorted together: narrow whole-number columns as int32
    keys and finite float64 columns as packed keys, each kind in one 2-D sort
    (one call for all its columns instead of one per column; the same keys, so
    the same orders). Scratch arrays are reused (:func:`_workspace`).
    """
    n = columns[0].size
    bits = max(int(n - 1).bit_length(), 1)
    ints, floats, rest = [], [], []
    for j, column in enumerate(columns):
        kind, size = column.dtype.kind, column.dtype.itemsize
        if kind == "i" or (kind == "u" and size < 8):
            ints.append(j)
        elif column.dtype == np.float64 and not np.array_equal(column[:16], np.floor(column[:16])):
            floats.append(j)  # (whole-number floats keep their own path)
        else:
            rest.append(j)
    if ints:
        keys = _workspace("int_keys", (len(ints), n), np.int64)
        for r, j in enumerate(ints):
            keys[r] = columns[j]
        lo, hi = keys.min(axis=1), keys.max(axis=1)
        fits = np.array([-_EXACT_INT < int(a) and int(b) < _EXACT_INT and int(b) - int(a) < 2 ** (31 - bits)
                         for a, b in zip(lo, hi)])
        rest += [j for j, ok in zip(ints, fits) if not ok]
        if fits.any():
            narrow = _workspace("int_narrow", keys.shape, np.int32)
            np.subtract(keys, lo[:, None], out=narrow, casting="unsafe")  # exact where it fits
            sortable = narrow if fits.all() else narrow[fits]
            sortable <<= bits
            sortable |= np.arange(n, dtype=np.int32)
            sortable.sort(axis=1)
            sortable &= (1 << bits) - 1
            for r, j in enumerate(j for j, ok in zip(ints, fits) if ok):
                orders[j, :n] = sortable[r]
    if floats:
        x = _workspace("float_values", (len(floats), n), np.float64)
        for r, j in enumerate(floats):
            x[r] = columns[j]
        x += 0.0  # -0.0 + 0.0 is +0.0: equal values get equal bit patterns
        lo, hi = x.min(axis=1), x.max(axis=1)
        finite = np.isfinite(lo) & np.isfinite(hi)
        rest += [j for j, ok in zip(floats, finite) if not ok]
        if finite.any():
            rows = [j for j, ok in zip(floats, finite) if ok]
            values = x if finite.all() else x[finite]
            packed = _workspace("float_keys", values.shape, np.uint64)
            np.copyto(packed, values.view(np.uint64))
            if lo[finite].min() < 0:
                signed = packed.view(np.int64)
                np.bitwise_xor(signed, _MAGNITUDE, out=signed, where=signed < 0)  # as _float_key
            ends = _float_key(np.stack([lo[finite] + 0.0, hi[finite] + 0.0], axis=1))
            klo = np.array([int(a) % 2**64 for a in ends[:, 0]], dtype=np.uint64)
            shift = np.array([max(0, (int(b) - int(a)).bit_length() - (63 - bits)) for a, b in ends], dtype=np.uint64)
            # key - klo lies in [0, khi - klo] < 2**64: exact in wrapping uint64 arithmetic.
            packed -= klo[:, None]
            packed >>= shift[:, None]
            packed <<= np.uint64(bits)
            packed |= np.arange(n, dtype=np.uint64)
            packed.sort(axis=1)
            packed &= np.uint64((1 << bits) - 1)
            order = packed.view(np.intp) if np.dtype(np.intp).itemsize == 8 else packed.astype(np.intp)
            for r, j in enumerate(rows):
                ranked = values[r][order[r]]
                if np.all(ranked[1:] >= ranked[:-1]):
                    orders[j, :n] = order[r]
                else:
                    rest.append(j)
    for j in rest:
        orders[j, :n] = _stable_order(columns[j])


def _crossings(sorted_w: np.ndarray, targets: np.ndarray) -> np.ndarray:
    """First index where the running sum of ``sorted_w`` over its total reaches each target."""
    cw = np.cumsum(sorted_w)
    cw /= cw[-1]
    idx = np.searchsorted(cw, targets, side="left")
    np.minimum(idx, sorted_w.size - 1, out=idx)
    return idx


_BLOCK = 64
_UNIT = 2.0**-53  # unit round-off of float64


def _certified_crossings(w: np.ndarray, n: int, targets: np.ndarray) -> np.ndarray | None:
    """:func:`_crossings` of every row of ``w`` (q, blocks, B) (weights >= 0 in sorted
    order, zero-padded after the first ``n``), found without the running sums.

    Why the same index: :func:`_crossings` compares fl(c_i / c_T) with t, where
    c_i is the one-by-one float sum of the first i + 1 weights; here a_i, the
    same prefix sum taken as block sums plus a running sum inside one block, is
    compared instead. For non-negative terms any order of float summation of m
    terms is within a relative gamma_m = m u / (1 - m u) of the exact sum (u the
    unit round-off; Higham 2002, Accuracy and Stability of Numerical Algorithms,
    2nd ed., section 4.2), and each division adds u. So fl(c_i / c_T) lies within
    a relative E = 8 (n + B + 8) u of fl(a_i / a_T) (twice the first-order sum of
    those terms), and where a_j / a_T >= t (1 + E)-safely and a_(j-1) / a_T < t
    safely, the running sums (non-decreasing) cross t exactly at j. Rows where
    some target falls within that margin (e.g. equal weights, whose cumulative
    sums meet p exactly) are marked -1 for the exact running sum; None when the
    margin argument does not hold at all (negative, non-finite or tiny weights or
    targets, where underflow would void the relative bounds).
    """
    q, blocks, width = w.shape
    tiny = 1e-200
    if not np.all((targets <= 0) | (targets >= tiny)):
        return None
    # Block sums as a product with ones (BLAS: any order of summation will do here).
    block_sums = (w.reshape(q * blocks, width) @ np.ones(width)).reshape(q, blocks)
    if not block_sums.min() >= 0:
        return None
    ends = np.cumsum(block_sums, axis=1)
    total = ends[:, -1:]
    if not (np.all(np.isfinite(total)) and total.min() >= tiny and w.min() >= 0):
        return None
    margin = 8.0 * (n + width + 8) * _UNIT
    ratio = ends / total
    # The block holding each crossing: the number of block ends below the target
    # (ratio is non-decreasing along a row).
    block = np.stack([np.searchsorted(row, targets, side="left") for row in ratio])  # (q, k)
    np.minimum(block, blocks - 1, out=block)
    rows = np.arange(q)[:, None]
    before = np.where(block > 0, ends[rows, np.maximum(block - 1, 0)], 0.0)  # (q, k)
    inside = np.cumsum(w[rows, block], axis=2)  # (q, k, B)
    inside += before[:, :, None]
    inside /= total[:, :, None]
    pos = np.count_nonzero(inside < targets[None, :, None], axis=2)  # (q, k)
    idx = block * width + pos
    ok = (pos < width) & (idx < n)
    pos_c = np.minimum(pos, width - 1)
    cols = np.arange(targets.size)[None, :]
    at = inside[rows, cols, pos_c]
    below = np.where(pos_c > 0, inside[rows, cols, np.maximum(pos_c - 1, 0)], before / total)
    ok &= at * (1.0 - margin) >= targets[None, :]
    ok &= (idx == 0) | (below * (1.0 + margin) < targets[None, :])
    idx[~ok.all(axis=1)] = -1
    return idx


_EXACT_INT = 2**53  # integers below this convert to float64 exactly


def _stable_order(column: np.ndarray) -> np.ndarray:
    """``np.argsort(np.asarray(column, float), kind="stable")``, faster.

    Whole-number columns (counts) with a span below 2**16 get numpy's stable
    (radix) sort of their offsets from the minimum; wider ones are sorted as
    packed int64 keys (value - min, index), a stable argsort by construction.
    Finite float columns are sorted as packed keys too (their order-preserving
    bit patterns, truncated to fit beside the index), and the order is kept
    only if the values come out non-decreasing along it (always so unless two
    different values share a truncated key). Anything else gets numpy's
    default sort, with tied values then put back in index order.
    """
    n = column.size
    if n < 2:
        return np.zeros(n, dtype=np.intp)
    bits = max(int(n - 1).bit_length(), 1)
    span = 2 ** (62 - bits)
    if column.dtype.kind in "iu":
        lo, hi = int(column.min()), int(column.max())
        if -_EXACT_INT < lo and hi < _EXACT_INT and hi - lo < span:
            if hi - lo < 2**16:
                return np.argsort((column - lo).astype(np.uint16), kind="stable")
            return _packed_order(column - lo, bits)
        column = column.astype(float)
    elif column.dtype != np.float64:
        column = column.astype(float)
    head = column[:16]
    if np.array_equal(head, np.floor(head)):  # cheap early exit for parameter-like columns
        lo, hi = column.min(), column.max()
        if np.isfinite(lo) and np.isfinite(hi) and hi - lo < span:
            shifted = column - lo
            if np.array_equal(shifted, np.floor(shifted)):
                return _packed_order(shifted.astype(np.int64), bits)
    order = _float_order(column, bits)
    if order is not None:
        return order
    order = np.argsort(column)
    ranked = column[order]
    tied = ranked[1:] == ranked[:-1]
    if tied.any():
        # Dense rank of each sorted value; sorting (rank, index) restores index order within ties.
        rank = np.empty(n, dtype=np.int64)
        rank[0] = 0
        np.cumsum(~tied, out=rank[1:])
        keys = np.empty(n, dtype=np.int64)
        keys[order] = rank
        order = _packed_order(keys, bits)
    return order


_MAGNITUDE = np.int64(0x7FFF_FFFF_FFFF_FFFF)


def _float_key(x: np.ndarray) -> np.ndarray:
    """int64 keys in the order of the (finite, zero-signless) float64 values ``x``:
    the bit pattern, with the magnitude bits of negative values flipped."""
    keys = x.view(np.int64)
    return np.where(keys < 0, keys ^ _MAGNITUDE, keys)


def _float_order(column: np.ndarray, bits: int) -> np.ndarray | None:
    """Stable argsort of a finite float64 column through packed integer keys
    (see :func:`_stable_order`); None when it does not apply (a non-finite value,
    or two different values that share a truncated key)."""
    lo, hi = column.min(), column.max()
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return None
    x = column + 0.0  # -0.0 + 0.0 is +0.0: equal values get equal bit patterns
    keys = _float_key(x) if lo < 0 else x.view(np.int64)
    klo, khi = (int(k) for k in _float_key(np.array([lo + 0.0, hi + 0.0])))
    shift = max(0, (khi - klo).bit_length() - (63 - bits))
    # key - klo lies in [0, khi - klo] < 2**64: exact in wrapping uint64 arithmetic.
    packed = keys.view(np.uint64) - np.uint64(klo % 2**64)
    packed >>= np.uint64(shift)
    packed <<= np.uint64(bits)
    packed |= np.arange(x.size, dtype=np.uint64)
    packed.sort()
    packed &= np.uint64((1 << bits) - 1)
    order = packed.view(np.intp) if np.dtype(np.intp).itemsize == 8 else packed.astype(np.intp)
    ranked = x[order]
    if not np.all(ranked[1:] >= ranked[:-1]):
        return None
    return order


def _packed_order(keys: np.ndarray, bits: int) -> np.ndarray:
    """Stable argsort of non-negative int64 keys below 2**(63 - bits)."""
    n = keys.size
    if int(keys.max()) < 2 ** (31 - bits):  # narrow keys sort faster as int32
        packed32 = keys.astype(np.int32) << bits
        packed32 |= np.arange(n, dtype=np.int32)
        packed32.sort()
        packed32 &= (1 << bits) - 1
        return packed32.astype(np.intp)
    packed = keys << bits
    packed |= np.arange(n, dtype=np.int64)
    packed.sort()
    packed &= (1 << bits) - 1
    return packed.view(np.intp) if np.dtype(np.intp) == np.dtype(np.int64) else packed.astype(np.intp)


@dataclass(frozen=True)
class Summary:
    """Weighted mean and quantiles of named quantities.

    ``mean`` has shape (q,), ``quantiles`` shape (k, q) for ``probs`` of shape (k,).
    """

    names: tuple[str, ...]
    mean: np.ndarray
    quantiles: np.ndarray
    probs: tuple[float, ...]

    def as_dict(self) -> dict[str, dict[str, float | dict[str, float]]]:
        out: dict = {}
        for j, name in enumerate(self.names):
            out[name] = {
                "mean": float(self.mean[j]),
                "quantiles": {f"{p:g}": float(self.quantiles[k, j]) for k, p in enumerate(self.probs)},
            }
        return out

    def get(self, name: str) -> tuple[float, dict[float, float]]:
        j = self.names.index(name)
        return float(self.mean[j]), {p: float(self.quantiles[k, j]) for k, p in enumerate(self.probs)}


def summarise(quantities: dict[str, np.ndarray], weights: np.ndarray, probs=DEFAULT_PROBS) -> Summary:
    """Weighted mean and quantiles.

    Non-finite values are dropped per quantity (their weight renormalised
    away); a quantity with no finite value at all is left out of the summary,
    so a summary never contains NaN or infinity.
    """
    probs_arr = np.asarray(probs, dtype=float)
    matrix = np.column_stack([np.asarray(v, dtype=float) for v in quantities.values()])
    finite = np.isfinite(matrix)
    if finite.all():
        names = tuple(quantities)
        mean = weights @ matrix
        # Quantiles from the quantities as given: integer counts sort as integers.
        columns = [np.asarray(v) for v in quantities.values()]
        columns = [c if c.dtype.kind in "iuf" and c.ndim == 1 else matrix[:, j] for j, c in enumerate(columns)]
        quant = _column_quantiles(columns, np.asarray(weights, dtype=float), probs_arr)
    else:
        kept, means, quants = [], [], []
        for j, name in enumerate(quantities):
            ok = finite[:, j]
            w = weights[ok]
            if not ok.any() or w.sum() <= 0:
                continue
            w = w / w.sum()
            kept.append(name)
            means.append(w @ matrix[ok, j])
            quants.append(weighted_quantiles(matrix[ok, j], w, probs_arr))
        names = tuple(kept)
        mean = np.array(means)
        quant = np.column_stack(quants) if quants else np.empty((probs_arr.size, 0))
    return Summary(names=names, mean=mean, quantiles=quant, probs=tuple(float(p) for p in probs))
