"""Test positivity: positives out of the tests a message carries.

The share positive is p = 1 - (1 - background) * exp(-enrichment * x), x the
share of the series' groups in its compartment (``schemas.Positivity``);
positives are binomial or beta-binomial (mean share p, concentration phi) out
of the tests.

References: ``scipy.stats.betabinom`` (shape parameters a = p phi,
b = (1 - p) phi) and ``scipy.stats.binom`` for the log-pmfs; their ``mean`` and
``var`` for the draws. Tolerances are floating-point ones (the same closed form by
another route: log-gamma and log-beta sums against scipy's) unless stated.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from pydantic import ValidationError
from scipy import stats

from filters import CompartmentalModel, ModelGuardError, Observation, ObservationError, Report
from filters._observation import betabinomial_loglik
from filters._particles import ParticleSet
from schemas import ModelSpec, load_model_spec

SPEC = Path(__file__).parent / "specs" / "sir_positivity.toml"


def model() -> CompartmentalModel:
    return CompartmentalModel(load_model_spec(SPEC))


def particles(m: CompartmentalModel, infected: list[int], background: float = 0.03, enrichment: float = 9.0) -> ParticleSet:
    """One particle per entry of ``infected`` in a population of 100000 (S takes the rest, R empty)."""
    n = len(infected)
    states = np.zeros((n, 1, 3), dtype=np.int64)
    states[:, 0, 1] = infected
    states[:, 0, 0] = 100_000 - np.asarray(infected)
    params = np.zeros((n, len(m.param_names)))
    params[:, m.param_names.index("beta")] = 0.4
    params[:, m.param_names.index("gamma")] = 0.25
    params[:, m.param_names.index("background")] = background
    params[:, m.param_names.index("enrichment")] = enrichment
    history = np.zeros((n, m.history_days, 1, 1), dtype=np.int64)
    return ParticleSet(states=states, params=params, history=history)


# ------------------------------------------------------------ beta-binomial
def test_betabinomial_logpmf_matches_scipy():
    # Bug caught: the shape parameters swapped (a = (1 - p) phi), or the binomial
    # coefficient left out; either moves every value by far more than 1e-9.
    y = np.array([0.0, 1.0, 3.0, 17.0, 250.0, 999.0, 1000.0])
    for n in (1.0, 20.0, 1000.0):
        for p in (1e-6, 0.01, 0.2, 0.5, 0.93):
            for phi in (0.5, 4.0, 80.0, 1e5):
                ys = y[y <= n]
                got = np.array([betabinomial_loglik(v, n, p, phi) for v in ys])
                want = stats.betabinom.logpmf(ys, n, p * phi, (1 - p) * phi)
                np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-9)


def test_betabinomial_edges_are_exact():
    # Bug caught: p = 0 or 1 gives NaN (log-beta of 0) instead of a point mass, and a
    # count above the tests a finite number instead of -inf.
    n = 40.0
    assert betabinomial_loglik(0.0, n, 0.0, 50.0) == 0.0
    assert betabinomial_loglik(3.0, n, 0.0, 50.0) == -np.inf
    assert betabinomial_loglik(40.0, n, 1.0, 50.0) == 0.0
    assert betabinomial_loglik(39.0, n, 1.0, 50.0) == -np.inf
    assert betabinomial_loglik(41.0, n, 0.3, 50.0) == -np.inf


def test_betabinomial_tends_to_binomial():
    # As phi grows the extra variance factor 1 + (n - 1) / (phi + 1) tends to 1: at
    # phi = 1e9 and n = 500 it is 1 + 5e-7, so log-pmfs agree to ~1e-5.
    # Bug caught: the concentration read as its inverse (phi -> 0 would be the binomial).
    y = np.arange(0, 501, 25, dtype=float)
    got = np.array([betabinomial_loglik(v, 500.0, 0.3, 1e9) for v in y])
    np.testing.assert_allclose(got, stats.binom.logpmf(y, 500, 0.3), rtol=1e-4, atol=1e-5)


# ------------------------------------------------------------ share positive
def test_share_positive_rises_from_background_with_prevalence():
    # Bug caught: the share read from the count (not the share) of infected, or the
    # background added outside the bound (p > 1 at high prevalence).
    m = model()
    infected = [0, 100, 1000, 10_000, 100_000]
    ps = particles(m, infected, background=0.03, enrichment=9.0)
    x = np.array(infected) / 100_000
    want = 1 - (1 - 0.03) * np.exp(-9.0 * x)
    got = m.expected(ps, "lab_positive")
    np.testing.assert_allclose(got, want, rtol=1e-12)
    assert got[0] == pytest.approx(0.03) and np.all(np.diff(got) > 0) and got[-1] <= 1.0


def test_model_loglik_is_the_scipy_betabinomial_of_the_share():
    # The whole path (share from states, parameters from columns, tests from the
    # observation) against scipy.stats.betabinom. Bug caught: the tests taken from the
    # positives (n = y) or a missing series' tests defaulting to something.
    m = model()
    ps = particles(m, [50, 400, 2500], background=0.02, enrichment=12.0)
    p = 1 - 0.98 * np.exp(-12.0 * np.array([50, 400, 2500]) / 100_000)
    y, n = 37, 512
    got = m.log_likelihood(ps, Observation(0, {"lab_positive": y}, {"lab_positive": n}))
    want = stats.betabinom.logpmf(y, n, p * 300.0, (1 - p) * 300.0)
    np.testing.assert_allclose(got, want, rtol=1e-9)
    # the same report, late-path entry point: identical
    report = Report("lab_positive", 0, float(y), trials=float(n))
    np.testing.assert_allclose(m.report_log_likelihood(ps, report, 0), want, rtol=1e-9)


def test_binomial_positivity_matches_scipy_binom(tmp_path):
    spec = load_model_spec(SPEC).model_dump(by_alias=True)
    spec["series"][1]["noise"] = {"dist": "binomial"}
    m = CompartmentalModel(ModelSpec.model_validate(spec))
    ps = particles(m, [0, 900], background=0.05, enrichment=6.0)
    p = 1 - 0.95 * np.exp(-6.0 * np.array([0, 900]) / 100_000)
    got = m.log_likelihood(ps, Observation(0, {"lab_positive": 11}, {"lab_positive": 200}))
    np.testing.assert_allclose(got, stats.binom.logpmf(11, 200, p), rtol=1e-9)


def test_draws_have_the_betabinomial_mean_and_variance():
    # 40000 draws per particle: the sample mean's standard error is sd / 200 and the
    # sample variance's relative error about sqrt(2 / 40000) = 0.7 % (plus kurtosis);
    # 4 % on the variance and 4 standard errors on the mean. Bug caught: the beta mixing
    # left out (binomial variance, 60 % too small here) or the shares swapped.
    m = model()
    ps = particles(m, [1500] * 40_000, background=0.03, enrichment=9.0)
    p = 1 - 0.97 * np.exp(-9.0 * 0.015)
    draws = m.sample_positives(ps, "lab_positive", 400, np.random.default_rng(7))
    ref = stats.betabinom(400, p * 300.0, (1 - p) * 300.0)
    assert abs(draws.mean() - ref.mean()) < 4 * ref.std() / 200
    assert draws.var() == pytest.approx(ref.var(), rel=0.04)
    assert ref.var() > 1.5 * stats.binom(400, p).var()  # the check can tell the two apart


# ------------------------------------------------------------ what is refused
@pytest.mark.parametrize(
    ("trials", "positives", "mentions"),
    [
        ({}, 5, "no number of tests"),
        ({"lab_positive": 0}, 0, "0 tests"),
        ({"lab_positive": -4}, 0, "-4 tests"),
        ({"lab_positive": 12.5}, 3, "12.5 tests"),
        ({"lab_positive": 20}, 21, "21 positives out of 20 tests"),
        ({"lab_positive": 20, "cases": 50}, 3, "not a positivity series"),
    ],
    ids=["missing", "zero", "negative", "fractional", "above-tests", "tests-for-cases"],
)
def test_bad_tests_are_refused_before_any_arithmetic(trials, positives, mentions):
    # Bug caught: y / n evaluated with n = 0 (a warning, which pytest turns into an error,
    # or NaN weights), or positives above tests weighed as merely unlikely.
    m = model()
    with pytest.raises(ObservationError, match=mentions):
        m.check_observation(Observation(0, {"lab_positive": positives, "cases": 4}, trials))


def test_a_background_prior_outside_0_1_is_a_model_error():
    m = model()
    ps = particles(m, [10, 10], background=0.03)
    ps.params[1, m.param_names.index("background")] = 1.3
    with pytest.raises(ModelGuardError, match="positivity background 'background' = 1.3"):
        m.log_likelihood(ps, Observation(0, {"lab_positive": 3}, {"lab_positive": 30}))


@pytest.mark.parametrize(
    ("change", "mentions"),
    [
        ({"noise": {"dist": "poisson"}}, "noise binomial or betabinomial"),
        ({"noise": {"dist": "betabinomial"}}, "needs 'dispersion'"),
        ({"positivity": {"background": 1.0, "enrichment": 5.0}}, "background must be in [0, 1)"),
        ({"positivity": {"background": 0.1, "enrichment": 0.0}}, "enrichment must be finite and > 0"),
        ({"positivity": None}, "a 'positivity' table"),
        ({"positivity": {"background": "bg_rate", "enrichment": 5.0}}, "positivity.background = 'bg_rate' is not a parameter"),
        ({"cadence": "weekly"}, "daily snapshot"),
    ],
)
def test_spec_errors_name_the_field(change, mentions):
    spec = load_model_spec(SPEC).model_dump(by_alias=True)
    spec["series"][1].update(change)
    with pytest.raises(ValidationError) as info:
        ModelSpec.model_validate(spec)
    assert mentions in str(info.value)


def test_positivity_table_and_betabinomial_belong_to_positivity_series():
    spec = load_model_spec(SPEC).model_dump(by_alias=True)
    spec["series"][0]["positivity"] = {"background": 0.1, "enrichment": 5.0}
    with pytest.raises(ValidationError, match="belongs to series of kind"):
        ModelSpec.model_validate(spec)
    spec["series"][0]["positivity"] = None
    spec["series"][0]["noise"] = {"dist": "betabinomial", "dispersion": 10.0}
    with pytest.raises(ValidationError, match="betabinomial noise is for positivity series"):
        ModelSpec.model_validate(spec)


def test_older_specs_keep_their_fingerprints():
    # Fingerprints of the shipped examples computed before positivity series existed
    # (schemas of commit 94757b7): a spec without them must hash as before, or every
    # stream's checkpoints would be refused. Bug caught: the new key (null) hashed in.
    from schemas import example_model_path

    before = {"sir": "b56286e10f242aed", "seir": "1367c0e3bd9c3bac", "seirs": "a3a518c0b2f642af",
              "seir_two_band": "1ab4fb618516bd83", "seir_two_band_lab": "e299ba93d6491836"}
    assert {name: load_model_spec(example_model_path(name)).fingerprint() for name in before} == before
