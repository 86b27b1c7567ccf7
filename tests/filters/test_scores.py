"""Proper scores and ROC/AUC (filters/_scores.py) against outside references.

References (named beside each check):
- Gneiting & Raftery (2007), "Strictly proper scoring rules, prediction, and
  estimation", JASA 102:359-378: CRPS energy form (eq. 21), interval score (eq. 43).
- Gneiting, Raftery, Westveld & Goldman (2005), Mon. Weather Rev. 133: closed-form CRPS of a normal.
- Bracher, Ray, Gneiting & Reich (2021), "Evaluating epidemic forecasts in an
  interval format", PLoS Comput Biol 17:e1008618: WIS definition (K + 1/2
  normalisation, median weight 1/2, interval weights alpha_k / 2), its
  identity with a sum of quantile (pinball) losses, and WIS -> CRPS as K grows.
- Funk et al. (2019), PLoS Comput Biol 15:e1006785: bias of integer forecasts.
- Mann & Whitney (1947), via scipy.stats.mannwhitneyu: AUC = U / (n1 n0), ties counted 1/2.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from filters import (
    FORECAST_LEVELS,
    auc,
    bias,
    coverage,
    crps_from_samples,
    crps_normal,
    interval_score,
    log_score_from_samples,
    roc_curve,
    weighted_interval_score,
)


# ---------------------------------------------------------------------- CRPS
def test_sample_crps_equals_pairwise_definition_exactly():
    """The O(M log M) sorted form equals the O(M^2) definition E|X-y| - 1/2 E|X-X'| (Gneiting & Raftery 2007, eq. 21)."""
    assert crps_from_samples(np.array([1.0, 3.0]), 2.0) == pytest.approx(0.5)  # 1 - 0.5 * (0+2+2+0)/4
    rng = np.random.default_rng(3)
    x = rng.gamma(2.0, 3.0, size=(137, 5))
    y = np.array([0.0, 1.5, 6.0, 20.0, 6.0])
    pairwise = np.mean(np.abs(x - y), axis=0) - 0.5 * np.mean(np.abs(x[:, None, :] - x[None, :, :]), axis=(0, 1))
    np.testing.assert_allclose(crps_from_samples(x, y), pairwise, rtol=1e-12, atol=1e-12)


def test_crps_normal_closed_form_values():
    """Closed form (Gneiting et al. 2005): CRPS(N(0,1), 0) = 2 phi(0) - 1/sqrt(pi) = (sqrt 2 - 1)/sqrt(pi); scale equivariance."""
    assert crps_normal(0.0, 1.0, 0.0) == pytest.approx((math.sqrt(2) - 1) / math.sqrt(math.pi), rel=1e-14)
    assert crps_normal(5.0, 3.0, 11.0) == pytest.approx(3.0 * crps_normal(0.0, 1.0, 2.0), rel=1e-14)
    # large |z|: CRPS -> |y - mu| - sigma / sqrt(pi)
    assert crps_normal(0.0, 1.0, 40.0) == pytest.approx(40.0 - 1 / math.sqrt(math.pi), rel=1e-12)


