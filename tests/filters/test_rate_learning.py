"""Learning contact rates from each particle's own contacts (filters/_rate_learning.py
and the individual-based model's running statistics).

External checks:
- under a gamma prior the move is the exact conditional draw
  Gamma(a + M, b + E) (Poisson-gamma conjugacy; Gelman et al. 2013, *Bayesian
  Data Analysis*, 3rd ed., section 2.6), compared with scipy.stats.gamma;
- under lognormal, beta and uniform priors, repeated moves reach the
  posterior prior(b) b^M exp(-b E), normalised by scipy.integrate.quad;
- the exposure a model step adds is recounted person by person from the
  morning's states (a loop over people written here, not the model's code).

Tolerances: Kolmogorov-Smirnov tests reject at p < 1e-4 with 20,000 draws:
the statistic's 1e-4 point is then 0.016, and a shift of 0.1 posterior sd
moves a bell-shaped cdf by about 0.04, so it is found with power near 1;
means within 4.5 standard errors.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

import schemas
from filters import FilterConfig, IndividualModel, ParticleFilter, simulate_season
from filters._individual import ASYMPTOMATIC_BASE, SYMPTOMATIC_BASE
from filters._priors import prior_logpdf, sample_prior
from filters._rate_learning import learnable_prior, move_rates, prior_gamma
from filters._setting_effects import compile_setting_interventions

ALPHA = 1e-4
N = 20_000


def gen(seed: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(seed))


def test_under_a_gamma_prior_one_move_is_the_conjugate_draw():
    """Bug caught: the counts or the exposure added to the wrong gamma argument
    (e.g. exposure as a scale): the draws leave Gamma(a + M, b + E)."""
    prior = schemas.Gamma(dist="gamma", shape=3.0, scale=0.2)
    counts, exposure = np.full(N, 14.0), np.full(N, 40.0)
    start = np.full(N, 5.0)  # far from the posterior: one move must land on it
    moved = move_rates(start, counts, exposure, prior, gen(1))
    exact = stats.gamma(3.0 + 14.0, scale=1.0 / (1 / 0.2 + 40.0))
    assert stats.kstest(moved, exact.cdf).pvalue > ALPHA


@pytest.mark.parametrize(
    "prior, counts, exposure",
    [
        (schemas.LogNormal(dist="lognormal", mean_log=-1.0, sd_log=0.3), 25.0, 60.0),
        (schemas.LogNormal(dist="lognormal", mean_log=-1.0, sd_log=0.3), 0.0, 0.0),  # no data: the prior
        (schemas.LogNormal(dist="lognormal", mean_log=-2.0, sd_log=0.5), 300.0, 900.0),  # data far from the prior
        (schemas.Beta(dist="beta", a=2.0, b=5.0), 8.0, 30.0),
        (schemas.Uniform(dist="uniform", low=0.1, high=0.6), 12.0, 30.0),  # truncated: proposals outside refused
    ],
)
def test_repeated_moves_reach_the_posterior_under_other_priors(prior, counts, exposure):
    """Bugs caught: the acceptance ratio without the gamma's density (the draws stay
    near the gamma approximation), or the likelihood left in it (double-counted data)."""
    rng = gen(2)
    values = sample_prior(prior, rng, N)
    c, e = np.full(N, counts), np.full(N, exposure)
    for _ in range(25):
        values = move_rates(values, c, e, prior, rng)

    def log_post(b: float) -> float:
        return float(prior_logpdf(prior, b)) + counts * math.log(b) - exposure * b if b > 0 else -math.inf

    a0, b0 = prior_gamma(prior)
    mode = max((a0 + counts - 1) / (b0 + exposure), 1e-6)
    peak = log_post(mode)
    hi = float(np.quantile(values, 0.9999)) * 3
    lo_support, hi_support = (prior.low, prior.high) if isinstance(prior, schemas.Uniform) else (0.0, hi)

    def density(b: float) -> float:
        return math.exp(log_post(b) - peak)

    total = integrate.quad(density, lo_support, hi_support, points=[mode], limit=200)[0]

    def cdf(x: np.ndarray) -> np.ndarray:
        return np.array([integrate.quad(density, lo_support, min(max(v, lo_support), hi_support), limit=200)[0] / total for v in x])

    grid = np.quantile(values, np.linspace(0.001, 0.999, 400))
    # KS against the numerical cdf, evaluated on a 400-point grid of the sample and interpolated.
    exact_on_grid = cdf(grid)
    assert stats.kstest(values, lambda x: np.interp(x, grid, exact_on_grid, left=0.0, right=1.0)).pvalue > ALPHA


def test_rates_with_priors_off_zero_are_left_to_liu_west():
    assert learnable_prior(schemas.Gamma(dist="gamma", shape=2.0, scale=1.0))
    assert not learnable_prior(schemas.Normal(dist="normal", mean=0.3, sd=0.1))
    assert not learnable_prior(schemas.Uniform(dist="uniform", low=-0.1, high=0.5))


# ------------------------------------------------------------ the model's statistics
TOWN = {
    "kind": "individual",
    "name": "learning_town",
    "population": {
        "name": "learning_town", "seed": 8, "size": 400,
        "bands": [{"name": "child", "share": 0.3}, {"name": "adult", "share": 0.7}],
        "households": {"size": {"dist": "discrete", "values": [1, 2, 3, 4], "weights": [0.25, 0.3, 0.25, 0.2]}, "head_bands": ["adult"]},
        "settings": [{"name": "school", "size": 40, "members": {"child": 0.9}}],
    },
    "transmission": {"household": "beta_home", "community": "beta_community", "settings": {"school": "beta_school"}, "importation": "iota"},
    "disease": {"latent": {"dist": "discrete", "days": [1, 2], "weights": [0.5, 0.5]},
                "infectious": {"dist": "discrete", "days": [2, 3, 4], "weights": [0.3, 0.4, 0.3]},
                "asymptomatic": 0.4, "asymptomatic_infectiousness": 0.5},
    "parameters": {
        "beta_home": {"kind": "static", "prior": {"dist": "lognormal", "mean_log": -1.0, "sd_log": 0.3}},
        "beta_school": {"kind": "static", "prior": {"dist": "gamma", "shape": 10.0, "scale": 0.03}},
        "beta_community": {"kind": "static", "prior": {"dist": "lognormal", "mean_log": -1.2, "sd_log": 0.2}},
        "iota": {"kind": "static", "prior": {"dist": "gamma", "shape": 4.0, "scale": 0.25}},
        "rho": {"kind": "static", "prior": {"dist": "beta", "a": 5.0, "b": 5.0}},
    },
    "initial": {"exposed": 5, "infectious": 10},
    "series": [{"name": "cases", "kind": "incidence", "flow": "onset", "reporting": "rho", "noise": {"dist": "poisson"}}],
}


def town() -> IndividualModel:
    return IndividualModel(schemas.validate_document(schemas.IndividualModelSpec, TOWN, "test"))


def test_only_rates_of_contacts_are_learned_and_the_rest_keep_liu_west():
    model = town()
    learned = [model.param_names[j] for j in model.learned_parameters]
    assert learned == ["beta_home", "beta_school", "beta_community", "iota"]
    assert [model.param_names[j] for j in model.static_parameters] == ["rho"]  # a reporting share: the series read it


def recount_exposure(model: IndividualModel, states: np.ndarray, school_factor: float) -> np.ndarray:
    """(n, places) exposure of one day recounted person by person: each infectious person adds
    m/(m - 1) of their household and school place (0 for a place of one), 1 for the community,
    times 0.5 if asymptomatic, times the school's factor for the school."""
    pop = model.population
    kinds = [pop.households, *pop.settings]
    out = np.zeros((states.shape[0], len(model.places)))
    for p in range(states.shape[0]):
        for person in range(model.people):
            code = int(states[p, person])
            if not SYMPTOMATIC_BASE <= code < 253:
                continue
            w = 0.5 if code >= ASYMPTOMATIC_BASE else 1.0
            for k, venues in enumerate(kinds):
                v = venues.venue[person]
                m = int(venues.sizes[v]) if v >= 0 else 0
                out[p, k] += w * (m / (m - 1) if m >= 2 else 0.0) * (school_factor if k == 1 else 1.0)
            out[p, -1] += w
    return out


