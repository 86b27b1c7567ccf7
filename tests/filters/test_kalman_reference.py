"""The particle filter against the exact Kalman filter on the Nile data.

Model: the local-level model of Durbin & Koopman (2012), *Time Series Analysis
by State Space Methods*, 2nd ed., chapter 2, fitted there to the annual flow
of the Nile at Aswan, 1871-1970 (Cobb 1978; the data ship with statsmodels as
``statsmodels.datasets.nile``), with their maximum-likelihood variances
sigma^2_eps = 15099 (observation) and sigma^2_eta = 1469.1 (level).

The two variances are the book's published estimates (quoted from memory);
``test_published_variances_are_the_ml_estimates`` confirms them against a
maximum-likelihood fit in statsmodels with an exact diffuse prior, which gives
(15103.4, 1467.5).

Reference: the exact Kalman filter in statsmodels
(``UnobservedComponents(level='local level')`` with a *known* initial state),
cross-checked against the textbook recursions written out below (Durbin &
Koopman 2012, section 2.2, the local-level Kalman filter, and the
prediction-error decomposition of the log-likelihood, section 7.2; section
numbers from memory).

Matching the two set-ups: ``LocalLevelModel.initial`` draws x_0 ~ N(m0, v0) and
the filter's cloud starts at day 0; the first observation has ``time=1``, so
``ParticleFilter.step`` first calls ``predict(1)``, which advances once:
x_1 = x_0 + eta_1 ~ N(m0, v0 + sigma^2_eta). statsmodels' convention is
alpha_1 ~ N(a_1, P_1) for the state of the first observation, so the Kalman
filter is initialised with a_1 = m0 and P_1 = v0 + sigma^2_eta.

Tolerances are Monte Carlo ones computed in the test from R independent runs
(different seeds); only the family-wise error level (1e-3) is chosen:

* log-likelihood: by the log-normal CLT for particle estimates of the
  normalising constant (Berard, Del Moral & Doucet 2014, "A lognormal central
  limit theorem for particle approximations of normalizing constants",
  Electron. J. Probab.; citation from memory),
  log Z_hat ~ N(log Z - s^2/2, s^2) with s^2 = O(1/N); the mean over R runs is
  tested against log Z - s^2/2 with a Student-t bound, and the O(1/N) scaling
  of s^2 is tested with an F bound between N=2000 and N=20000.
* filtered means and quantiles: per time step, the mean over R runs is tested
  against the Kalman value with a Student-t bound, Bonferroni-corrected over the
  100 steps (family-wise error 1e-3).
* the ESS-based standard error sd_t / sqrt(ESS_t) is checked for its typical
  size only (see ``test_ess_based_standard_error_is_the_right_size``).

Figures seen while writing this test (N = 20000, 10 runs): PF minus Kalman
log-likelihood mean -0.010, sd 0.083 (Kalman llf -639.307); at N = 2000 the
sd is 0.18.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import statsmodels.api as sm
from statsmodels.datasets import nile

from filters import FilterConfig, LocalLevelModel, Observation, ParticleFilter

# Durbin & Koopman (2012), ch. 2: ML estimates for the Nile data (from memory).
OBS_VAR = 15099.0
LEVEL_VAR = 1469.1
# A proper (known) prior for x_0, broad compared with the observation sd (~123),
# standing in for the book's diffuse prior; chosen, not published.
X0_MEAN = 1000.0
X0_VAR = 1.0e5
P1 = X0_VAR + LEVEL_VAR  # prior variance of x_1, the first observed level

N_BIG = 20_000
N_SMALL = 2_000
REPLICATES = 10  # runs at N_BIG (about 0.5-1 s each)
SMALL_REPLICATES = 40  # runs at N_SMALL (cheap; they sharpen the F test)
FAMILY_ALPHA = 1e-3
PROBS = (0.05, 0.5, 0.95)


def nile_flow() -> np.ndarray:
    y = nile.load_pandas().data["volume"].to_numpy(dtype=float)
    assert y.shape == (100,)
    return y


def statsmodels_kalman(y: np.ndarray):
    mod = sm.tsa.UnobservedComponents(y, level="local level")
    assert mod.param_names == ["sigma2.irregular", "sigma2.level"]
    mod.initialize_known(np.array([X0_MEAN]), np.array([[P1]]))
    mod.loglikelihood_burn = 0  # a known prior: every observation counts
    return mod.filter(np.array([OBS_VAR, LEVEL_VAR]))


def textbook_kalman(y: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """Durbin & Koopman (2012) local-level Kalman filter (section 2.2) and
    prediction-error decomposition of the log-likelihood (section 7.2):
    v = y - a, F = P + s2_eps, K = P / F, a_t|t = a + K v, P_t|t = P (1 - K),
    a_t+1 = a_t|t, P_t+1 = P_t|t + s2_eta, log L = -1/2 sum(log 2 pi + log F + v^2 / F)."""
    a, p = X0_MEAN, P1
    loglik, means, variances = 0.0, [], []
    for obs in y:
        v, f = obs - a, p + OBS_VAR
        k = p / f
        a_f, p_f = a + k * v, p * (1 - k)
        loglik += -0.5 * (np.log(2 * np.pi) + np.log(f) + v * v / f)
        means.append(a_f)
        variances.append(p_f)
        a, p = a_f, p_f + LEVEL_VAR
    return loglik, np.array(means), np.array(variances)


def run_particle_filter(y: np.ndarray, n: int, rng: np.random.Generator, with_summary: bool = True):
    model = LocalLevelModel(state_var=LEVEL_VAR, obs_var=OBS_VAR, initial_mean=X0_MEAN, initial_var=X0_VAR)
    pf = ParticleFilter(model, FilterConfig(n_particles=n, summary_probs=PROBS), rng)
    assert pf.time == 0
    means, quants, ess, increments = [], [], [], []
    for t, value in enumerate(y, start=1):
        result = pf.step(Observation(time=t, values={"y": float(value)}), with_summary=with_summary)
        assert result.time == t and not result.collapsed
        if with_summary:
            mean, q = result.summary.get("level")
            means.append(mean)
            quants.append([q[p] for p in PROBS])
        ess.append(result.ess)
        increments.append(result.log_evidence_increment)
    # The running total equals the sum of the per-step increments.
    np.testing.assert_allclose(pf.log_evidence, np.sum(increments), rtol=0, atol=1e-9)
    return pf.log_evidence, np.array(means), np.array(quants), np.array(ess)


@pytest.fixture(scope="module")
def reference():
    y = nile_flow()
    return y, statsmodels_kalman(y)


@pytest.fixture(scope="module")
def runs(reference):
    y, _ = reference
    seeds = np.random.SeedSequence(20120501).spawn(REPLICATES + SMALL_REPLICATES)
    big = [run_particle_filter(y, N_BIG, np.random.default_rng(s)) for s in seeds[:REPLICATES]]
    small = [
        run_particle_filter(y, N_SMALL, np.random.default_rng(s), with_summary=False)[0] for s in seeds[REPLICATES:]
    ]
    return {
        "loglik": np.array([r[0] for r in big]),
        "means": np.array([r[1] for r in big]),  # (R, T)
        "quantiles": np.array([r[2] for r in big]),  # (R, T, len(PROBS))
        "ess": np.array([r[3] for r in big]),  # (R, T)
        "loglik_small": np.array(small),
    }


def test_statsmodels_set_up_is_the_textbook_kalman_filter(reference):
    """Guards the reference itself: statsmodels with a known prior reproduces
    the hand-written recursions of Durbin & Koopman (2012)."""
    y, res = reference
    loglik, means, variances = textbook_kalman(y)
    np.testing.assert_allclose(res.llf, loglik, rtol=1e-10)
    np.testing.assert_allclose(res.filtered_state[0], means, rtol=1e-10)
    np.testing.assert_allclose(res.filtered_state_cov[0, 0], variances, rtol=1e-8)


def test_published_variances_are_the_ml_estimates(reference):
    """Guards the quoted numbers and the data: statsmodels' ML fit with the
    book's exact diffuse prior lands within 1% of 15099 and 1469.1 (1% chosen:
    optimiser tolerance on a flat likelihood surface)."""
    y, _ = reference
    mod = sm.tsa.UnobservedComponents(y, level="local level", use_exact_diffuse=True)
    fit = mod.fit(disp=False, start_params=[10_000.0, 1_000.0])
    np.testing.assert_allclose(fit.params, [OBS_VAR, LEVEL_VAR], rtol=0.01)


@pytest.mark.slow
def test_log_likelihood_matches_kalman(reference, runs):
    _, res = reference
    diff = runs["loglik"] - res.llf
    r = diff.size
    s = diff.std(ddof=1)
    # Lognormal CLT (Berard, Del Moral & Doucet 2014): E[log Z_hat] = log Z - s^2/2.
    bound = stats.t.ppf(1 - FAMILY_ALPHA / 2, r - 1) * s / np.sqrt(r)
    assert abs(diff.mean() + s**2 / 2) <= bound, (
        f"PF log-likelihood minus Kalman: mean {diff.mean():.4f}, sd {s:.4f} over {r} runs "
        f"(Kalman llf {res.llf:.4f}); allowed |mean + sd^2/2| <= {bound:.4f}"
    )
    # Every single run is within a t prediction bound of the Kalman value too.
    pred = stats.t.ppf(1 - FAMILY_ALPHA / (2 * r), r - 1) * s * np.sqrt(1 + 1 / r)
    assert np.all(np.abs(diff + s**2 / 2) <= pred), (diff, pred)


@pytest.mark.slow
def test_log_likelihood_variance_scales_as_one_over_n(reference, runs):
    """Var(log Z_hat) = O(1/N) (Berard, Del Moral & Doucet 2014): ten times the
    particles, a tenth of the variance, within an F(R_small-1, R-1) band."""
    _, res = reference
    var_small = np.var(runs["loglik_small"] - res.llf, ddof=1)
    var_big = np.var(runs["loglik"] - res.llf, ddof=1)
    ratio = (var_small / var_big) / (N_BIG / N_SMALL)
    dfn, dfd = runs["loglik_small"].size - 1, runs["loglik"].size - 1
    lo = stats.f.ppf(FAMILY_ALPHA / 2, dfn, dfd)
    hi = stats.f.ppf(1 - FAMILY_ALPHA / 2, dfn, dfd)
    assert lo <= ratio <= hi, (var_small, var_big, ratio, lo, hi)


@pytest.mark.slow
def test_filtered_means_match_kalman_at_every_step(reference, runs):
    _, res = reference
    exact = res.filtered_state[0]
    err = runs["means"] - exact  # (R, T)
    r, steps = err.shape
    mcse = err.std(axis=0, ddof=1) / np.sqrt(r)
    k = stats.t.ppf(1 - FAMILY_ALPHA / (2 * steps), r - 1)
    z = err.mean(axis=0) / mcse
    worst = int(np.argmax(np.abs(z)))
    assert np.all(np.abs(z) <= k), (
        f"year {1871 + worst}: PF mean {runs['means'][:, worst].mean():.2f} vs Kalman {exact[worst]:.2f}, "
        f"MC standard error {mcse[worst]:.3f}, |t| = {abs(z[worst]):.2f} > {k:.2f}"
    )


@pytest.mark.slow
def test_ess_based_standard_error_is_the_right_size(reference, runs):
    """The one-step standard error sd_t / sqrt(ESS_t) (Kong, Liu & Wong 1994;
    Kish's ESS) is the scale the service reports. Across steps, the typical
    spread of the filtered mean over independent runs must be of that size:
    the median over steps of (RMS error over runs) / (RMS of sd_t/sqrt(ESS_t))
    must lie in [0.5, 2] (factors chosen; observed about 1.0).

    Not asserted step by step: the ESS at step t ignores degeneracy inherited
    from earlier steps (Chopin 2004: the asymptotic variance accumulates over
    time), and after the run of surprising years around 1899-1904 (the drop in
    the Nile's flow, Cobb 1978) the ESS-based standard error understates the
    actual Monte Carlo error by a factor of up to about 3 in 30 exploratory runs,
    so single-run errors of 8-9 such standard errors occur there. The per-step
    check is therefore made with the replicate-based standard error above."""
    _, res = reference
    sd_kalman = np.sqrt(res.filtered_state_cov[0, 0])
    ess_se = sd_kalman / np.sqrt(runs["ess"])  # (R, T)
    err = runs["means"] - res.filtered_state[0]
    ratio = np.sqrt((err**2).mean(axis=0)) / np.sqrt((ess_se**2).mean(axis=0))
    med = float(np.median(ratio))
    assert 0.5 <= med <= 2.0, f"median spread / ESS-based s.e. = {med:.3f}"


@pytest.mark.slow
def test_filtered_quantiles_match_kalman(reference, runs):
    """The filtered distribution is N(a_t|t, P_t|t); the weighted quantiles in the
    published summary match the normal quantiles (scipy.stats.norm.ppf)."""
    _, res = reference
    mean, sd = res.filtered_state[0], np.sqrt(res.filtered_state_cov[0, 0])
    r = runs["quantiles"].shape[0]
    steps = mean.size
    k = stats.t.ppf(1 - FAMILY_ALPHA / (2 * steps * len(PROBS)), r - 1)
    for j, p in enumerate(PROBS):
        exact = stats.norm.ppf(p, loc=mean, scale=sd)
        err = runs["quantiles"][:, :, j] - exact
        mcse = err.std(axis=0, ddof=1) / np.sqrt(r)
        z = err.mean(axis=0) / mcse
        assert np.all(np.abs(z) <= k), (p, float(np.max(np.abs(z))), k)