@pytest.mark.parametrize("y", [-1.3, 0.4, 4.0])
def test_sample_crps_converges_to_normal_closed_form(y):
    """Sample CRPS -> closed-form normal CRPS (Gneiting & Raftery 2007) as M grows.

    The empirical-distribution CRPS has a known finite-M bias: E|X-X'| is
    averaged over all M^2 pairs including the M zero diagonal terms, so its
    expectation is CRPS + E|X-X'| / (2M) = CRPS + sigma / (sqrt(pi) M). The
    tolerance is 4 Monte Carlo standard errors measured from R independent
    replicates in the test itself.
    """
    mu, sigma, reps = 1.0, 2.0, 200
    exact = float(crps_normal(mu, sigma, y))
    rng = np.random.default_rng(20070301)
    errors, sds = [], []
    for m in (100, 1000, 10000):
        draws = rng.normal(mu, sigma, size=(m, reps))
        est = crps_from_samples(draws, np.full(reps, y))
        sd = est.std(ddof=1)
        expected = exact + sigma / (math.sqrt(math.pi) * m)
        assert abs(est.mean() - expected) < 4 * sd / math.sqrt(reps), (m, est.mean(), expected, sd)
        errors.append(np.sqrt(np.mean((est - exact) ** 2)))
        sds.append(sd)
    # root-mean-square error shrinks like 1/sqrt(M): a factor ~sqrt(10) = 3.16 per step; require > 2
    assert errors[0] / errors[1] > 2 and errors[1] / errors[2] > 2, errors
    print(f"CRPS N({mu},{sigma}) at y={y}: exact {exact:.5f}; RMS error M=100/1e3/1e4: {[f'{e:.4f}' for e in errors]}")


# ---------------------------------------------------------- interval score
def test_interval_score_hand_cases():
    """IS_alpha(l, u; y) = (u - l) + 2/alpha (l - y)+ + 2/alpha (y - u)+ (Gneiting & Raftery 2007, eq. 43)."""
    l, u, a = 2.0, 15.0, 0.1
    assert interval_score(l, u, 10.0, a) == pytest.approx(13.0)  # inside: width only
    assert interval_score(l, u, 16.0, a) == pytest.approx(13.0 + 20.0 * 1.0)  # 1 above: 33
    assert interval_score(l, u, 0.0, a) == pytest.approx(13.0 + 20.0 * 2.0)  # 2 below: 53
    assert interval_score(l, u, 2.0, a) == pytest.approx(13.0)  # on the boundary: no penalty
    np.testing.assert_allclose(interval_score([5, 5], [10, 10], [4, 12], 0.5), [5 + 4 * 1, 5 + 4 * 2])
    np.testing.assert_array_equal(coverage([2, 2, 2], [15, 15, 15], [2, 15.5, 10]), [1.0, 0.0, 1.0])


# ------------------------------------------------------------------------ WIS
def test_wis_hand_computed():
    """Bracher et al. 2021, eq. 3, written out by hand.

    Levels 0.05, 0.25, 0.5, 0.75, 0.95 -> K = 2 central intervals:
    alpha_1 = 0.1 ([q05, q95] = [2, 15]), alpha_2 = 0.5 ([q25, q75] = [5, 10]); median m = 7.
    WIS = 1/(K + 1/2) * (1/2 |y - m| + alpha_1/2 IS_0.1 + alpha_2/2 IS_0.5), K + 1/2 = 2.5.
    """
    levels = [0.05, 0.25, 0.5, 0.75, 0.95]
    q = [2.0, 5.0, 7.0, 10.0, 15.0]
    # y = 16: IS_0.1 = 13 + 20*1 = 33; IS_0.5 = 5 + 4*6 = 29; median term 0.5*9 = 4.5
    #         (4.5 + 0.05*33 + 0.25*29) / 2.5 = (4.5 + 1.65 + 7.25) / 2.5 = 13.4 / 2.5 = 5.36
    assert weighted_interval_score(levels, q, 16.0) == pytest.approx(5.36)
    # y = 6: inside both: IS_0.1 = 13, IS_0.5 = 5; median term 0.5*1 = 0.5
    #         (0.5 + 0.65 + 1.25) / 2.5 = 2.4 / 2.5 = 0.96
    assert weighted_interval_score(levels, q, 6.0) == pytest.approx(0.96)
    # y = 0: IS_0.1 = 13 + 20*2 = 53; IS_0.5 = 5 + 4*5 = 25; median term 0.5*7 = 3.5
    #         (3.5 + 2.65 + 6.25) / 2.5 = 12.4 / 2.5 = 4.96
    assert weighted_interval_score(levels, q, 0.0) == pytest.approx(4.96)
    # vectorised over targets, levels in any order
    np.testing.assert_allclose(
        weighted_interval_score(levels[::-1], np.array(q[::-1])[:, None] * np.ones(3), [16.0, 6.0, 0.0]),
        [5.36, 0.96, 4.96],
    )
    # median only (K = 0): WIS = |y - m| (Bracher et al. 2021: the absolute error is the K = 0 case)
    assert weighted_interval_score([0.5], [7.0], 10.0) == pytest.approx(3.0)


