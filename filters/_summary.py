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
    flat = values.ndim == 1
    v = values[:, None] if flat else values
    order = np.argsort(v, axis=0, kind="stable")
    sorted_v = np.take_along_axis(v, order, axis=0)
    cw = np.cumsum(weights[order], axis=0)
    cw /= cw[-1]
    probs = np.asarray(probs, dtype=float)
    # Index of the first cumulative weight >= p, per column (tolerating round-off).
    idx = (cw[None, :, :] < probs[:, None, None] - 1e-12).sum(axis=1)
    idx = np.minimum(idx, v.shape[0] - 1)
    out = np.take_along_axis(sorted_v, idx, axis=0)
    return out[:, 0] if flat else out


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
        quant = weighted_quantiles(matrix, weights, probs_arr)
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
