"""Log-space weight arithmetic."""

from __future__ import annotations

import numpy as np

__all__ = ["log_sum_exp", "normalised_weights", "effective_sample_size"]


def log_sum_exp(log_w: np.ndarray) -> float:
    """log(sum(exp(log_w))), stable; -inf when every entry is -inf."""
    m = np.max(log_w)
    if not np.isfinite(m):
        return float(m) if m > 0 else float("-inf")
    with np.errstate(over="ignore"):  # a spread beyond the float range gives -inf, i.e. weight 0
        return float(m + np.log(np.sum(np.exp(log_w - m))))


def normalised_weights(log_w: np.ndarray) -> np.ndarray:
    """Weights summing to one. Raises if no particle has positive weight."""
    total = log_sum_exp(log_w)
    if not np.isfinite(total):
        raise ValueError(f"cannot normalise weights: log-sum-exp is {total}")
    with np.errstate(over="ignore"):  # as in log_sum_exp
        w = np.exp(log_w - total)
    return w / w.sum()


def effective_sample_size(weights: np.ndarray) -> float:
    """Kish's effective sample size 1 / sum(w^2) of normalised weights."""
    return float(1.0 / np.dot(weights, weights))