def test_wis_equals_scaled_sum_of_quantile_losses():
    """Bracher et al. 2021: WIS = 1/(K + 1/2) * sum over all 2K+1 levels of the pinball loss
    rho_tau(y - q) = (tau - 1{y < q}) (y - q). Checked on random quantile sets at the 23 levels."""
    rng = np.random.default_rng(2021)
    levels = np.asarray(FORECAST_LEVELS)
    q = np.sort(rng.gamma(3.0, 10.0, size=(23, 400)), axis=0)
    y = rng.poisson(30.0, size=400).astype(float)
    pinball = np.sum((levels[:, None] - (y < q)) * (y - q), axis=0) / (11 + 0.5)
    np.testing.assert_allclose(weighted_interval_score(levels, q, y), pinball, rtol=1e-12)


def test_wis_approximates_crps_as_levels_grow():
    """Bracher et al. 2021: WIS approaches the CRPS as K grows (equally spaced levels).

    With levels tau_j = j/(2K+2), j = 1..2K+1, the pinball sum is a Riemann sum of
    CRPS = 2 int rho_tau dtau with (K+1) in front, so WIS/CRPS = (K+1)/(K+1/2) + O(1/K^2):
    the tolerance 1/K covers the 1/(2K+1) normalisation term with room for the quadrature error.
    The predictive is N(0, 1) with exact quantiles (scipy.stats.norm.ppf); CRPS is the closed form.
    """
    rel = []
    for k in (50, 200, 1000):
        levels = np.arange(1, 2 * k + 2) / (2 * k + 2)
        for y in (0.3, 2.5, -1.0):
            r = weighted_interval_score(levels, stats.norm.ppf(levels), y) / crps_normal(0.0, 1.0, y) - 1
            assert abs(r) < 1.0 / k, (k, y, r)
            rel.append(abs(r))
    assert rel[0] > rel[3] > rel[6]
    # the 23 epidemic-forecasting levels sit below the CRPS (about 9% at y = 0.3: printed, not asserted)
    r23 = weighted_interval_score(FORECAST_LEVELS, stats.norm.ppf(FORECAST_LEVELS), 0.3) / crps_normal(0, 1, 0.3)
    print(f"WIS/CRPS for N(0,1): K=50 {1 + rel[0]:.4f}, K=1000 {1 + rel[6]:.5f}, 23 levels {r23:.4f}")


def test_wis_rejects_asymmetric_levels():
    with pytest.raises(ValueError, match="symmetric"):
        weighted_interval_score([0.1, 0.5, 0.8], [1, 2, 3], 2)
    with pytest.raises(ValueError, match="median"):
        weighted_interval_score([0.1, 0.9], [1, 3], 2)


# ------------------------------------------------------------------ log score
def test_log_score_finite_for_unseen_counts_and_proper_pmf():
    """Smoothed pmf (M draws + one geometric pseudo-draw): finite everywhere, sums to 1."""
    zeros = np.zeros(500)
    s = log_score_from_samples(zeros, 10**9)
    assert np.isfinite(s) and s > 1e6
    draws = np.random.default_rng(1).poisson(20, size=1000)
    ys = np.arange(0, 5001)
    p = np.exp(-log_score_from_samples(draws[:, None], ys))  # draws (M, 1) broadcast against 5001 targets
    assert np.all(np.isfinite(p)) and np.all(p > 0)
    assert p.sum() == pytest.approx(1.0, abs=1e-12)  # geometric mean 21: tail beyond 5000 ~ (21/22)^5000
    # where draws are dense the smoothing changes little: half the draws at 3 -> p(3) ~ 0.5
    half = np.r_[np.full(5000, 3), np.full(5000, 9)]
    assert log_score_from_samples(half, 3) == pytest.approx(math.log(2), abs=1e-3)
    # unseen count scores worse than a seen one
    assert log_score_from_samples(half, 4) > log_score_from_samples(half, 3)


