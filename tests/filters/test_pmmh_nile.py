"""PMMH with a *noisy* likelihood against the exact posterior (Nile data).

The other PMMH checks (test_pmmh.py) use an exact likelihood (``particles=1`` on a model without
latent state), where PMMH is plain Metropolis-Hastings: they cannot tell correct pseudo-marginal
behaviour (the current state keeps the likelihood estimate it was accepted with) from a chain that
re-estimates the current state's likelihood at every iteration ("Monte Carlo within Metropolis"),
which targets a different, flatter distribution. Here the likelihood comes from a bootstrap
particle filter with 100 particles (sd of the log-likelihood estimate about 1.0), and the target
is known exactly:

- Model and data: the local-level model on the annual Nile flow at Aswan, 1871-1970 (Durbin &
  Koopman 2012, *Time Series Analysis by State Space Methods*, 2nd ed., ch. 2; data from Cobb
  1978, shipped with statsmodels as ``statsmodels.datasets.nile``), with unknown observation and
  level variances, log-normal priors chosen here, and the known x_0 ~ N(1000, 1e5) of
  test_kalman_reference.py.
- Exact posterior: prior x Kalman-filter likelihood on a grid of the two log-variances. The
  likelihood is the textbook prediction-error decomposition (Durbin & Koopman 2012, sections 2.2
  and 7.2, from memory), vectorised over the grid and cross-checked against statsmodels'
  ``UnobservedComponents`` Kalman filter at three grid points.
- Theory: PMMH with a non-negative unbiased likelihood estimate leaves the exact posterior
  invariant (Andrieu & Roberts 2009, "The pseudo-marginal approach for efficient Monte Carlo
  computations", Ann. Statist. 37; Andrieu, Doucet & Holenstein 2010, "Particle Markov chain
  Monte Carlo methods", JRSS B 72).

Checked on the log scale of each variance: posterior mean, sd and the 5 % and 95 % quantiles (the
90 % interval). Tolerances are Monte Carlo ones from the chains' own effective sample size (see
the test). Figures seen while writing this (seed 11, 4 chains x 1000 iterations, ESS about 200
per parameter): exact mean / sd / q05 / q95 of log obs_var 9.611 / 0.197 / 9.279 / 9.924, PMMH
9.602 / 0.194 / 9.283 / 9.905; of log level_var 7.288 / 0.704 / 6.082 / 8.398, PMMH 7.332 / 0.679
/ 6.276 / 8.410; every one within 1.8 standard errors. The bug "re-estimate the current state's
likelihood every iteration", injected into filters/_pmmh.py, gave log obs_var sd 0.248 (7.2
standard errors out), q05 9.172 (4.4) and log level_var sd 0.829 (4.9): the test fails on it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.datasets import nile

from filters import CalibrationParameter, CalibrationSettings, Observation, ParticleSet, calibrate
from schemas import LogNormal

X0_MEAN, X0_VAR = 1000.0, 1.0e5  # known prior of x_0 (chosen, as in test_kalman_reference.py)
# Priors chosen here, broad around the published ML estimates (15099, 1469.1; Durbin & Koopman 2012).
OBS_PRIOR = LogNormal(dist="lognormal", mean_log=9.5, sd_log=1.0)
LEVEL_PRIOR = LogNormal(dist="lognormal", mean_log=7.5, sd_log=1.5)
PARAMS = [
    CalibrationParameter("obs_var", 0, OBS_PRIOR, "log", (0.0, math.inf)),
    CalibrationParameter("level_var", 1, LEVEL_PRIOR, "log", (0.0, math.inf)),
]
GRID = (np.linspace(7.0, 12.0, 301), np.linspace(0.0, 12.0, 481))  # log obs_var, log level_var


def nile_flow() -> np.ndarray:
    y = nile.load_pandas().data["volume"].to_numpy(dtype=float)
    assert y.shape == (100,)
    return y


class NileLocalLevel:
    """x_t = x_{t-1} + N(0, level_var), y_t = x_t + N(0, obs_var); the two variances are the
    particles' parameter columns (0: obs_var, 1: level_var), so PMMH can set them."""

    def fingerprint(self) -> str:
        return "nile-local-level-test"

    def initial(self, n, rng):
        x = rng.normal(X0_MEAN, math.sqrt(X0_VAR), size=(n, 1))
        return ParticleSet(states=x, params=np.zeros((n, 2)), history=np.zeros((n, 0)))

    def advance(self, particles, t0, t1, rng):
        sd = np.sqrt(particles.params[:, 1])[:, None]
        for _ in range(t0, t1):
            particles.states += sd * rng.standard_normal(particles.states.shape)

    def check_observation(self, observation):
        pass

    def log_likelihood(self, particles, observation):
        var = particles.params[:, 0]
        r = observation.values["y"] - particles.states[:, 0]
        return -0.5 * (np.log(2 * np.pi * var) + r * r / var)

    def describe(self, particles, t=0.0):
        return {"level": particles.states[:, 0]}


