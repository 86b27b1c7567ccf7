"""Learning a static contact rate from each particle's own path.

A rate ``beta`` whose only role is to scale the mean of Poisson counts (``beta
x e`` contacts over an exposure ``e``) has, given a particle's whole path, the
complete-data likelihood ``beta^M exp(-beta E)``, with ``M`` the counts and
``E`` the exposure summed over the path; nothing else the path holds depends
on it. So its posterior given the path is ``prior(beta) beta^M exp(-beta E)``:
``Gamma(a + M, b + E)`` under a ``Gamma(a, b)`` prior (shape, rate), the
Poisson-gamma conjugate pair (Gelman et al. 2013, *Bayesian Data Analysis*,
3rd ed., section 2.6). A particle that carries ``(M, E)`` can redraw its rate
from that conditional at any step without looking back at its history. That
is an MCMC move which leaves the filter's target ``p(path, beta | data)``
invariant, so the weights stay as they are: the resample-move filter of Gilks
& Berzuini (2001), with the conditional kept by sufficient statistics as in
Storvik (2002) and Fearnhead (2002). Made every day, it redraws each
particle's rate from its own path's conditional instead of shrinking the rates
towards their mean and jittering them (Liu-West); how well the cloud then
spans the rates' posterior is limited, as for any function of the paths, by
how many distinct paths resampling leaves (measured in
tests/filters/test_individual_filter.py).

The move is one independence Metropolis-Hastings step whose proposal is
``Gamma(a0 + M, b0 + E)``, ``(a0, b0)`` the gamma with the prior's mean and
variance. The likelihood cancels from the acceptance ratio, which is
``[prior(b') / g0(b')] / [prior(b) / g0(b)]`` (``g0`` that gamma's density):
under a gamma prior every proposal is accepted (the exact Gibbs draw), under
another prior on [0, inf) the ratio stays near 1 wherever the gamma resembles
the prior.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from schemas import Beta, Gamma, LogNormal, Uniform

from ._priors import prior_logpdf

__all__ = ["learnable_prior", "prior_gamma", "move_rates"]


def _frozen(prior: object) -> object | None:
    if isinstance(prior, LogNormal):
        return stats.lognorm(prior.sd_log, scale=np.exp(prior.mean_log))
    if isinstance(prior, Gamma):
        return stats.gamma(prior.shape, scale=prior.scale)
    if isinstance(prior, Beta):
        return stats.beta(prior.a, prior.b)
    if isinstance(prior, Uniform) and prior.low >= 0:
        return stats.uniform(prior.low, prior.high - prior.low)
    return None


def learnable_prior(prior: object) -> bool:
    """Whether a rate with this prior can be learned by :func:`move_rates` (its support is in [0, inf))."""
    return _frozen(prior) is not None


def prior_gamma(prior: object) -> tuple[float, float]:
    """(shape, rate) of the gamma with the prior's mean and variance."""
    frozen = _frozen(prior)
    if frozen is None:
        raise ValueError(f"prior {prior!r} does not live on [0, inf); allowed: lognormal, gamma, beta, uniform with low >= 0")
    mean, var = float(frozen.mean()), float(frozen.var())  # type: ignore[attr-defined]
    return mean * mean / var, mean / var


def move_rates(
    values: np.ndarray, counts: np.ndarray, exposure: np.ndarray, prior: object, rng: np.random.Generator
) -> np.ndarray:
    """One independence Metropolis-Hastings step per particle towards
    ``prior(beta) beta^counts exp(-beta exposure)`` (see the module docstring).

    ``values``, ``counts``, ``exposure``: one entry per particle. Draws one gamma and
    one uniform per particle; returns the new values."""
    a0, b0 = prior_gamma(prior)
    proposal = rng.gamma(a0 + counts, 1.0 / (b0 + exposure))
    u = rng.random(values.size)

    def log_ratio_to_gamma(x: np.ndarray) -> np.ndarray:
        with np.errstate(divide="ignore"):
            return prior_logpdf(prior, x) - stats.gamma.logpdf(x, a0, scale=1.0 / b0)

    with np.errstate(invalid="ignore"):
        log_accept = log_ratio_to_gamma(proposal) - log_ratio_to_gamma(values)
    return np.where(np.log(u) < log_accept, proposal, values)
