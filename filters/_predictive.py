"""The one-step-ahead predictive of a value the filter is about to assimilate.

Before a report re-weights the cloud, the cloud (moved to the report's day,
weighted as after the previous step) already says what it expects: the
mixture over particles of each particle's law of the reported value,
p(y) = sum_i w_i p(y | x_i). Setting the value against that law, one value at
a time as data arrive, is the prequential check of Dawid (1984, "Statistical
theory: the prequential approach", JRSS A 147): a well-calibrated filter puts
about 90 % of values inside their 90 % predictive interval, and their
probability integral transforms (PIT) are about uniform.

Everything here is exact for the mixture it is given (no random draws, so the
filter's generator and every later output are unchanged): quantiles invert the
mixture's cumulative distribution on a grid of whole numbers (counts) or by
bisection on the log scale (concentrations). Clouds of more than
``MAX_COMPONENTS`` particles are first thinned deterministically.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.special import betaln, gammaln, ndtr

__all__ = ["Predictive", "PredictiveLaw", "one_step_predictive"]

COUNT_FAMILIES = ("poisson", "negbin", "binomial", "betabinomial")
LEVEL_FAMILIES = ("lognormal", "studentt")
# Clouds larger than this are summarised through a deterministic systematic subsample of this
# many equally weighted particles (stratified mid-points of the weights' cumulative sum, no random
# draw): the mixture's cdf then carries an error of order 1 / MAX_COMPONENTS, far below what a
# calibration check reads, at a fraction of the cost.
MAX_COMPONENTS = 512


@dataclass(frozen=True)
class PredictiveLaw:
    """Each particle's law of one reported value; arrays of shape (n_particles,) or scalars.

    family : 'poisson' (mean), 'negbin' (mean, size), 'binomial' (trials, p),
        'betabinomial' (trials, p, phi: concentration of the share), 'lognormal'
        (median, sd: log Y ~ N(log median, sd)), 'studentt' (median, sd, df:
        (log Y - log median) / sd ~ t_df).
    offset : a constant added to the value (a revision: the total already known
        before this increment), so the law is of the total reported.
    """

    family: str
    params: dict[str, np.ndarray | float]
    offset: float = 0.0

    def __post_init__(self) -> None:
        if self.family not in COUNT_FAMILIES + LEVEL_FAMILIES:
            raise ValueError(f"unknown predictive family {self.family!r}; allowed: {COUNT_FAMILIES + LEVEL_FAMILIES}")


@dataclass(frozen=True)
class Predictive:
    """The cloud's predictive of one value, against the value observed.

    observed : the value (a count or total, positives, a concentration); None for a
        sample below its limit of detection.
    quantiles : level -> value of the mixture (discrete: the smallest whole number
        whose cumulative probability reaches the level).
    mean : the mixture mean (None when it is infinite: Student-t noise on the log scale).
    pit : the predictive probability below the observed value; for counts
        P(Y < y) + P(Y = y) / 2 (the mid-PIT), for a sample below its limit half the
        probability of falling below the limit (the mid-point of where its PIT lies).
    p_below_lod : concentration series with a limit: the predictive probability
        of a sample below it.
    """

    observed: float | None
    quantiles: dict[float, float]
    mean: float | None
    pit: float | None
    p_below_lod: float | None = None


def _arrays(law: PredictiveLaw, n: int) -> dict[str, np.ndarray]:
    return {k: np.broadcast_to(np.asarray(v, dtype=float), (n,)) for k, v in law.params.items()}


# ------------------------------------------------------------------ counts
def _count_logpmf(law: PredictiveLaw, p: dict[str, np.ndarray], ks: np.ndarray) -> np.ndarray:
    """Each particle's log P(Y = k) over whole numbers ``ks``: (n, len(ks))."""
    k = ks[None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        if law.family == "poisson":
            return stats.poisson.logpmf(k, np.clip(p["mean"], 0.0, None)[:, None])
        if law.family == "negbin":  # mean mu, size r: Gamma(k + r) / (Gamma(r) k!) (r / (r + mu))^r (mu / (r + mu))^k
            mu, size = np.clip(p["mean"], 0.0, None)[:, None], p["size"][:, None]
            log_total = np.log(size + mu)
            out = (gammaln(k + size) - gammaln(size) - gammaln(k + 1.0)
                   + size * (np.log(size) - log_total) + k * (np.log(mu) - log_total))
            return np.where(mu == 0, np.where(k == 0, 0.0, -np.inf), out)
        n, share = p["trials"][:, None], p["p"][:, None]
        if law.family == "binomial":
            return stats.binom.logpmf(k, n, share)
        a, b = share * p["phi"][:, None], (1.0 - share) * p["phi"][:, None]
        out = gammaln(n + 1.0) - gammaln(k + 1.0) - gammaln(n - k + 1.0) + betaln(k + a, n - k + b) - betaln(a, b)
        out = np.where(k <= n, out, -np.inf)
        # a share of exactly 0 or 1: all mass on 0 or on the number of tests
        out = np.where(a == 0, np.where(k == 0, 0.0, -np.inf), out)
        return np.where(b == 0, np.where(k == n, 0.0, -np.inf), out)


def _count_cdf_below(law: PredictiveLaw, p: dict[str, np.ndarray], lo: int) -> np.ndarray:
    """Each particle's P(Y < lo), (n,): the mass left of the grid (0 when the grid starts at 0)."""
    if lo <= 0:
        return np.zeros(p[next(iter(p))].size)
    if law.family == "poisson":
        return stats.poisson.cdf(lo - 1, np.clip(p["mean"], 0.0, None))
    if law.family == "negbin":
        mu, size = np.clip(p["mean"], 0.0, None), p["size"]
        return stats.nbinom.cdf(lo - 1, size, size / (size + mu))
    if law.family == "binomial":
        return stats.binom.cdf(lo - 1, p["trials"], p["p"])
    return np.exp(_count_logpmf(law, p, np.arange(lo, dtype=float))).sum(axis=1)  # beta-binomial: no closed form


def _count_moments(law: PredictiveLaw, p: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    if law.family == "poisson":
        mu = np.clip(p["mean"], 0.0, None)
        return mu, mu
    if law.family == "negbin":
        mu = np.clip(p["mean"], 0.0, None)
        return mu, mu + mu * mu / p["size"]
    n, q = p["trials"], p["p"]
    var = n * q * (1.0 - q)
    if law.family == "betabinomial":
        var = var * (1.0 + (n - 1.0) / (p["phi"] + 1.0))
    return n * q, var


# A wide mixture (early in a stream, particles' expected counts spanning orders of magnitude) is not
# laid out on a grid of whole numbers: above this many cells (grid x components) its levels are found
# by bisection on the mixture's closed-form cdf.
MAX_GRID_CELLS = 4_000_000
_CLOSED_FORM = ("poisson", "negbin", "binomial")


def _count_predictive_by_bisection(law: PredictiveLaw, p, w, observed, levels, lo: int, hi: int, mean_i) -> Predictive:
    """The same summary as the grid's, for a law with a closed-form cdf: for each level the smallest
    whole number k with P(Y <= k) >= level, by bisection on k; the mid-PIT from the cdfs at y."""

    def cdf(k: int) -> float:  # P(Y <= k) of the mixture
        return float(w @ _count_cdf_below(law, p, k + 1))

    if law.family == "binomial":
        hi = min(hi, int(np.max(p["trials"])))
    while lo > 0 and cdf(lo - 1) >= levels.min():
        lo = max(0, lo - (hi - lo) - 1)
    while cdf(hi) < levels.max() and not (law.family == "binomial" and hi >= int(np.max(p["trials"]))):
        hi = 2 * hi + 1
    quantiles = {}
    for q in levels:
        a, b = lo - 1, hi  # cdf(a) < q <= cdf(b) (cdf(-1) = 0)
        while b - a > 1:
            mid = (a + b) // 2
            if cdf(mid) >= q:
                b = mid
            else:
                a = mid
        quantiles[float(q)] = float(b) + law.offset
    pit = None
    y = None if observed is None else float(observed) - law.offset
    if y is not None and y < 0:
        pit = 0.0
    elif y is not None:
        k = int(y)
        pit = float(w @ _count_cdf_below(law, p, k) + 0.5 * (w @ np.exp(_count_logpmf(law, p, np.array([float(k)])))[:, 0]))
        pit = min(1.0, max(0.0, pit))
    return Predictive(observed, quantiles, float(w @ mean_i) + law.offset, pit)


def _count_predictive(law: PredictiveLaw, p, w, observed, probs) -> Predictive:
    """The mixture's cumulative distribution on a grid of whole numbers: exact on the grid (the
    mass left of it from each particle's cdf), the grid widened until it holds the top level."""
    mean_i, var_i = _count_moments(law, p)
    sd_i = np.sqrt(np.clip(var_i, 0.0, None))
    levels = np.asarray(probs, dtype=float)
    y = None if observed is None else float(observed) - law.offset
    lo = max(0, math.floor(float(np.min(mean_i - 4.5 * sd_i))))
    hi = math.ceil(float(np.max(mean_i + 4.5 * sd_i))) + 1
    # The grid spans the mixture's mass and the value, unless the value lies far out in a tail with a
    # closed-form cdf (a count of 10^9 against a mean of 10^4 must not allocate 10^9 cells a particle).
    far = (y is not None and law.family in ("poisson", "negbin", "binomial")
           and (int(y) - hi > max(1000, 4 * (hi - lo)) or lo - int(y) > max(1000, 4 * (hi - lo))))
    if y is not None and y >= 0 and not far:
        lo, hi = min(lo, max(0, int(y) - 1)), max(hi, int(y) + 1)
    top = int(np.max(p["trials"])) if law.family in ("binomial", "betabinomial") else None
    if law.family in _CLOSED_FORM and (hi - lo) * w.size > MAX_GRID_CELLS:
        return _count_predictive_by_bisection(law, p, w, observed, levels, lo, hi, mean_i)
    while True:
        if top is not None:
            hi = min(hi, top)
        ks = np.arange(lo, hi + 1, dtype=float)
        left = w @ _count_cdf_below(law, p, lo)
        if lo > 0 and left >= levels.min():  # a level may lie left of the grid: widen it
            lo = max(0, lo - (hi - lo) - 1)
            continue
        cdf = left + w @ np.cumsum(np.nan_to_num(np.exp(_count_logpmf(law, p, ks))), axis=1)
        if cdf[-1] >= levels.max() or (top is not None and hi >= top):
            break
        hi = 2 * hi + 1
    # The smallest whole number whose cumulative probability reaches each level.
    at = np.minimum(np.searchsorted(cdf, levels, side="left"), ks.size - 1)
    quantiles = {float(q): float(ks[i]) + law.offset for q, i in zip(levels, at)}
    pit = None
    if y is not None and y < 0:  # below the total already known: impossible under the law
        pit = 0.0
    elif far:
        k = int(y)
        below = float(w @ _count_cdf_below(law, p, k))
        pit = float(below + 0.5 * (w @ np.exp(_count_logpmf(law, p, np.array([float(k)])))[:, 0]))
    elif y is not None and int(y) - lo >= ks.size:
        # Above the grid, which then ends at the largest number of trials of any particle (a binomial
        # law): the value is impossible under every particle and all the mass lies below it.
        pit = float(cdf[-1])
    elif y is not None:
        i = int(y) - lo
        below = cdf[i - 1] if i >= 1 else float(w @ _count_cdf_below(law, p, int(y)))
        pit = float(below + 0.5 * (cdf[i] - below))
    if pit is not None:  # sums of many pmf terms can pass 1 by rounding
        pit = min(1.0, max(0.0, pit))
    return Predictive(observed, quantiles, float(w @ mean_i) + law.offset, pit)


# ------------------------------------------------------------------ levels
def _level_cdf(law: PredictiveLaw, p: dict[str, np.ndarray], log_y: np.ndarray) -> np.ndarray:
    """Each particle's P(Y <= y) at the given log y: (n, len(log_y)). A median of 0 (nothing
    shed) is a point mass at 0."""
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (log_y[None, :] - np.log(p["median"])[:, None]) / p["sd"][:, None]
    return ndtr(z) if law.family == "lognormal" else stats.t.cdf(z, p["df"][:, None])


def _level_predictive(law: PredictiveLaw, p, w, observed, probs, lod) -> Predictive:
    levels = np.asarray(probs, dtype=float)
    positive = p["median"] > 0
    if not positive.any():  # nothing shed anywhere: every sample would be 0
        return Predictive(observed, {float(q): 0.0 for q in levels}, 0.0,
                          None if observed is not None else 0.5, None if lod is None else 1.0)
    log_m = np.log(p["median"][positive])
    spread = float(np.max(p["sd"])) * (60.0 if law.family == "studentt" else 12.0)
    lo = np.full(levels.size, float(log_m.min()) - spread)
    hi = np.full(levels.size, float(log_m.max()) + spread)

    def cdf(log_y: np.ndarray) -> np.ndarray:
        return w @ _level_cdf(law, p, np.asarray(log_y, dtype=float))

    for _ in range(200):  # bisection on log y, to 1e-9 relative
        if np.all(hi - lo < 1e-9):
            break
        mid = 0.5 * (lo + hi)
        below = cdf(mid) < levels
        lo, hi = np.where(below, mid, lo), np.where(below, hi, mid)
    at_zero = float(w[~positive].sum())  # particles shedding nothing: a point mass at 0
    quantiles = {float(q): 0.0 if q <= at_zero else float(math.exp(v)) for q, v in zip(levels, 0.5 * (lo + hi))}
    mean = None
    if law.family == "lognormal":
        mean = float(w @ (p["median"] * np.exp(0.5 * p["sd"] ** 2)))
    p_lod = None if lod is None else float(cdf(np.array([math.log(lod)]))[0])
    if observed is None:
        pit = None if p_lod is None else 0.5 * p_lod
    elif observed <= 0:  # only the particles that shed nothing put mass there (mid-PIT of that point mass)
        pit = 0.5 * at_zero
    else:
        pit = float(cdf(np.array([math.log(observed)]))[0])
    return Predictive(observed, quantiles, mean, pit, p_lod)


def one_step_predictive(
    law: PredictiveLaw,
    weights: np.ndarray,
    observed: float | None,
    probs: Sequence[float],
    lod: float | None = None,
) -> Predictive:
    """The mixture ``sum_i weights_i law_i`` summarised at ``probs``, against ``observed``.

    weights : (n_particles,), normalised. observed : the value reported (None: a sample
    below ``lod``, the limit of detection of a concentration series).
    """
    w = np.asarray(weights, dtype=float)
    p = _arrays(law, w.size)
    if w.size > MAX_COMPONENTS:
        picks = np.searchsorted(np.cumsum(w), (np.arange(MAX_COMPONENTS) + 0.5) / MAX_COMPONENTS * w.sum())
        picks = np.minimum(picks, w.size - 1)
        p = {k: v[picks] for k, v in p.items()}
        w = np.full(MAX_COMPONENTS, 1.0 / MAX_COMPONENTS)
    if law.family in COUNT_FAMILIES:
        return _count_predictive(law, p, w, observed, probs)
    return _level_predictive(law, p, w, observed, probs, lod)
