"""Weighted summaries of the cloud, computed without resampling."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Summary", "weighted_quantiles", "summarise", "DEFAULT_PROBS"]

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

    Per column: a stable sort order, cumulative weights along it, and a binary
    search for the first cumulative weight >= p - 1e-12. The same result as
    comparing every cumulative weight with every probability, in O(n log n)
    time and O(n) memory per column.
    """
    targets = probs - 1e-12  # tolerate round-off in the cumulative weights
    out = np.empty((probs.size, len(columns)))
    for j, column in enumerate(columns):
        order = _stable_order(column)
        cw = np.cumsum(weights[order])
        cw /= cw[-1]
        idx = np.searchsorted(cw, targets, side="left")
        np.minimum(idx, column.size - 1, out=idx)
        out[:, j] = column[order[idx]]
    return out


_EXACT_INT = 2**53  # integers below this convert to float64 exactly


def _stable_order(column: np.ndarray) -> np.ndarray:
    """``np.argsort(np.asarray(column, float), kind="stable")``, faster.

    Whole-number columns (counts) are sorted as packed int64 keys
    (value - min, index), a stable argsort by construction; other columns get
    numpy's default sort, with tied values then put back in index order.
    """
    n = column.size
    if n < 2:
        return np.zeros(n, dtype=np.intp)
    bits = max(int(n - 1).bit_length(), 1)
    span = 2 ** (62 - bits)
    if column.dtype.kind in "iu":
        lo, hi = int(column.min()), int(column.max())
        if -_EXACT_INT < lo and hi < _EXACT_INT and hi - lo < span:
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
