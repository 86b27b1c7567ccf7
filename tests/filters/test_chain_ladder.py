"""The chain ladder (filters.chain_ladder) and the reporting triangle from vintages (filters.reporting_triangle).

Source of the method: T. Mack (1993), "Distribution-free calculation of the standard error of chain
ladder reserve estimates", ASTIN Bulletin 23(2):213-225 (volume-weighted development factors, the
variance parameters sigma^2_k with the rule for the last one, and the mean squared error of Theorem 3),
written from memory of the paper. The expected numbers below are worked out by hand from those
formulas, as fractions, without calling the code under test.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from filters import chain_ladder, chain_ladder_draws, reporting_triangle

NAN = math.nan


def test_chain_ladder_against_a_hand_computed_triangle():
    """Four periods, lags 0-3, cumulative counts (rows: periods, oldest first):

        10  20  25  25
        20  36  44   .
         8  18   .   .
         5   .   .   .

    By hand: f0 = (20+36+18)/(10+20+8) = 74/38 = 37/19; f1 = (25+44)/(20+36) = 69/56; f2 = 25/25 = 1.
    sigma0^2 = [10 (2 - 37/19)^2 + 20 (36/20 - 37/19)^2 + 8 (18/8 - 37/19)^2] / 2
             = [10 * 1 + 20 * 2.8^2 + 8 * 5.75^2] / 361 / 2 = 431.3 / 722 = 0.5973684;
    sigma1^2 = [20 (25/20 - 69/56)^2 + 36 (44/36 - 69/56)^2] / 1 = 20/3136 + 900/254016 = 5/504;
    sigma2^2 (one row: Mack's rule) = min(sigma1^4 / sigma0^2, sigma0^2, sigma1^2) = (5/504)^2 / 0.5973684.
    Nowcasts: 25; 44 * 1 = 44; 18 * 69/56 = 22.178571; 5 * 37/19 * 69/56 = 11.997180.
    Mean squared errors (Theorem 3), with S_k the column sums that estimated f_k (38, 56, 25):
      row 1: 44^2 sigma2^2 (1/44 + 1/25);
      row 2: U^2 [sigma1^2/f1^2 (1/18 + 1/56) + sigma2^2 (1/U + 1/25)], U = 18 f1;
      row 3: U^2 [sigma0^2/f0^2 (1/5 + 1/38) + sigma1^2/f1^2 (1/(5 f0) + 1/56) + sigma2^2 (1/U + 1/25)].
    Bugs caught: a plain mean of row ratios instead of volume weights, the estimation-error term
    (1/S_k) left out, the projected Chat[i, k] replaced by the latest count, off-by-one lags."""
    tri = np.array([[10, 20, 25, 25], [20, 36, 44, NAN], [8, 18, NAN, NAN], [5, NAN, NAN, NAN]], dtype=float)
    fit = chain_ladder(tri)
    f0, f1, f2 = 37 / 19, 69 / 56, 1.0
    s0 = 431.3 / 722
    s1 = 5 / 504
    s2 = s1**2 / s0
    assert fit.factors == pytest.approx([f0, f1, f2], rel=1e-12)
    assert fit.sigma2 == pytest.approx([s0, s1, s2], rel=1e-12)
    assert list(fit.rows) == [3, 2, 1]
    assert list(fit.latest_lag) == [3, 2, 1, 0] and list(fit.latest) == [25, 44, 18, 5]
    u2, u3 = 18 * f1, 5 * f0 * f1
    assert fit.ultimate == pytest.approx([25, 44, u2, u3], rel=1e-12)
    mse1 = 44**2 * s2 * (1 / 44 + 1 / 25)
    mse2 = u2**2 * (s1 / f1**2 * (1 / 18 + 1 / 56) + s2 * (1 / u2 + 1 / 25))
    mse3 = u3**2 * (s0 / f0**2 * (1 / 5 + 1 / 38) + s1 / f1**2 * (1 / (5 * f0) + 1 / 56) + s2 * (1 / u3 + 1 / 25))
    assert fit.mse == pytest.approx([0.0, mse1, mse2, mse3], rel=1e-12)
    # the decimals worked out by hand, as a check on the fractions above
    assert (u2, u3, mse3) == pytest.approx((22.178571, 11.997180, 5.247520), abs=1e-6)


def test_reporting_triangle_from_vintages_by_hand():
    """Three daily periods ending on days 10, 11, 12, cut as of day 13, lags 0-3. Vintages (period, as-of,
    total): p0 (9, 2) dated before the period ends counts from lag 0; (11, 5); (13, 9); p1 (12, 4);
    (13, 6); (20, 99) known after the cut, ignored; p2 none yet; p0 (14, 11) after the cut, ignored.
    By hand, carrying each vintage forward to later lags and blanking cells not known by day 13:
        p0: 2 5 5 9     (lags 0-3: days 10-13)
        p1: . 4 6 .     (lag 3 = day 14 > 13)
        p2: . . . .
    Bugs caught: no carry-forward (NaN holes), a vintage counted at the lag of its as-of instead of from
    it onward, vintages after the cut used (look-ahead), negative lags dropped."""
    ends = np.array([10, 11, 12])
    vp = np.array([0, 0, 0, 1, 1, 1, 0])
    va = np.array([9, 11, 13, 12, 13, 20, 14])
    vv = np.array([2, 5, 9, 4, 6, 99, 11])
    tri = reporting_triangle(ends, vp, va, vv, as_of=13, max_lag=3)
    want = np.array([[2, 5, 5, 9], [NAN, 4, 6, NAN], [NAN, NAN, NAN, NAN]])
    np.testing.assert_array_equal(tri, want)
    # a revision beyond max_lag lies outside the triangle
    tri = reporting_triangle(ends, np.array([0, 0]), np.array([10, 15]), np.array([3, 7]), as_of=30, max_lag=3)
    np.testing.assert_array_equal(tri[0], [3, 3, 3, 3])


def test_no_look_ahead_the_triangle_and_fit_at_a_date_ignore_every_later_vintage():
    """Random vintage sets (60 periods, daily, up to 25 vintages each, lags 0-14): the triangle and the
    chain-ladder fit as of day T are identical when every vintage known after T is removed, or changed
    arbitrarily. Bug caught: factors or latest counts read from vintages dated after the origin."""
    rng = np.random.default_rng(7)
    ends = np.arange(60)
    for trial in range(5):
        vp = rng.integers(0, 60, 1500)
        va = ends[vp] + rng.integers(-1, 25, vp.size)
        vv = rng.integers(0, 50, vp.size).astype(float)
        for cut in (20, 41, 59):
            full = reporting_triangle(ends, vp, va, vv, cut, 14)
            keep = va <= cut
            assert keep.sum() < vp.size  # positive control: some vintages are later than the cut
            past_only = reporting_triangle(ends, vp[keep], va[keep], vv[keep], cut, 14)
            noisy = vv.copy()
            noisy[~keep] = rng.integers(1000, 2000, (~keep).sum())
            altered = reporting_triangle(ends, vp, va, noisy, cut, 14)
            np.testing.assert_array_equal(full, past_only)
            np.testing.assert_array_equal(full, altered)
            a, b = chain_ladder(full), chain_ladder(altered)
            for name in ("factors", "sigma2", "latest", "ultimate", "mse"):
                np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
            # no cell beyond the cut is filled
            lag = np.arange(15)[None, :]
            assert np.all(np.isnan(full[ends[:, None] + lag > cut]))


def test_chain_ladder_draws_have_the_chain_ladder_mean_and_mack_variance():
    """The predictive of the eventual count: latest + negative binomial pending reports with mean
    U - latest and variance mse (gamma-Poisson mixture: Poisson(lambda), lambda ~ Gamma(k, mean/k) has
    variance mean + mean^2/k); Poisson when mse does not exceed the mean; a row reported as 0 stays 0.
    An erratic triangle [[10, 40, 40], [30, 45, .], [20, ., .]] gives, by hand, f0 = 85/40,
    sigma0^2 = 10 (4 - 2.125)^2 + 30 (1.5 - 2.125)^2 = 46.875, f1 = 1 and sigma1^2 = 46.875 (Mack's rule
    with one earlier value), so row 2 (U = 42.5, pending mean 22.5) has mse = 42.5^2 [46.875/2.125^2
    (1/20 + 1/40) + 46.875 (1/42.5 + 1/40)] = 5515.1: over-dispersed. Row 2 of the hand-computed
    triangle of the test above has mse 0.243 below its pending mean 4.18: Poisson.
    200 000 draws: mean and variance each within 5 of their standard errors (the variance's from the
    draws' fourth central moment, sqrt((m4 - s^4) / n), as the heavy tail of this negative binomial makes
    a fixed relative band meaningless). Bugs caught: Mack's mse taken as a standard deviation
    (variance 74 instead of 5515 for the erratic row), a Poisson where the triangle says over-dispersed."""
    erratic = chain_ladder(np.array([[10, 40, 40], [30, 45, NAN], [20, NAN, NAN]], dtype=float))
    assert erratic.mse[2] == pytest.approx(42.5**2 * (46.875 / 2.125**2 * (1 / 20 + 1 / 40) + 46.875 * (1 / 42.5 + 1 / 40)), rel=1e-12)
    calm = chain_ladder(np.array([[10, 20, 25, 25], [20, 36, 44, NAN], [8, 18, NAN, NAN], [0, NAN, NAN, NAN]], dtype=float))
    for fit, row, nb in ((erratic, 2, True), (calm, 2, False)):
        mean = fit.ultimate[row] - fit.latest[row]
        assert bool(fit.mse[row] > mean) is nb
        x = chain_ladder_draws(fit, np.array([row]), 200_000, np.random.default_rng(3))[:, 0] - fit.latest[row]
        var = max(fit.mse[row], mean)
        m4 = np.mean((x - x.mean()) ** 4)
        assert x.mean() == pytest.approx(mean, abs=5 * math.sqrt(var / x.size))
        assert x.var() == pytest.approx(var, abs=5 * math.sqrt((m4 - x.var() ** 2) / x.size))
        assert np.all(x >= 0) and np.all(x == np.rint(x))
    assert np.all(chain_ladder_draws(calm, np.array([3]), 1000, np.random.default_rng(4)) == 0)  # reported 0 stays 0


def test_factor_not_estimable_gives_no_nowcast():
    """Before any period has both lags of a factor known, rows that need it get no nowcast, and asking
    for their draws is an error (the backtest leaves such targets out for every method)."""
    tri = np.array([[3, 5, NAN], [4, NAN, NAN]], dtype=float)  # no row has lag 2 yet
    fit = chain_ladder(tri)
    assert np.isnan(fit.factors[1]) and np.isnan(fit.ultimate).all()
    with pytest.raises(ValueError, match="not estimable"):
        chain_ladder_draws(fit, np.array([0]), 10, np.random.default_rng(0))
