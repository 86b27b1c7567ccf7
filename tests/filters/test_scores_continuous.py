"""The sample CRPS (filters.crps_from_samples) on continuous predictives, as the backtest scores
concentration series: against closed forms and numerical integration.

References: CRPS(F, y) = int (F(x) - 1{x >= y})^2 dx (Gneiting & Raftery 2007, "Strictly proper
scoring rules, prediction, and estimation", JASA 102, eq. 20); the normal closed form (Gneiting et
al. 2005, filters.crps_normal); the log-normal closed form of Baran & Lerch (2015), "Log-normal
distribution based ensemble model output statistics models for probabilistic wind-speed
forecasting", QJRMS 141 (formula written from memory, so it is itself checked against quadrature);
the threshold-weighted CRPS with weight 1{z >= L} equals the CRPS of max(X, L) at max(y, L)
(Gneiting & Ranjan 2011, JBES 29), which is how censored samples are scored.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from filters import crps_from_samples, crps_normal

M = 200_000


def crps_lognormal(mu: float, s: float, y: float) -> float:
    """Baran & Lerch (2015): y (2 Phi(w) - 1) - 2 exp(mu + s^2/2) (Phi(w - s) + Phi(s / sqrt 2) - 1), w = (log y - mu) / s."""
    w = (math.log(y) - mu) / s
    phi = stats.norm.cdf
    return y * (2 * phi(w) - 1) - 2 * math.exp(mu + s * s / 2) * (phi(w - s) + phi(s / math.sqrt(2)) - 1)


def crps_quad(cdf, y: float, lower: float, upper: float) -> float:
    """int_lower^upper (F(x) - 1{x >= y})^2 dx by adaptive quadrature, split at y."""
    left = integrate.quad(lambda x: cdf(x) ** 2, lower, max(lower, y), limit=200)[0] if y > lower else 0.0
    right = integrate.quad(lambda x: (1 - cdf(x)) ** 2, max(lower, y), upper, limit=200)[0]
    return left + right


@pytest.mark.parametrize("y", [-2.0, 0.3, 1.0, 4.5])
def test_sample_crps_of_a_normal_matches_the_closed_form(y):
    """N(1, 1.5^2). Monte Carlo error: the estimator's sd is about sd(|X - y|) / sqrt(M) < 1.5 / sqrt(2e5)
    = 0.0034, and its bias (pairs i = j) is E|X - X'| / (2M) < 1e-5; tolerance 0.015 is over 4 sd."""
    x = np.random.default_rng(1).normal(1.0, 1.5, M)
    assert crps_from_samples(x, y) == pytest.approx(float(crps_normal(1.0, 1.5, y)), abs=0.015)
    # and the closed form itself against quadrature of the definition
    assert float(crps_normal(1.0, 1.5, y)) == pytest.approx(crps_quad(stats.norm(1.0, 1.5).cdf, y, -40, 40), abs=1e-7)


@pytest.mark.parametrize("y", [50.0, 400.0, 1000.0, 9000.0])
def test_sample_crps_of_a_log_normal_matches_baran_lerch_and_quadrature(y):
    """log X ~ N(log 800, 0.6^2) (a wastewater level). The closed form equals quadrature to 1e-6
    relative; the sample CRPS is within 1 % of it (its relative Monte Carlo sd is about
    sd(|X - y|) / (sqrt(M) CRPS) < 0.3 %: over 3 sd)."""
    mu, s = math.log(800.0), 0.6
    exact = crps_lognormal(mu, s, y)
    law = stats.lognorm(s, scale=math.exp(mu))
    assert exact == pytest.approx(crps_quad(law.cdf, y, 0.0, law.ppf(1 - 1e-13)), rel=1e-6)
    x = np.random.default_rng(2).lognormal(mu, s, M)
    assert crps_from_samples(x, y) == pytest.approx(exact, rel=0.01)


@pytest.mark.parametrize("y", [30.0, 250.0, 2000.0])
def test_censoring_at_the_limit_is_the_threshold_weighted_crps(y):
    """The backtest scores a sample with limit L = 300 as CRPS(max(X, L), max(y, L)): equal to
    int_L^inf (F(x) - 1{x >= y})^2 dx (quadrature), for values below the limit (not detected, then
    only max(y, L) = L is known) and above it. Tolerance 1 %, as above (3+ Monte Carlo sd)."""
    lod = 300.0
    mu, s = math.log(800.0), 0.6
    law = stats.lognorm(s, scale=math.exp(mu))
    x = np.random.default_rng(3).lognormal(mu, s, M)
    reference = crps_quad(law.cdf, max(y, lod), lod, law.ppf(1 - 1e-13))
    assert crps_from_samples(np.maximum(x, lod), max(y, lod)) == pytest.approx(reference, rel=0.01)
