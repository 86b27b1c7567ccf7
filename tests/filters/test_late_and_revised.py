"""Late and revised values against exact likelihoods.

* Arrival order does not matter: on the linear-Gaussian local-level model,
  observations delivered shuffled inside the assimilation window give a summed
  log-evidence equal to the exact Kalman-filter log-likelihood of the ordered
  data (statsmodels; Durbin & Koopman 2012, section 7.2): the joint likelihood of
  conditionally independent observations does not depend on their arrival order.
* Exact forward algorithm (Rabiner 1989, "A tutorial on hidden Markov models",
  the forward recursion) on a closed chain-binomial SIR of 40 people with one
  sub-step a day, a finite state space (S, I). The filter's log-evidence must
  agree, first for final counts, then for the same counts delivered as
  revisions: Poisson thinning (Kingman 1993, *Poisson Processes*, section 5.1)
  makes the two increments of a count independent Poisson variables, so their
  joint log-likelihood is the final count's plus sum log Binomial(a; y, F), a
  constant computed here.

Tolerances: the particle filter's likelihood estimate Z is unbiased, so log Z
has mean log Z_true - s^2/2 to first order (delta method, common practice),
with s the spread of log Z over replicates; each check allows that shift plus
4 standard errors of the replicate mean (a false alarm rate below 1e-4 under
normality).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.datasets import nile

from filters import CompartmentalModel, FilterConfig, LocalLevelModel, ParticleFilter, Report, reporting_cdf, simulate_season
from schemas import load_model_spec

SPECS = Path(__file__).parent / "specs"

# Durbin & Koopman (2012), ch. 2: ML variances for the Nile data (from memory), as in test_kalman_reference.py.
OBS_VAR, LEVEL_VAR = 15099.0, 1469.1
X0_MEAN, X0_VAR = 1000.0, 1.0e5


def _agrees(estimates: list[float], exact: float) -> tuple[bool, str]:
    est = np.asarray(estimates)
    s = est.std(ddof=1)
    shift = -0.5 * s * s
    tol = 4 * s / np.sqrt(est.size) + 1e-9
    gap = est.mean() - (exact + shift)
    return abs(gap) <= tol, f"mean {est.mean():.4f}, exact {exact:.4f}, shift {shift:.4f}, gap {gap:.4f}, tol {tol:.4f}"


# --------------------------------------------------------------- order free
def test_shuffled_arrival_inside_the_window_matches_the_kalman_likelihood():
    y = nile.load_pandas().data["volume"].to_numpy(dtype=float)[:40]
    mod = sm.tsa.UnobservedComponents(y, level="local level")
    mod.initialize_known(np.array([X0_MEAN]), np.array([[X0_VAR + LEVEL_VAR]]))
    mod.loglikelihood_burn = 0
    exact = float(mod.loglike(np.array([OBS_VAR, LEVEL_VAR])))
    model = LocalLevelModel(LEVEL_VAR, OBS_VAR, X0_MEAN, X0_VAR, window_days=4)
    order_rng = np.random.default_rng(3)
    estimates, moved_back = [], 0
    for seed in range(8):
        pf = ParticleFilter(model, FilterConfig(n_particles=10_000), np.random.default_rng(seed))
        order = []
        for start in range(0, y.size, 4):  # blocks of 4 days, each delivered in a random order
            block = list(range(start, min(start + 4, y.size)))
            order_rng.shuffle(block)
            order += block
        for i in order:
            moved_back += int(i + 1 < pf.time)
            pf.assimilate(i + 1, [Report("y", i + 1, float(y[i]))], with_summary=False)
        assert pf.time == y.size
        estimates.append(pf.log_evidence)
    assert moved_back > 20  # many values really arrived after the cloud had passed their day
    ok, text = _agrees(estimates, exact)
    assert ok, text


def test_a_value_outside_the_window_is_refused():
    model = LocalLevelModel(LEVEL_VAR, OBS_VAR, X0_MEAN, X0_VAR, window_days=2)
    pf = ParticleFilter(model, FilterConfig(n_particles=50), np.random.default_rng(1))
    pf.assimilate(5, [Report("y", 5, 1000.0)])
    with pytest.raises(ValueError, match="outside the window of 2 days"):
        pf.assimilate(5, [Report("y", 2, 1000.0)])


# ------------------------------------------------------- forward algorithm
def _tiny() -> CompartmentalModel:
    return CompartmentalModel(load_model_spec(SPECS / "sir_tiny.toml"))


def _forward(y: np.ndarray, n: int = 40, i0: int = 3, beta: float = 1.2, gamma: float = 0.4, rho: float = 0.7) -> float:
    """Exact log-likelihood of daily counts y_t ~ Poisson(rho * new infections on day t)."""
    alpha = np.zeros((n + 1, n + 1))  # alpha[S, I]
    alpha[n - i0, i0] = 1.0
    p_rec = 1 - np.exp(-gamma)
    loglik = 0.0
    for obs in y:
        new = np.zeros_like(alpha)
        for s, i in zip(*np.nonzero(alpha)):
            p_inf = 1 - np.exp(-beta * i / n)
            inf = np.arange(s + 1)
            rec = np.arange(i + 1)
            w = alpha[s, i] * stats.binom.pmf(inf, s, p_inf) * stats.poisson.pmf(obs, rho * inf)
            joint = np.outer(w, stats.binom.pmf(rec, i, p_rec))  # (inf, rec)
            for k in range(s + 1):
                if w[k] > 0:
                    np.add.at(new, (s - k, i + k - rec), joint[k])
        total = new.sum()
        loglik += np.log(total)
        alpha = new / total
    return float(loglik)


@pytest.fixture(scope="module")
def tiny_season():
    model = _tiny()
    season = simulate_season(model, 18, np.random.default_rng(2024))
    y = np.array([o.values["cases"] for o in season.observations])
    assert y.sum() >= 10, "the simulated outbreak should take off (seed chosen so it does)"
    return y, _forward(y)


def test_final_counts_match_the_forward_algorithm(tiny_season):
    y, exact = tiny_season
    model = _tiny()
    estimates = []
    for seed in range(8):
        pf = ParticleFilter(model, FilterConfig(n_particles=4000), np.random.default_rng(seed))
        for t, value in enumerate(y, start=1):
            pf.assimilate(t, [Report("cases", t, float(value))], with_summary=False)
        estimates.append(pf.log_evidence)
    ok, text = _agrees(estimates, exact)
    assert ok, text


def test_the_same_counts_as_revisions_match_the_forward_algorithm_plus_the_thinning_constant(tiny_season):
    # Day t's count is first reported as of day t + 1 (a binomial share F(1) of it, drawn
    # here), and completed three days later. The exact log-likelihood of the two
    # increments is the final count's plus sum log Binomial(a_t; y_t, F(1)).
    y, exact = tiny_season
    model = _tiny()
    f1 = float(reporting_cdf("gamma", 2.0, 1.0, 5)[0, 1])
    assert 0.05 < f1 < 0.5
    first = np.random.default_rng(77).binomial(y.astype(int), f1)
    constant = float(stats.binom.logpmf(first, y.astype(int), f1).sum())
    days = y.size
    estimates, lagged = [], 0
    for seed in range(8):
        pf = ParticleFilter(model, FilterConfig(n_particles=4000), np.random.default_rng(seed))
        for now in range(1, days + 4):
            reports = []
            if 1 <= now - 1 <= days:  # partial for yesterday, known as of today
                reports.append(Report("cases_by_event", now - 1, float(first[now - 2]), as_of=now))
            if 1 <= now - 3 <= days:  # the rest of the count of three days ago
                d = now - 3
                reports.append(Report("cases_by_event", d, float(y[d - 1]), None, float(first[d - 1]), d + 1))
            lagged += sum(r.time < now for r in reports)
            pf.assimilate(now, reports, with_summary=False)
        estimates.append(pf.log_evidence)
    assert lagged == 8 * 2 * days  # every value arrived after its day
    ok, text = _agrees(estimates, exact + constant)
    assert ok, text
    # the constant matters: without it (a filter that took each revision as the whole count,
    # or ignored the partial reports) the check could not pass
    assert abs(constant) > 10 * (4 * np.std(estimates, ddof=1) / np.sqrt(len(estimates)))


def test_reporting_cdf_is_the_rounded_and_truncated_gamma():
    # scipy's gamma cdf (shape (m/s)^2, scale s^2/m) at the rounding edges, renormalised at max_days.
    cdf = reporting_cdf("gamma", np.array([2.0, 6.0]), np.array([1.0, 3.0]), 5)
    for row, (m, s) in zip(cdf, [(2.0, 1.0), (6.0, 3.0)]):
        g = stats.gamma((m / s) ** 2, scale=s * s / m).cdf
        edges = np.array([0.5, 1.5, 2.5, 3.5, 4.5, 5.5])
        want = g(edges) / g(5.5)
        np.testing.assert_allclose(row, want, rtol=1e-12)


# ----------------------------------------------------------- learning a delay
def _vintages(eventual: np.ndarray, mean: float, sd: float, max_days: int, rng: np.random.Generator) -> np.ndarray:
    """known[j, a]: the count of event day j+1 reported by day j+1+a (a = 0..max_days), drawn by
    splitting each eventual count over its report days (a multinomial under Poisson thinning)."""
    q = np.diff(np.concatenate([[0.0], reporting_cdf("gamma", mean, sd, max_days)[0]]))
    split = np.array([rng.multinomial(int(y), q) for y in eventual])
    return np.cumsum(split, axis=1)


def test_the_reporting_delay_is_learned_from_the_revisions():
    # The spec's delay mean has a gamma(9, 0.5) prior (mean 4.5, sd 1.5); the truth is 2.5.
    # Bugs caught: revisions that do not inform the delay (the posterior stays as wide as the
    # prior), or a share F(a - j) read one day off (the posterior settles away from the truth;
    # injected once: F(a - j + 1) moved the posterior to 3.59 with 90 % interval 3.52-3.65).
    model = CompartmentalModel(load_model_spec(SPECS / "seir_delay.toml"))
    assert model.window_days == 14
    truth = 2.5
    days = 40
    season = simulate_season(model, days, np.random.default_rng(8), params={"delay": truth})
    eventual = np.array([o.values["onsets"] for o in season.observations])
    assert eventual[-10:].mean() > 50  # enough counts to learn from
    known = _vintages(eventual, truth, 2.0, 14, np.random.default_rng(9))
    pf = ParticleFilter(model, FilterConfig(n_particles=3000, liu_west_discount=0.98), np.random.default_rng(10))
    col = model.param_names.index("delay")
    prior_sd = float(np.std(pf.particles.params[:, col]))
    last: dict[int, tuple[float, int]] = {}
    for now in range(1, days + 1):
        reports = []
        for j in range(max(1, now - 14), now + 1):
            total = float(known[j - 1, now - j])
            if j not in last:
                reports.append(Report("onsets", j, total, as_of=now))
            elif total != last[j][0]:
                reports.append(Report("onsets", j, total, now, *last[j]))
            else:
                continue
            last[j] = (total, now)
        pf.assimilate(now, reports, with_summary=False)
    w = pf.weights()
    delay = pf.particles.params[:, col]
    mean = float(w @ delay)
    sd = float(np.sqrt(w @ (delay - mean) ** 2))
    order = np.argsort(delay)
    cum = np.cumsum(w[order])
    lo, hi = delay[order][np.searchsorted(cum, 0.05)], delay[order][np.searchsorted(cum, 0.95)]
    assert lo <= truth <= hi, (lo, mean, hi)
    assert sd < prior_sd / 3, (sd, prior_sd)  # the data, not the prior, set the answer


def test_the_interpolated_reporting_cdf_matches_the_direct_one():
    # Bug caught: an off-by-one grid cell or interpolation in the wrong scale (errors of 1e-2).
    from filters import ReportingCdfTable

    values = np.random.default_rng(1).uniform(0.3, 60.0, 5000)
    for dist in ("gamma", "lognormal"):
        by_mean = ReportingCdfTable(dist, None, 3.0, 21)
        np.testing.assert_allclose(by_mean(values), reporting_cdf(dist, values, 3.0, 21), atol=1e-5, rtol=0)
        by_sd = ReportingCdfTable(dist, 4.0, None, 14)
        np.testing.assert_allclose(by_sd(values), reporting_cdf(dist, 4.0, values, 14), atol=1e-5, rtol=0)
