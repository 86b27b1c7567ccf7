"""Log-space weight arithmetic against scipy.special.logsumexp and Kish's ESS.

Kish (1965), *Survey Sampling*: effective sample size (sum w)^2 / sum w^2,
which is 1 / sum w^2 for normalised weights; n for equal weights, 1 when one
particle has all the weight.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import logsumexp

from filters import effective_sample_size, log_sum_exp, normalised_weights


def test_all_minus_inf_gives_minus_inf():
    assert log_sum_exp(np.full(5, -np.inf)) == -np.inf
    assert log_sum_exp(np.array([-np.inf])) == -np.inf


def test_plus_inf_dominates():
    assert log_sum_exp(np.array([0.0, np.inf, -np.inf])) == np.inf
    assert logsumexp(np.array([0.0, np.inf, -np.inf])) == np.inf  # the reference agrees


@pytest.mark.parametrize("scale", [1.0, 1e3, 1e6, 1e300])
def test_huge_values_are_stable(scale):
    x = np.array([scale, scale, scale - 1.0, -scale])
    got = log_sum_exp(x)
    assert math.isfinite(got)
    assert math.isclose(got, float(logsumexp(x)), rel_tol=1e-15)
    # Shift invariance: log_sum_exp(x + c) = log_sum_exp(x) + c, exactly in exact arithmetic.
    y = np.array([0.0, 0.0, -1.0])
    assert math.isclose(log_sum_exp(y + 1000.0), log_sum_exp(y) + 1000.0, rel_tol=1e-15)
    assert math.isclose(log_sum_exp(y - 1e5), log_sum_exp(y) - 1e5, rel_tol=1e-15)


def test_known_values():
    assert math.isclose(log_sum_exp(np.array([1000.0, 1000.0])), 1000.0 + math.log(2.0), rel_tol=1e-15)
    assert math.isclose(log_sum_exp(np.array([-1000.0, -1000.0])), -1000.0 + math.log(2.0), rel_tol=1e-15)
    assert math.isclose(log_sum_exp(np.log(np.array([0.2, 0.3, 0.5]))), 0.0, abs_tol=1e-15)


def test_matches_scipy_on_random_arrays():
    rng = np.random.default_rng(42)
    for _ in range(200):
        n = int(rng.integers(1, 500))
        x = rng.normal(rng.normal(0, 300), rng.exponential(50), size=n)
        x[rng.random(n) < 0.1] = -np.inf
        if np.all(x == -np.inf):
            x[0] = 0.0
        np.testing.assert_allclose(log_sum_exp(x), logsumexp(x), rtol=1e-13, atol=1e-13)


def test_normalised_weights_refuses_zero_total():
    with pytest.raises(ValueError, match="-inf"):
        normalised_weights(np.full(3, -np.inf))


def test_ess_equal_weights_is_n():
    for n in (1, 2, 10, 12345):
        assert math.isclose(effective_sample_size(np.full(n, 1.0 / n)), n, rel_tol=1e-12)


def test_ess_one_hot_is_one():
    w = np.zeros(100)
    w[37] = 1.0
    assert effective_sample_size(w) == 1.0


def test_ess_matches_kish_formula():
    rng = np.random.default_rng(8)
    for _ in range(50):
        raw = rng.gamma(0.3, size=int(rng.integers(2, 300)))
        w = raw / raw.sum()
        kish = raw.sum() ** 2 / np.sum(raw**2)
        ess = effective_sample_size(w)
        assert math.isclose(ess, kish, rel_tol=1e-12)
        assert 1.0 - 1e-12 <= ess <= w.size + 1e-9
