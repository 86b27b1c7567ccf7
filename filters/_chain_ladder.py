"""Reporting triangles from data vintages, and the chain-ladder nowcast with Mack's standard error.

This is the baseline that backtests set beside the cloud's nowcast: the
multiplicative reporting-triangle method of actuarial practice, estimated from
the counts known on one date only (no look-ahead). Pure numpy, no I/O.

The reporting triangle
----------------------
Each period ``i`` (a day, or a week ending on its Sunday) ends on day
``e_i``. Its count is known in *vintages*: a total ``v`` known as of day ``a``.
The cumulative count at development lag ``d`` (days after the period's end)
is the total of the latest vintage known as of day ``e_i + d``:
``C[i, d] = v`` of the vintage with the largest ``a <= e_i + d``. A vintage
dated before the period ends (a week still in progress) counts from lag 0;
one dated after ``e_i + max_lag`` lies outside the triangle. As of day ``T``
only the cells with ``e_i + d <= T`` are known; the others, and the lags
before a period's first vintage, are NaN. A final count (never revised) is
passed as a vintage dated on the period's last day, so its row is constant.

The chain ladder (Mack 1993)
----------------------------
Sources: T. Mack (1993), "Distribution-free calculation of the standard
error of chain ladder reserve estimates", ASTIN Bulletin 23(2):213-225. The
formulas below are the paper's, written from memory of it, in our notation
(lags ``d = 0..D``; the paper's accident years are our periods, its
development years our lags):

- development factors, volume-weighted over the rows ``i`` with both lags
  known: ``f_d = sum_i C[i, d+1] / sum_i C[i, d]`` (NaN when no row has both
  lags known; 1 when the known counts at lag ``d`` are all 0);
- ``sigma2_d = 1/(n_d - 1) sum_i C[i, d] (C[i, d+1] / C[i, d] - f_d)^2`` over
  the ``n_d`` such rows with ``C[i, d] > 0``; where ``n_d < 2``, Mack's rule
  for the last factor, ``min(sigma2_{d-1}^2 / sigma2_{d-2}, sigma2_{d-2},
  sigma2_{d-1})`` (the available terms; 0 when none is available);
- the nowcast of a row whose latest known lag is ``L``:
  ``U_i = C[i, L] f_L f_{L+1} ... f_{D-1}``;
- its mean squared error (Mack 1993, Theorem 3):
  ``mse_i = U_i^2 sum_{k=L}^{D-1} sigma2_k / f_k^2 (1 / Chat[i, k] + 1 / S_k)``,
  with ``Chat[i, k] = C[i, L] f_L ... f_{k-1}`` (``Chat[i, L] = C[i, L]``)
  and ``S_k = sum_i C[i, k]`` over the rows that estimated ``f_k``. The first
  term is the process variance, the second the estimation error.

The predictive distribution (our choice, for scoring)
-----------------------------------------------------
Mack's method gives a mean and a variance, not a distribution. To score it
with WIS, coverage and the log score, :func:`chain_ladder_draws` draws the
eventual count as ``C[i, L] + R`` with the still-pending reports ``R``
negative binomial of mean ``max(U_i - C[i, L], 0)`` and variance
``max(mse_i, mean)`` (a gamma-Poisson mixture; Poisson where ``mse_i`` does
not exceed the mean). A row whose latest count is 0 gets 0 pending: the
multiplicative method cannot see anything arrive from nothing.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ChainLadder", "chain_ladder", "chain_ladder_draws", "reporting_triangle"]


def reporting_triangle(
    period_end: np.ndarray,
    vintage_period: np.ndarray,
    vintage_as_of: np.ndarray,
    vintage_value: np.ndarray,
    as_of: int,
    max_lag: int,
) -> np.ndarray:
    """Cumulative counts ``C[i, d]`` known as of day ``as_of`` (see the module docstring).

    period_end : (P,) int, the day each period ends on.
    vintage_period : (V,) int, index into ``period_end`` of each vintage's period.
    vintage_as_of : (V,) int, the day each vintage's total is known as of.
    vintage_value : (V,) the totals.
    Returns an array of shape (P, max_lag + 1), NaN where not known as of ``as_of``.
    Vintages dated after ``as_of`` are ignored, so the result never looks ahead.
    """
    end = np.asarray(period_end, dtype=np.int64)
    vp = np.asarray(vintage_period, dtype=np.intp)
    va = np.asarray(vintage_as_of, dtype=np.int64)
    vv = np.asarray(vintage_value, dtype=float)
    if not (vp.shape == va.shape == vv.shape) or vp.ndim != 1:
        raise ValueError(f"vintage arrays must be 1-d of one length, got {vp.shape}, {va.shape}, {vv.shape}")
    if max_lag < 0:
        raise ValueError(f"max_lag must be >= 0, got {max_lag}")
    lags = np.arange(max_lag + 1)
    out = np.full((end.size, max_lag + 1), np.nan)
    if vp.size:
        if vp.min() < 0 or vp.max() >= end.size:
            raise ValueError(f"vintage_period must index the {end.size} periods, got values {vp.min()}..{vp.max()}")
        lag = va - end[vp]
        keep = (va <= as_of) & (lag <= max_lag)
        vp, va, vv, lag = vp[keep], va[keep], vv[keep], np.maximum(lag[keep], 0)
        order = np.lexsort((va, lag, vp))  # by period, then lag, then as-of
        vp, lag, vv = vp[order], lag[order], vv[order]
        last = np.r_[(vp[1:] != vp[:-1]) | (lag[1:] != lag[:-1]), True]  # latest vintage of each (period, lag)
        out[vp[last], lag[last]] = vv[last]
    # Carry each vintage forward to the later lags (what is known as of e_i + d).
    seen = np.maximum.accumulate(np.where(np.isfinite(out), lags[None, :], -1), axis=1)
    out = np.where(seen >= 0, np.take_along_axis(out, np.maximum(seen, 0), axis=1), np.nan)
    out[end[:, None] + lags[None, :] > as_of] = np.nan
    return out


@dataclass(frozen=True)
class ChainLadder:
    """The chain ladder fitted to one triangle (shapes: P periods, D = max_lag).

    factors : (D,) development factor from lag d to d + 1 (NaN: not estimable yet).
    sigma2 : (D,) Mack's variance parameter per lag.
    rows : (D,) number of rows that estimated each factor.
    latest : (P,) latest known cumulative count (NaN: nothing known yet).
    latest_lag : (P,) lag of that count (-1: nothing known).
    ultimate : (P,) chain-ladder nowcast of the count at lag D (NaN: not estimable).
    mse : (P,) Mack's mean squared error of ``ultimate`` (NaN: not estimable).
    """

    factors: np.ndarray
    sigma2: np.ndarray
    rows: np.ndarray
    latest: np.ndarray
    latest_lag: np.ndarray
    ultimate: np.ndarray
    mse: np.ndarray


def chain_ladder(triangle: np.ndarray) -> ChainLadder:
    """Fit the chain ladder (Mack 1993) to a triangle from :func:`reporting_triangle`.

    Each row's known cells must be one run of lags ending at its latest known
    lag (what :func:`reporting_triangle` returns). See the module docstring
    for the formulas.
    """
    c = np.asarray(triangle, dtype=float)
    if c.ndim != 2 or c.shape[1] < 1:
        raise ValueError(f"triangle must have shape (periods, max_lag + 1), got {c.shape}")
    p, width = c.shape
    d_max = width - 1
    known = np.isfinite(c)
    factors = np.full(d_max, np.nan)
    sigma2 = np.full(d_max, np.nan)
    rows = np.zeros(d_max, dtype=np.int64)
    volume = np.zeros(d_max)  # S_k
    for d in range(d_max):
        pair = known[:, d] & known[:, d + 1]
        rows[d] = int(pair.sum())
        if not rows[d]:
            continue
        now, nxt = c[pair, d], c[pair, d + 1]
        volume[d] = now.sum()
        factors[d] = nxt.sum() / volume[d] if volume[d] > 0 else 1.0
        pos = now > 0
        n = int(pos.sum())
        if n >= 2:
            sigma2[d] = float(np.sum(now[pos] * (nxt[pos] / now[pos] - factors[d]) ** 2) / (n - 1))
        else:  # Mack's rule for a factor estimated from one row (the last one)
            prev1 = sigma2[d - 1] if d >= 1 else np.nan
            prev2 = sigma2[d - 2] if d >= 2 else np.nan
            options = [float(x) for x in (prev1, prev2) if np.isfinite(x)]
            if np.isfinite(prev1) and np.isfinite(prev2) and prev2 > 0:
                options.append(float(prev1**2 / prev2))
            sigma2[d] = min(options) if options else 0.0
    lags = np.arange(width)
    latest_lag = np.where(known.any(axis=1), np.max(np.where(known, lags[None, :], -1), axis=1), -1)
    has = latest_lag >= 0
    latest = np.full(p, np.nan)
    latest[has] = c[has, latest_lag[has]]
    # Suffix products: tail[L] = f_L ... f_{D-1}; tail[D] = 1 (NaN propagates from any factor not estimable).
    tail = np.ones(width)
    tail[:d_max] = np.cumprod(factors[::-1])[::-1]
    ultimate = np.where(has, latest * tail[np.maximum(latest_lag, 0)], np.nan)
    mse = np.where(has & np.isfinite(ultimate), 0.0, np.nan)
    chat = np.where(has, latest, np.nan)  # Chat[i, k] for the current k, per row
    for k in range(d_max):
        active = has & (latest_lag <= k) & np.isfinite(ultimate) & (ultimate > 0)
        if not active.any():
            continue
        if sigma2[k] > 0:
            with np.errstate(divide="ignore"):
                inv_s = 1.0 / volume[k] if volume[k] > 0 else np.inf
                term = sigma2[k] / factors[k] ** 2 * (1.0 / chat[active] + inv_s)
            mse[active] += ultimate[active] ** 2 * term
        chat = np.where(has & (latest_lag <= k), chat * factors[k], chat)
    return ChainLadder(factors, sigma2, rows, latest, latest_lag, ultimate, mse)


def chain_ladder_draws(fit: ChainLadder, rows: np.ndarray, m: int, rng: np.random.Generator) -> np.ndarray:
    """(m, len(rows)) draws of the eventual counts of the given rows (see the module docstring).

    Every requested row must have a finite nowcast (ValueError otherwise).
    """
    rows = np.asarray(rows, dtype=np.intp)
    base, ult, mse = fit.latest[rows], fit.ultimate[rows], fit.mse[rows]
    if not (np.all(np.isfinite(ult)) and np.all(np.isfinite(mse))):
        raise ValueError("chain-ladder draws asked for rows without a nowcast (a factor they need is not estimable yet)")
    mean = np.maximum(ult - base, 0.0)
    var = np.maximum(mse, mean)
    over = var > mean * (1 + 1e-9)
    # Gamma-Poisson: shape k = mean^2 / (var - mean) gives variance mean + mean^2 / k = var.
    shape = np.where(over, mean**2 / np.where(over, var - mean, 1.0), 1.0)
    scale = np.where(over, mean / np.where(shape > 0, shape, 1.0), 0.0)
    lam = np.where(over, rng.gamma(np.where(shape > 0, shape, 1.0), 1.0, (m, rows.size)) * scale, mean)
    return base + rng.poisson(lam)