# ----------------------------------------------------------------------- bias
def test_bias_funk_2019():
    """Funk et al. 2019: B = 1 - (P(X <= y) + P(X <= y - 1)); +1 all above, -1 all below;
    for a Poisson(10) predictive it matches the exact cdf (scipy.stats.poisson) within MC error."""
    assert bias(np.array([5, 6, 7]), 2) == pytest.approx(1.0)
    assert bias(np.array([5, 6, 7]), 9) == pytest.approx(-1.0)
    assert bias(np.arange(10), 4) == pytest.approx(1 - (0.5 + 0.4))
    draws = np.random.default_rng(5).poisson(10, size=200_000)
    for y in (6, 10, 14):
        exact = 1 - (stats.poisson.cdf(y, 10) + stats.poisson.cdf(y - 1, 10))
        assert bias(draws, y) == pytest.approx(exact, abs=0.01)  # MC sd <= 2 * 0.5/sqrt(2e5) = 0.0022


# ---------------------------------------------------------------- ROC and AUC
def _mann_whitney_auc(p, o):
    p, o = np.asarray(p, float), np.asarray(o, bool)
    u = stats.mannwhitneyu(p[o], p[~o], alternative="two-sided").statistic  # U of the first sample (scipy >= 1.7)
    return u / (o.sum() * (~o).sum())


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_auc_equals_mann_whitney_u_including_ties(seed):
    """AUC = U / (n1 n0) with ties counting 1/2 (Mann & Whitney 1947; scipy.stats.mannwhitneyu)."""
    rng = np.random.default_rng(seed)
    o = rng.random(300) < 0.3
    p = np.clip(0.3 * o + rng.normal(0.35, 0.25, 300), 0, 1)
    assert auc(p, o) == pytest.approx(_mann_whitney_auc(p, o), abs=1e-12)
    tied = np.round(p, 1)  # heavy ties: 11 distinct values
    assert auc(tied, o) == pytest.approx(_mann_whitney_auc(tied, o), abs=1e-12)
    assert auc(np.full(300, 0.4), o) == pytest.approx(0.5)  # all tied: the diagonal


def test_auc_hand_case_and_roc_shape():
    # pairs (event, non-event): (0.4, 0.1) 1, (0.4, 0.4) 1/2, (0.9, 0.1) 1, (0.9, 0.4) 1 -> 3.5 / 4
    assert auc([0.1, 0.4, 0.4, 0.9], [0, 1, 0, 1]) == pytest.approx(0.875)
    rng = np.random.default_rng(9)
    o = rng.random(200) < 0.4
    p = np.round(rng.random(200), 2)
    fpr, tpr, thr = roc_curve(p, o)
    assert (fpr[0], tpr[0]) == (0.0, 0.0) and (fpr[-1], tpr[-1]) == (1.0, 1.0)
    assert np.all(np.diff(fpr) >= 0) and np.all(np.diff(tpr) >= 0)
    assert thr[0] == np.inf and np.all(np.diff(thr[1:]) < 0)
    # each point is the rule "alert when p >= threshold"
    for f, t, h in zip(fpr[1:], tpr[1:], thr[1:]):
        assert t == pytest.approx(np.mean(p[o] >= h)) and f == pytest.approx(np.mean(p[~o] >= h))
    with pytest.raises(ValueError, match="both outcomes"):
        auc([0.2, 0.3], [1, 1])