@pytest.mark.parametrize("close_school", [False, True])
def test_a_days_exposure_is_the_recount_and_contacts_follow_the_rates(close_school):
    """Bugs caught: the asymptomatic weight left out of the exposure, the household's
    m/(m - 1) left out, exposure counted for a closed school, imports not added to the
    importation rate's counts, counts taken after quarantine or susceptibility thinning
    (they would fall below rate x exposure)."""
    model = town()
    names = model.param_names
    rng = gen(5)
    ps = model.initial(300, rng)
    model.advance(ps, 0, 6, rng)
    before_states, before = ps.states.copy(), ps.stats.copy()
    effects = None
    if close_school:
        scenario = schemas.validate_document(
            schemas.SettingScenario, {"name": "closed", "interventions": [{"kind": "close", "setting": "school", "start_day": 0}]}, "test"
        )
        effects = compile_setting_interventions(model, scenario, origin=6)
    model.advance(ps, 6, 7, rng, effects)
    added = ps.stats - before
    exposure = recount_exposure(model, before_states, 0.0 if close_school else 1.0)
    places = {"beta_home": 0, "beta_school": 1, "beta_community": 2}
    for i, name in enumerate(names[j] for j in model.learned_parameters):
        if name == "iota":
            np.testing.assert_allclose(added[:, 2 * i + 1], 1.0)
        else:
            np.testing.assert_allclose(added[:, 2 * i + 1], exposure[:, places[name]], rtol=1e-12)
        # Counts are Poisson(rate x exposure) per particle: their total within 4.5 sd.
        rate = ps.params[:, names.index(name)]
        mean = float((rate * added[:, 2 * i + 1]).sum())
        assert abs(added[:, 2 * i].sum() - mean) < 4.5 * math.sqrt(max(mean, 1.0)), (name, added[:, 2 * i].sum(), mean)
    if close_school:
        assert added[:, 3].sum() == 0 and added[:, 2].sum() == 0


