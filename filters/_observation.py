"""Observations as the engine sees them, and the count-noise likelihoods."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
from scipy import stats
from scipy.special import betaln, gammaln, log_ndtr

__all__ = [
    "Observation",
    "ObservationError",
    "poisson_loglik",
    "negbin_loglik",
    "binomial_loglik",
    "betabinomial_loglik",
    "log_concentration_loglik",
    "delay_kernel",
]


class ObservationError(ValueError):
    """An observation cannot be assimilated (unknown series, impossible value, wrong time)."""


@dataclass(frozen=True)
class Observation:
    """Counts for one period.

    ``time`` is the model day the counts refer to (the last day of the week
    for weekly series); ``values`` maps series name to a count, or ``None``
    when that series was not reported this period (skipped, not zero).
    """

    time: int
    values: Mapping[str, float | None] = field(default_factory=dict)
    # Number of tests behind each positivity series' positives (series name -> tests).
    trials: Mapping[str, float | None] = field(default_factory=dict)
    # Concentration series: the lab's limit of detection and the sample's flow (series name -> value).
    # A value below its limit (0 included) is censored: only "below the limit" is known.
    limits: Mapping[str, float | None] = field(default_factory=dict)
    flows: Mapping[str, float | None] = field(default_factory=dict)

    def present(self) -> dict[str, float]:
        return {k: v for k, v in self.values.items() if v is not None}


def poisson_loglik(y: float, mu: np.ndarray) -> np.ndarray:
    """log P(Y = y) for Y ~ Poisson(mu), elementwise over mu; mu = 0 allowed."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out = y * np.log(mu) - mu - math.lgamma(y + 1.0)
    if y == 0:
        out = -np.asarray(mu, dtype=float)
    return np.where(np.isnan(out), -np.inf, out)


def negbin_loglik(y: float, mu: np.ndarray, size: np.ndarray | float) -> np.ndarray:
    """log P(Y = y) for a negative binomial with mean mu and size k (variance mu + mu^2/k)."""
    return _negbin_loglik(y, mu, _negbin_size_terms(size))


def _negbin_size_terms(size: np.ndarray | float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(k, log k, log Gamma(k)): the parts of the negative-binomial log-pmf that depend
    on the size only, so several series sharing one size compute them once."""
    k = np.asarray(size, dtype=float)
    if k.ndim and not k.flags.c_contiguous:
        k = np.ascontiguousarray(k)  # e.g. a parameter column: same values, faster loops
    with np.errstate(divide="ignore", invalid="ignore"):
        return k, np.log(k), gammaln(k)


def _negbin_loglik(y: float, mu: np.ndarray, terms: tuple[np.ndarray, np.ndarray, np.ndarray]) -> np.ndarray:
    k, log_k, gammaln_k = terms
    mu = np.asarray(mu, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_k_mu = np.log(k + mu)
        log_p_zero = k * (log_k - log_k_mu)
        if y == 0:
            out = log_p_zero
        else:
            out = (
                gammaln(y + k) - gammaln_k - math.lgamma(y + 1.0)
                + log_p_zero + y * (np.log(mu) - log_k_mu)
            )
    return np.where(np.isnan(out), -np.inf, out)


def binomial_loglik(y: float, trials: np.ndarray, p: np.ndarray | float) -> np.ndarray:
    """log P(Y = y) for Y ~ Binomial(trials, p); -inf where y > trials."""
    # neginf must stay -inf: nan_to_num would otherwise turn it into -1.8e308.
    return np.nan_to_num(stats.binom.logpmf(y, trials, p), nan=-np.inf, neginf=-np.inf)


def betabinomial_loglik(y: float, trials: np.ndarray | float, p: np.ndarray | float, concentration: np.ndarray | float) -> np.ndarray:
    """log P(Y = y) for a beta-binomial out of ``trials`` with mean share ``p`` and concentration phi.

    Y | q ~ Binomial(trials, q), q ~ Beta(p phi, (1 - p) phi): mean trials p, variance
    trials p (1 - p) (1 + (trials - 1) / (phi + 1)); phi -> infinity is the binomial.
    ``p`` of exactly 0 or 1 puts all mass on 0 or ``trials``; -inf where y > trials.
    """
    n = np.asarray(trials, dtype=float)
    p = np.asarray(p, dtype=float)
    phi = np.asarray(concentration, dtype=float)
    a, b = p * phi, (1.0 - p) * phi
    with np.errstate(divide="ignore", invalid="ignore"):
        out = (
            gammaln(n + 1.0) - math.lgamma(y + 1.0) - gammaln(n - y + 1.0)
            + betaln(y + a, n - y + b) - betaln(a, b)
        )
    out = np.where(a == 0, np.where(y == 0, 0.0, -np.inf), out)
    out = np.where(b == 0, np.where(y == n, 0.0, -np.inf), out)
    out = np.where(y > n, -np.inf, out)
    return np.where(np.isnan(out), -np.inf, out)


def log_concentration_loglik(
    y: float,
    mean: np.ndarray,
    sd: np.ndarray | float,
    lod: float | None = None,
    df: float | None = None,
) -> np.ndarray:
    """Log-likelihood of a measured concentration ``y`` whose logarithm is centred on log(mean).

    log Y = log(mean) + sd * e, with e standard normal (log-normal noise: the median
    of Y is ``mean``) or Student-t with ``df`` degrees of freedom. A value below the
    limit of detection ``lod`` (0 included) is censored: its likelihood is
    P(Y < lod). Otherwise the density of Y at y (in y's units, so the term -log y
    is included). ``mean`` of 0 (nothing shed) explains only values below a limit.
    """
    mean = np.asarray(mean, dtype=float)
    sd = np.asarray(sd, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_mean = np.log(mean)
        if lod is not None and y < lod:
            z = (math.log(lod) - log_mean) / sd
            out = log_ndtr(z) if df is None else stats.t.logcdf(z, df)
        else:
            if y <= 0:
                raise ValueError(f"a concentration of {y!r} has no logarithm; a value below the limit of detection needs the limit")
            z = (math.log(y) - log_mean) / sd
            base = -0.5 * z * z - 0.5 * math.log(2 * math.pi) if df is None else stats.t.logpdf(z, df)
            out = base - np.log(sd) - math.log(y)
    return np.where(np.isnan(out), -np.inf, out)


def delay_kernel(dist: str, mean: float, sd: float, max_days: int) -> np.ndarray:
    """Probability that a case is reported d = 0..max_days days after it occurs.

    The continuous delay is discretised by rounding to the nearest day
    (mass on [d - 0.5, d + 0.5), day 0 taking [0, 0.5)) and truncated at
    ``max_days`` with the kernel renormalised (common practice).
    """
    if dist == "gamma":
        shape = (mean / sd) ** 2
        cdf = stats.gamma(shape, scale=sd**2 / mean).cdf
    elif dist == "lognormal":
        sigma2 = math.log1p((sd / mean) ** 2)
        cdf = stats.lognorm(math.sqrt(sigma2), scale=math.exp(math.log(mean) - sigma2 / 2)).cdf
    else:
        raise ValueError(f"delay distribution {dist!r} not known; allowed: ['gamma', 'lognormal']")
    edges = np.concatenate([[0.0], np.arange(max_days + 1) + 0.5])
    mass = np.diff(cdf(edges))
    return mass / mass.sum()