def kalman_loglik(y: np.ndarray, obs_var: np.ndarray, level_var: np.ndarray) -> np.ndarray:
    """Exact log p(y | variances), elementwise over arrays of variances (Durbin & Koopman 2012,
    local-level filter of section 2.2, prediction-error decomposition of section 7.2). The first
    observation is of x_1 = x_0 + eta_1, so a_1 = m0 and P_1 = v0 + level_var."""
    a = np.full(np.broadcast(obs_var, level_var).shape, X0_MEAN)
    p = X0_VAR + level_var + np.zeros_like(a)
    total = np.zeros_like(a)
    for obs in y:
        f = p + obs_var
        v = obs - a
        total += -0.5 * (np.log(2 * np.pi * f) + v * v / f)
        k = p / f
        a, p = a + k * v, p * (1 - k) + level_var
    return total


def statsmodels_loglik(y: np.ndarray, obs_var: float, level_var: float) -> float:
    mod = sm.tsa.UnobservedComponents(y, level="local level")
    assert mod.param_names == ["sigma2.irregular", "sigma2.level"]
    mod.initialize_known(np.array([X0_MEAN]), np.array([[X0_VAR + level_var]]))
    mod.loglikelihood_burn = 0  # a known prior: every observation counts
    return float(mod.loglike(np.array([obs_var, level_var])))


def exact_marginals(y: np.ndarray) -> list[dict[str, float]]:
    """Mean, sd, 5 % and 95 % quantiles and the density at those quantiles, for each log-variance,
    from prior x Kalman likelihood on the grid (the log-normal priors are normal on this scale)."""
    ue, uh = np.meshgrid(*GRID, indexing="ij")
    log_post = (kalman_loglik(y, np.exp(ue), np.exp(uh))
                + stats.norm.logpdf(ue, OBS_PRIOR.mean_log, OBS_PRIOR.sd_log)
                + stats.norm.logpdf(uh, LEVEL_PRIOR.mean_log, LEVEL_PRIOR.sd_log))
    w = np.exp(log_post - log_post.max())
    w /= w.sum()
    out = []
    for axis, grid in ((1, GRID[0]), (0, GRID[1])):
        marginal = w.sum(axis=axis)
        assert marginal[0] < 1e-8 and marginal[-1] < 1e-8, "the grid cuts off posterior mass"
        step = grid[1] - grid[0]
        cdf = np.cumsum(marginal) - marginal / 2  # mid-cell cumulative mass
        mean = float(marginal @ grid)
        q05, q95 = np.interp([0.05, 0.95], cdf, grid)
        out.append({
            "mean": mean,
            "sd": math.sqrt(float(marginal @ (grid - mean) ** 2)),
            "q05": float(q05),
            "q95": float(q95),
            "f05": float(np.interp(q05, grid, marginal / step)),
            "f95": float(np.interp(q95, grid, marginal / step)),
        })
    return out


def test_vectorised_kalman_likelihood_matches_statsmodels():
    y = nile_flow()
    for obs_var, level_var in ((15099.0, 1469.1), (4000.0, 50.0), (60000.0, 20000.0)):
        want = statsmodels_loglik(y, obs_var, level_var)
        assert kalman_loglik(y, np.array(obs_var), np.array(level_var)) == pytest.approx(want, abs=1e-7), (obs_var, level_var)


@pytest.mark.slow  # 20-30 s: 4 chains x 1000 particle-filter likelihoods of 100 steps each
def test_pmmh_with_a_particle_filter_likelihood_targets_the_exact_posterior():
    y = nile_flow()
    exact = exact_marginals(y)
    obs = [Observation(t, {"y": float(v)}) for t, v in enumerate(y, start=1)]
    settings = CalibrationSettings(particles=100, iterations=1000, burn_in=200, chains=4, seed=11, noise_repeats=10)
    result = calibrate(NileLocalLevel(), obs, settings, parameters=PARAMS)
    # The likelihood really is noisy (otherwise this would repeat test_pmmh.py's exact case).
    assert result.noise is not None and 0.6 < result.noise.sd < 1.6, result.noise
    assert np.all(result.rhat < 1.05), result.rhat
    draws = result.draws_unconstrained.reshape(-1, 2)
    ess = result.ess
    # 16 two-sided comparisons (2 parameters x mean, sd, q05, q95): Bonferroni at family-wise 1e-3
    # gives z = 3.84. Standard errors from the chains' own ESS (about 200 here): sd / sqrt(ESS) for
    # a mean, sd / sqrt(2 ESS) for an sd (normal approximation), sqrt(p (1 - p) / ESS) / f(q) for
    # a quantile. With ESS 200 the sd of log obs_var is checked to +-0.038 around 0.197: a chain
    # that re-estimates the current likelihood (sd 0.248, +26 %) is 5 or more standard errors out.
    z = stats.norm.isf(1e-3 / 16 / 2)
    report = []
    for k, ref in enumerate(exact):
        x = draws[:, k]
        got = {"mean": x.mean(), "sd": x.std(ddof=1), "q05": np.quantile(x, 0.05), "q95": np.quantile(x, 0.95)}
        se = {
            "mean": ref["sd"] / math.sqrt(ess[k]),
            "sd": ref["sd"] / math.sqrt(2 * ess[k]),
            "q05": math.sqrt(0.05 * 0.95 / ess[k]) / ref["f05"],
            "q95": math.sqrt(0.05 * 0.95 / ess[k]) / ref["f95"],
        }
        for name in got:
            report.append((PARAMS[k].name, name, round(float(got[name]), 4), round(ref[name], 4),
                           round((got[name] - ref[name]) / se[name], 2)))
    print("(parameter, statistic, PMMH, exact, standard errors off):", report, "ESS", ess)
    assert all(abs(r[-1]) <= z for r in report), report