def test_the_filter_moves_learned_rates_only_when_learning_online():
    """With ``liu_west_discount=None`` (as PMMH runs it) every parameter keeps its value;
    with it set, the learned rates move every step (their values spread) and weights
    are untouched by the move."""
    model = town()
    truth = simulate_season(model, 12, gen(7))
    fixed = ParticleFilter(model, FilterConfig(n_particles=200, liu_west_discount=None), gen(8))
    start = fixed.particles.params.copy()
    for o in truth.observations:
        fixed.step(o, with_summary=False)
    assert {tuple(row) for row in fixed.particles.params} <= {tuple(row) for row in start}  # resampled copies only

    learning = ParticleFilter(model, FilterConfig(n_particles=200, liu_west_discount=0.95), gen(8))
    weights_seen = []
    original = model.move_parameters

    def spy(particles, rng):
        weights_seen.append(particles.log_weights.copy())
        original(particles, rng)
        np.testing.assert_array_equal(particles.log_weights, weights_seen[-1])

    model.move_parameters = spy  # type: ignore[method-assign]
    for o in truth.observations:
        learning.step(o, with_summary=False)
    assert len(weights_seen) == len(truth.observations)
    home = learning.particles.params[:, model.param_names.index("beta_home")]
    assert np.unique(home).size > 150  # redrawn per particle, not copies of a few ancestors


def test_a_cloud_without_the_statistics_is_refused_with_the_way_out():
    model = town()
    ps = model.initial(10, gen(9))
    ps.stats = np.zeros((10, 0))
    with pytest.raises(Exception, match=r"needs 8 statistics per particle; this cloud has 0.*casecloud stream rebuild"):
        model.advance(ps, 0, 1, gen(10))
