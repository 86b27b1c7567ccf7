"""Proper scores for probabilistic forecasts of counts, and ROC/AUC for alerts.

Everything is vectorised numpy. Conventions:

- ``draws`` hold Monte Carlo samples from a predictive distribution along
  **axis 0** (shape ``(M,)`` or ``(M, ...)``, as ``Forecast.reported[series]``
  is ``(M, H)``); ``y`` broadcasts against ``draws.shape[1:]``.
- Every score is **negatively oriented**: lower is better (CRPS, interval
  score, WIS, and the log score reported as ``-log p(y)``).

Sources (scoring rules by their published names):

- CRPS, energy form ``E|X - y| - 1/2 E|X - X'|``, and the interval score:
  Gneiting & Raftery (2007), "Strictly proper scoring rules, prediction, and
  estimation", JASA 102:359-378. The closed form for a normal predictive:
  Gneiting, Raftery, Westveld & Goldman (2005), Monthly Weather Review 133.
- Weighted interval score: Bracher, Ray, Gneiting & Reich (2021), "Evaluating
  epidemic forecasts in an interval format", PLoS Comput Biol 17:e1008618.
- Bias for integer-valued forecasts: Funk et al. (2019), "Assessing the
  performance of real-time epidemic forecasts", PLoS Comput Biol 15:e1006785.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import special

__all__ = [
    "auc",
    "bias",
    "coverage",
    "crps_from_samples",
    "crps_normal",
    "interval_score",
    "log_score_from_samples",
    "roc_curve",
    "weighted_interval_score",
]


def _draws(draws: Any) -> np.ndarray:
    x = np.asarray(draws, dtype=float)
    if x.ndim == 0 or x.shape[0] == 0:
        raise ValueError(f"draws must have at least one sample along axis 0, got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError("draws must be finite")
    return x


def crps_from_samples(draws: Any, y: Any) -> np.ndarray:
    """CRPS of the empirical distribution of ``draws`` at ``y``.

    ``CRPS = E|X - y| - 1/2 E|X - X'|`` (Gneiting & Raftery 2007, eq. 21),
    with both expectations under the empirical distribution (every pair
    (i, j) including i = j). The second term is computed in O(M log M) from
    the sorted sample: ``sum_ij |x_i - x_j| = 2 sum_i (2i - M - 1) x_(i)``
    (i = 1..M), so ``1/2 E|X - X'| = sum_i (2i - M - 1) x_(i) / M^2``.
    """
    x = _draws(draws)
    y = np.asarray(y, dtype=float)
    m = x.shape[0]
    first = np.mean(np.abs(x - y), axis=0)
    xs = np.sort(x, axis=0)
    coef = (2.0 * np.arange(1, m + 1) - m - 1).reshape((m,) + (1,) * (x.ndim - 1))
    second = np.sum(coef * xs, axis=0) / (m * m)
    return first - second


def crps_normal(mu: Any, sigma: Any, y: Any) -> np.ndarray:
    """Closed-form CRPS of N(mu, sigma^2) at y (Gneiting et al. 2005; Gneiting & Raftery 2007):
    ``sigma * (z (2 Phi(z) - 1) + 2 phi(z) - 1/sqrt(pi))`` with ``z = (y - mu) / sigma``."""
    mu, sigma, y = (np.asarray(v, dtype=float) for v in (mu, sigma, y))
    if np.any(sigma <= 0):
        raise ValueError("sigma must be positive")
    z = (y - mu) / sigma
    pdf = np.exp(-0.5 * z * z) / math.sqrt(2 * math.pi)
    cdf = 0.5 * special.erfc(-z / math.sqrt(2))
    return sigma * (z * (2 * cdf - 1) + 2 * pdf - 1 / math.sqrt(math.pi))


def interval_score(lower: Any, upper: Any, y: Any, alpha: Any) -> np.ndarray:
    """Interval score of the central (1 - alpha) interval [lower, upper] (Gneiting & Raftery 2007, eq. 43):
    ``(u - l) + 2/alpha (l - y) 1{y < l} + 2/alpha (y - u) 1{y > u}``."""
    lo, up, y, a = (np.asarray(v, dtype=float) for v in (lower, upper, y, alpha))
    if np.any((a <= 0) | (a >= 1)):
        raise ValueError(f"alpha must be in (0, 1), got {alpha!r}")
    if np.any(lo > up):
        raise ValueError("lower must not exceed upper")
    return (up - lo) + (2 / a) * np.maximum(lo - y, 0) + (2 / a) * np.maximum(y - up, 0)


def weighted_interval_score(levels: Any, quantiles: Any, y: Any) -> np.ndarray:
    """Weighted interval score (Bracher et al. 2021, eq. 3).

    ``levels``: quantile levels (L,), containing 0.5 and symmetric pairs
    (tau, 1 - tau); ``quantiles``: predictive quantiles at those levels, shape
    (L, ...); ``y`` broadcasts against ``quantiles.shape[1:]``. With K central
    intervals (alpha_k = 2 tau_k for each pair tau_k < 0.5), weights
    w_0 = 1/2 for the median and w_k = alpha_k / 2:

        WIS = 1 / (K + 1/2) * (w_0 |y - m| + sum_k w_k IS_{alpha_k}(l_k, u_k; y)).
    """
    lv = np.asarray(levels, dtype=float)
    q = np.asarray(quantiles, dtype=float)
    if lv.ndim != 1 or q.shape[:1] != lv.shape:
        raise ValueError(f"quantiles must have shape (len(levels), ...), got {q.shape} for {lv.size} levels")
    order = np.argsort(lv)
    lv, q = lv[order], q[order]
    mid = np.flatnonzero(np.isclose(lv, 0.5))
    if mid.size != 1:
        raise ValueError("levels must contain the median 0.5 exactly once")
    low = np.flatnonzero(lv < 0.5 - 1e-12)
    high = np.flatnonzero(lv > 0.5 + 1e-12)[::-1]  # paired with low in order: (tau, 1 - tau)
    if low.size != high.size or not np.allclose(lv[low], 1 - lv[high]):
        raise ValueError(f"levels must come in symmetric pairs (tau, 1 - tau) around 0.5, got {levels!r}")
    y = np.asarray(y, dtype=float)
    k = low.size
    total = 0.5 * np.abs(y - q[mid[0]])
    for i, j in zip(low, high):
        alpha = 2 * lv[i]
        total = total + (alpha / 2) * interval_score(q[i], q[j], y, alpha)
    return total / (k + 0.5)


def coverage(lower: Any, upper: Any, y: Any) -> np.ndarray:
    """1.0 where ``lower <= y <= upper`` (closed interval), else 0.0."""
    lo, up, y = (np.asarray(v, dtype=float) for v in (lower, upper, y))
    return ((lo <= y) & (y <= up)).astype(float)


def log_score_from_samples(draws: Any, y: Any) -> np.ndarray:
    """Negative log predictive probability ``-log p(y)`` of a count (lower is better).

    Smoothing (always finite): the M integer draws get one extra pseudo-draw
    whose mass is spread over a geometric pmf g on {0, 1, 2, ...} with mean
    ``mean(draws) + 1``, so

        p(y) = (#{i: x_i = y} + g(y)) / (M + 1),

    a proper pmf that equals the empirical one up to O(1/M) where the draws
    are dense (g has mean ``mean(draws) + 1``) and stays positive (and is evaluated in log space, so never
    underflows) at counts no draw reached. Draws are rounded to integers.
    """
    x = np.rint(_draws(draws))
    y = np.asarray(y, dtype=float)
    if np.any(y < 0) or np.any(y != np.rint(y)):
        raise ValueError("y must be non-negative whole numbers")
    m = x.shape[0]
    hits = np.sum(x == y, axis=0).astype(float)
    # Geometric on {0, 1, ...}: g(k) = p (1 - p)^k has mean (1 - p) / p; p = 1 / (mu + 1) gives mean mu.
    mu = np.maximum(np.mean(x, axis=0), 0.0) + 1.0  # the +1 keeps g off a point mass when every draw is 0
    p = 1.0 / (mu + 1.0)
    log_g = np.log(p) + y * np.log1p(-p)
    log_hits = np.full(hits.shape, -np.inf)
    np.log(hits, out=log_hits, where=hits > 0)
    return -(np.logaddexp(log_hits, log_g) - math.log(m + 1))


def bias(draws: Any, y: Any) -> np.ndarray:
    """Bias of a count forecast (Funk et al. 2019): ``1 - (P(X <= y) + P(X <= y - 1))``.

    In [-1, 1]: +1 when every draw is above the observation (over-prediction),
    -1 when every draw is below (under-prediction), 0 for a well-centred
    forecast (for integer counts the mid-point of the two cdf values takes the
    place of ``P(X <= y)`` of the continuous definition ``1 - 2 P(X <= y)``).
    """
    x = _draws(draws)
    y = np.asarray(y, dtype=float)
    return 1.0 - (np.mean(x <= y, axis=0) + np.mean(x <= y - 1, axis=0))


def _binary(probabilities: Any, outcomes: Any) -> tuple[np.ndarray, np.ndarray]:
    p = np.asarray(probabilities, dtype=float).ravel()
    o = np.asarray(outcomes).ravel()
    if p.shape != o.shape:
        raise ValueError(f"probabilities and outcomes must have the same length, got {p.size} and {o.size}")
    if not np.all(np.isfinite(p)):
        raise ValueError("probabilities must be finite")
    if not np.all(np.isin(o, (0, 1, True, False))):
        raise ValueError("outcomes must be 0/1 (or booleans)")
    o = o.astype(bool)
    if o.all() or not o.any():
        raise ValueError(
            f"ROC needs both outcomes: got {int(o.sum())} events and {int((~o).sum())} non-events"
        )
    return p, o


def roc_curve(probabilities: Any, outcomes: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """ROC curve of the rule "alert when the probability >= t".

    Returns ``(fpr, tpr, thresholds)``: ``thresholds`` are ``+inf`` (alert
    never: the point (0, 0)) followed by the distinct probabilities in
    decreasing order, the last being the smallest (alert always: (1, 1)).
    Tied probabilities move together, so a tie gives a diagonal segment.
    Both outcomes must occur (ValueError otherwise).
    """
    p, o = _binary(probabilities, outcomes)
    order = np.argsort(-p, kind="mergesort")
    ps, os_ = p[order], o[order]
    last = np.r_[np.flatnonzero(np.diff(ps) != 0), ps.size - 1]  # last index of each distinct value
    tp = np.cumsum(os_)[last]
    fp = np.cumsum(~os_)[last]
    n1, n0 = o.sum(), (~o).sum()
    tpr = np.r_[0.0, tp / n1]
    fpr = np.r_[0.0, fp / n0]
    thresholds = np.r_[np.inf, ps[last]]
    return fpr, tpr, thresholds


def auc(probabilities: Any, outcomes: Any) -> float:
    """Area under the ROC curve (trapezoidal rule over :func:`roc_curve`): the
    probability that an event got a higher probability than a non-event, ties
    counting one half. Both outcomes must occur (ValueError otherwise)."""
    fpr, tpr, _ = roc_curve(probabilities, outcomes)
    return float(np.sum(np.diff(fpr) * (tpr[1:] + tpr[:-1]) / 2))
