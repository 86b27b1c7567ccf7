"""Count-noise log-likelihoods and reporting-delay kernels against scipy.

References: ``scipy.stats.poisson``, ``scipy.stats.nbinom`` (size n = k,
success probability p = k / (k + mu), so the mean is mu and the variance
mu + mu^2 / k), ``scipy.stats.binom``; ``scipy.integrate.quad`` of the
``scipy.stats`` gamma / lognormal densities for the delay kernels.

Tolerances are floating-point ones (the functions and scipy evaluate the
same closed forms by different routes): relative 1e-9 unless stated.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import gammaln

from filters import CompartmentalModel, Observation, delay_kernel
from filters._observation import binomial_loglik, negbin_loglik, poisson_loglik
from schemas import example_model_path, load_model_spec

EPS = np.finfo(float).eps
COUNTS = [0.0, 1.0, 2.0, 5.0, 17.0, 1000.0, 123_456.0, 1e6]
MEANS = np.array([0.0, 1e-300, 1e-8, 0.01, 0.5, 1.0, 3.0, 17.0, 1e3, 1e6, 1e9])


def assert_same_logpmf(got: np.ndarray, want: np.ndarray, rtol: float = 1e-9) -> None:
    got, want = np.asarray(got, dtype=float), np.asarray(want, dtype=float)
    assert not np.isnan(got).any(), got
    assert got.shape == want.shape
    finite = np.isfinite(want)
    # Impossible outcomes are exactly -inf (not a huge negative number).
    np.testing.assert_array_equal(got[~finite], want[~finite])
    np.testing.assert_allclose(got[finite], want[finite], rtol=rtol, atol=rtol)


# ----------------------------------------------------------------- Poisson
@pytest.mark.parametrize("y", COUNTS)
def test_poisson_matches_scipy(y):
    assert_same_logpmf(poisson_loglik(y, MEANS), stats.poisson.logpmf(y, MEANS))


def test_poisson_zero_mean():
    mu = np.zeros(3)
    np.testing.assert_array_equal(poisson_loglik(0.0, mu), 0.0)
    for y in (1.0, 7.0, 1e6):
        out = poisson_loglik(y, mu)
        assert np.all(out == -np.inf) and not np.isnan(out).any()


# ------------------------------------------------------- negative binomial
# scipy's (n, p) form needs 1 - p = mu / (k + mu) to be representable; it
# loses accuracy once mu / k is below ~1e-8 (and gives -inf at p == 1). The
# scipy comparison therefore keeps mu / k >= 1e-6; smaller ratios are checked
# against closed-form limits below.
DISPERSIONS = [1e-3, 0.1, 0.5, 2.0, 10.0, 1e3]


@pytest.mark.parametrize("k", DISPERSIONS)
@pytest.mark.parametrize("y", COUNTS)
def test_negbin_matches_scipy(y, k):
    mu = MEANS[(MEANS == 0) | (MEANS / k >= 1e-6)]
    want = stats.nbinom.logpmf(y, k, k / (k + mu))
    assert_same_logpmf(negbin_loglik(y, mu, k), want)


def test_negbin_per_particle_dispersion():
    rng = np.random.default_rng(11)
    mu = rng.gamma(2.0, 20.0, size=200)
    k = rng.gamma(2.0, 5.0, size=200)
    for y in (0.0, 3.0, 40.0, 500.0):
        assert_same_logpmf(negbin_loglik(y, mu, k), stats.nbinom.logpmf(y, k, k / (k + mu)))


def test_negbin_zero_mean():
    mu = np.zeros(4)
    k = np.array([0.01, 1.0, 20.0, 1e6])
    np.testing.assert_array_equal(negbin_loglik(0.0, mu, k), 0.0)
    for y in (1.0, 7.0, 1e6):
        out = negbin_loglik(y, mu, k)
        assert np.all(out == -np.inf) and not np.isnan(out).any()


@pytest.mark.parametrize("k", [1e5, 1e6, 1e7, 1e8])
@pytest.mark.parametrize("y", [0.0, 1.0, 5.0, 50.0])
def test_negbin_large_dispersion_tends_to_poisson(y, k):
    """Expanding the pmf in 1/k (derived here from log Gamma(y+k) - log Gamma(k)
    = y log k + y(y-1)/(2k) + O(k^-2) and log(1 + mu/k) = mu/k - mu^2/(2k^2) + ...):
    log NB(y; mu, k) = log Poisson(y; mu) + ((y - mu)^2 - y) / (2k) + O(((1+y+mu)/k)^2 (1+y+mu)).
    Tolerance: that remainder plus the round-off of gammaln(y + k) - gammaln(k),
    about eps * k log k."""
    mu = np.array([1e-300, 1e-12, 1e-8, 0.5, 3.0, 20.0])
    want = stats.poisson.logpmf(y, mu) + ((y - mu) ** 2 - y) / (2 * k)
    tol = (1 + y + mu) ** 3 / k**2 + 8 * EPS * k * math.log(k)
    got = negbin_loglik(y, mu, k)
    assert np.all(np.abs(got - want) <= tol), (got - want, tol)


@pytest.mark.parametrize("k", [0.01, 1.0, 20.0])
@pytest.mark.parametrize("y", [1.0, 4.0, 100.0])
def test_negbin_tiny_mean_limit(y, k):
    """As mu -> 0 with k fixed, P(Y = y) = Gamma(y+k) / (Gamma(k) y!) (mu/k)^y (1 + O(mu)):
    the log-likelihood stays finite (a positive mean can explain any count)."""
    mu = np.array([1e-300, 1e-200, 1e-30])
    want = gammaln(y + k) - gammaln(k) - gammaln(y + 1) + y * (np.log(mu) - np.log(k))
    got = negbin_loglik(y, mu, k)
    assert np.all(np.isfinite(got))
    np.testing.assert_allclose(got, want, rtol=1e-12)


# ----------------------------------------------------------------- binomial
TRIALS = np.array([0, 1, 2, 10, 1000, 10**6])
PROBS = [0.0, 1e-12, 0.3, 0.5, 0.999, 1.0]


@pytest.mark.parametrize("p", PROBS)
@pytest.mark.parametrize("y", [0.0, 1.0, 2.0, 5.0, 1000.0, 1e6])
def test_binomial_matches_scipy(y, p):
    assert_same_logpmf(binomial_loglik(y, TRIALS, p), stats.binom.logpmf(y, TRIALS, p))


@pytest.mark.parametrize("y", [0.0, 1.0, 2.0, 5.0, 1000.0])
def test_binomial_closed_form_and_impossible_counts(y):
    """log C(n, y) + y log p + (n - y) log(1 - p) for y <= n; exactly -inf for y > n."""
    rng = np.random.default_rng(3)
    p = rng.uniform(0.01, 0.99, TRIALS.size)
    got = binomial_loglik(y, TRIALS, p)
    ok = TRIALS >= y
    n = TRIALS[ok].astype(float)
    want = gammaln(n + 1) - gammaln(y + 1) - gammaln(n - y + 1) + y * np.log(p[ok]) + (n - y) * np.log1p(-p[ok])
    np.testing.assert_allclose(got[ok], want, rtol=1e-9)
    assert np.all(got[~ok] == -np.inf), got[~ok]


def test_binomial_degenerate_probabilities():
    n = np.array([0, 3, 50])
    np.testing.assert_array_equal(binomial_loglik(0.0, n, 0.0), 0.0)
    assert np.all(binomial_loglik(1.0, n, 0.0) == -np.inf)
    np.testing.assert_array_equal(binomial_loglik(3.0, np.array([3]), 1.0), [0.0])
    assert np.all(binomial_loglik(2.0, np.array([3]), 1.0) == -np.inf)


# ------------------------------------------------------------- delay kernel
def _reference_kernel(dist: str, mean: float, sd: float, max_days: int) -> np.ndarray:
    """The documented rule evaluated by numerical integration of the density:
    day d takes [d - 0.5, d + 0.5), day 0 takes [0, 0.5), truncated at
    max_days + 0.5 and renormalised."""
    if dist == "gamma":
        frozen = stats.gamma(a=(mean / sd) ** 2, scale=sd**2 / mean)
    else:
        s2 = math.log(1 + (sd / mean) ** 2)  # lognormal with this mean and sd
        frozen = stats.lognorm(s=math.sqrt(s2), scale=math.exp(math.log(mean) - s2 / 2))
    assert math.isclose(frozen.mean(), mean, rel_tol=1e-12) and math.isclose(frozen.std(), sd, rel_tol=1e-12)
    mass = np.array(
        [
            integrate.quad(frozen.pdf, max(d - 0.5, 0.0), d + 0.5, epsabs=1e-14, epsrel=1e-12)[0]
            for d in range(max_days + 1)
        ]
    )
    return mass / mass.sum()


KERNEL_CASES = [
    ("gamma", 5.0, 2.0, 30),
    ("gamma", 2.5, 1.5, 7),  # the seir example's delay, truncated at 7 days
    ("gamma", 2.0, 1.2, 6),
    ("lognormal", 5.0, 2.0, 30),
    ("lognormal", 4.0, 3.0, 5),  # heavy truncation
    ("gamma", 10.0, 3.0, 1),
]


@pytest.mark.parametrize("dist,mean,sd,max_days", KERNEL_CASES)
def test_delay_kernel_shape_and_rule(dist, mean, sd, max_days):
    kernel = delay_kernel(dist, mean, sd, max_days)
    assert kernel.shape == (max_days + 1,)
    assert np.all(kernel >= 0)
    assert math.isclose(kernel.sum(), 1.0, rel_tol=0, abs_tol=1e-12)
    # Basis: quad's requested accuracy (1e-12 relative) after renormalisation.
    np.testing.assert_allclose(kernel, _reference_kernel(dist, mean, sd, max_days), rtol=1e-8, atol=1e-13)


@pytest.mark.parametrize("dist,mean,sd", [("gamma", 5.0, 2.0), ("gamma", 10.0, 3.0), ("lognormal", 5.0, 2.0)])
def test_delay_kernel_moments_match_continuous(dist, mean, sd):
    """Rounding a smooth density to the nearest day keeps the mean and adds
    1/12 to the variance (Sheppard 1898, "On the calculation of the most
    probable values of frequency-constants ..."; formula from memory). Cases
    with negligible mass beyond max_days and near 0. Tolerances chosen: 1e-3 day
    for the mean and 1e-2 day^2 for the variance; Sheppard's approximation
    error for densities this smooth on the one-day scale is far smaller."""
    max_days = 60
    d = np.arange(max_days + 1)
    kernel = delay_kernel(dist, mean, sd, max_days)
    m = kernel @ d
    v = kernel @ (d - m) ** 2
    assert abs(m - mean) < 1e-3, m
    assert abs(v - (sd**2 + 1 / 12)) < 1e-2, v


def test_delay_kernel_unknown_distribution():
    with pytest.raises(ValueError, match="gamma.*lognormal"):
        delay_kernel("weibull", 3.0, 1.0, 5)


# ------------------------------------------------ compartmental observation
def _advanced(name: str, n: int, days: int, seed: int):
    model = CompartmentalModel(load_model_spec(example_model_path(name)))
    rng = np.random.default_rng(seed)
    ps = model.initial(n, rng)
    model.advance(ps, 0, days, rng)
    return model, ps


def test_seir_negbin_loglik_matches_scipy_at_expected_means():
    model, ps = _advanced("seir", n=64, days=12, seed=5)
    spec = model.spec
    series = spec.series[0]
    assert series.name == "onsets" and series.noise.dist == "negbin" and series.noise.dispersion == "k"
    mu = model.expected(ps, "onsets")
    k = ps.params[:, model.param_names.index("k")]
    rho = ps.params[:, model.param_names.index("rho")]
    # expected() = rho * sum_d onsets(t - d) * kernel[d], history newest day first.
    kernel = delay_kernel(series.delay.dist, series.delay.mean, series.delay.sd, series.delay.max_days)
    onsets = ps.history[:, : kernel.size, 0, 0]
    np.testing.assert_allclose(mu, rho * (onsets @ kernel), rtol=1e-12)
    assert np.all(mu > 0)
    for y in (0, 1, int(np.median(mu)), int(5 * mu.max()) + 3):
        got = model.log_likelihood(ps, Observation(time=12, values={"onsets": float(y)}))
        assert_same_logpmf(got, stats.nbinom.logpmf(y, k, k / (k + mu)))


def test_two_band_series_add_and_missing_values_are_skipped():
    model, ps = _advanced("seir_two_band", n=40, days=10, seed=9)
    k = ps.params[:, model.param_names.index("k")]
    obs = {"ed_child": 4.0, "ed_adult": 11.0}
    want = sum(
        stats.nbinom.logpmf(y, k, k / (k + model.expected(ps, name))) for name, y in obs.items()
    )
    assert_same_logpmf(model.log_likelihood(ps, Observation(time=10, values=obs)), want)
    # A missing series (None) contributes nothing, not a zero count.
    only_child = model.log_likelihood(ps, Observation(time=10, values={"ed_child": 4.0, "ed_adult": None}))
    mu_child = model.expected(ps, "ed_child")
    assert_same_logpmf(only_child, stats.nbinom.logpmf(4, k, k / (k + mu_child)))
    nothing = model.log_likelihood(ps, Observation(time=10, values={"ed_adult": None}))
    np.testing.assert_array_equal(nothing, 0.0)


def test_sir_poisson_loglik_matches_scipy():
    model, ps = _advanced("sir", n=50, days=6, seed=2)
    # No delay, reporting fraction 0.5 of today's new infections.
    mu = 0.5 * ps.history[:, 0, 0, 0]
    np.testing.assert_allclose(model.expected(ps, "cases"), mu, rtol=1e-12)
    for y in (0, 2, 30):
        got = model.log_likelihood(ps, Observation(time=6, values={"cases": float(y)}))
        assert_same_logpmf(got, stats.poisson.logpmf(y, mu))
