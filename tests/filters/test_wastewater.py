"""Wastewater concentrations: shedding of new infections, log-scale noise, detection limits.

A concentration series expects scale * catchment * sum_d w_d I(t - d) (w the
shedding profile over days d since infection, I the daily new infections),
diluted by reference_flow / flow when a sample's flow is given; log Y is
log(expected) plus sd times a standard normal (log-normal noise) or Student-t
draw. A value below the lab's limit of detection is censored: P(Y < limit).

References: ``scipy.stats.lognorm`` (s = sd, scale = expected) log-pdf and
log-cdf; ``scipy.stats.t`` (loc = log expected, scale = sd) for the log-scale
Student-t; ``numpy.convolve`` for the shedding convolution; ``scipy.stats.kstest``
for the draws. Tolerances are floating-point ones unless stated.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from pydantic import ValidationError
from scipy import stats

from filters import CompartmentalModel, ModelGuardError, Observation, ObservationError, Report, delay_kernel
from filters._observation import log_concentration_loglik
from filters._particles import ParticleSet
from schemas import ModelSpec, load_model_spec

SPEC = Path(__file__).parent / "specs" / "sir_wastewater.toml"


def model() -> CompartmentalModel:
    return CompartmentalModel(load_model_spec(SPEC))


def with_path(m: CompartmentalModel, path_oldest_first: np.ndarray, shed_mean: list[float], ww_scale: float = 12.0) -> ParticleSet:
    """Particles (one per ``shed_mean``) whose infection history is ``path`` (oldest day first)."""
    n = len(shed_mean)
    newest_first = np.asarray(path_oldest_first[::-1][: m.history_days], dtype=np.int64)
    history = np.zeros((n, m.history_days, 1, 1), dtype=np.int64)
    history[:, : newest_first.size, 0, 0] = newest_first
    states = np.zeros((n, 1, 3), dtype=np.int64)
    states[:, 0, 0] = 100_000
    params = np.zeros((n, len(m.param_names)))
    params[:, m.param_names.index("beta")] = 0.4
    params[:, m.param_names.index("gamma")] = 0.25
    params[:, m.param_names.index("shed_mean")] = shed_mean
    params[:, m.param_names.index("ww_scale")] = ww_scale
    return ParticleSet(states=states, params=params, history=history)


# A known incidence path: a rise and fall over 60 days, with a quiet start.
PATH = np.round(400 * np.exp(-0.5 * ((np.arange(60) - 35) / 8.0) ** 2)).astype(np.int64)


# ------------------------------------------------------------ the likelihood
@pytest.mark.parametrize("sd", [0.05, 0.4, 1.3])
def test_lognormal_density_and_censoring_match_scipy(sd):
    # Bug caught: the log centred on the mean of Y instead of its median (a shift of
    # sd^2 / 2), the Jacobian -log y left out, or a censored value given the density at
    # the limit instead of the probability below it.
    mean = np.array([1e-3, 0.7, 35.0, 4.2e4, 9.9e6])
    for y in (0.02, 3.0, 5e4, 2.5e7):
        got = log_concentration_loglik(y, mean, sd)
        np.testing.assert_allclose(got, stats.lognorm.logpdf(y, sd, scale=mean), rtol=1e-9, atol=1e-9)
    for lod in (0.5, 1e3):
        for below in (0.0, 0.25 * lod, 0.999 * lod):
            got = log_concentration_loglik(below, mean, sd, lod=lod)
            np.testing.assert_allclose(got, stats.lognorm.logcdf(lod, sd, scale=mean), rtol=1e-9, atol=1e-12)
    # at or above the limit: a measured value, the density again
    np.testing.assert_allclose(log_concentration_loglik(1e3, mean, sd, lod=1e3), stats.lognorm.logpdf(1e3, sd, scale=mean), rtol=1e-9)


def test_student_t_on_the_log_scale_matches_scipy():
    mean, sd, df = np.array([2.0, 300.0, 8e5]), 0.5, 4.0
    for y in (1.0, 250.0, 1e6):
        want = stats.t.logpdf(math.log(y), df, loc=np.log(mean), scale=sd) - math.log(y)
        np.testing.assert_allclose(log_concentration_loglik(y, mean, sd, df=df), want, rtol=1e-9)
    want = stats.t.logcdf(math.log(100.0), df, loc=np.log(mean), scale=sd)
    np.testing.assert_allclose(log_concentration_loglik(10.0, mean, sd, lod=100.0, df=df), want, rtol=1e-9)


def test_nothing_shed_explains_only_a_value_below_the_limit():
    # Bug caught: log(0) giving NaN weights (a crash or a collapse) instead of a clean
    # impossibility, or a non-detect penalised when the particle sheds nothing.
    got = log_concentration_loglik(40.0, np.array([0.0, 10.0]), 0.4)
    assert got[0] == -np.inf and np.isfinite(got[1])
    got = log_concentration_loglik(0.0, np.array([0.0, 10.0]), 0.4, lod=25.0)
    assert got[0] == 0.0 and got[1] == pytest.approx(stats.lognorm.logcdf(25.0, 0.4, scale=10.0))


# ------------------------------------------------------------ the shedding
def test_shedding_convolution_equals_numpy_convolve():
    # Expected concentration on the last day of PATH against a direct numpy.convolve
    # of the path with the discretised profile (day 0 = the infection day). Bug caught:
    # the history read oldest-first, or the profile shifted by a day.
    m = model()
    ps = with_path(m, PATH, [5.0, 7.0, 11.0], ww_scale=12.0)
    east = np.convolve(PATH, delay_kernel("gamma", 6.0, 3.0, 20))[PATH.size - 1]
    np.testing.assert_allclose(m.expected(ps, "ww_east"), 10.0 * 0.4 * east, rtol=1e-12)
    # the estimated profile: one kernel per particle, from its own shed_mean
    west = [np.convolve(PATH, delay_kernel("lognormal", mu, 3.5, 25))[PATH.size - 1] for mu in (5.0, 7.0, 11.0)]
    np.testing.assert_allclose(m.expected(ps, "ww_west"), 12.0 * 0.25 * np.array(west), rtol=1e-9)


def test_a_late_sample_is_weighed_against_the_path_of_its_day():
    # A sample taken 2 days before the cloud's day: the convolution at that day of the
    # path. Bug caught: a late value judged against today's shedding.
    m = model()
    ps = with_path(m, PATH, [7.0])
    now = 100
    west = np.convolve(PATH, delay_kernel("lognormal", 7.0, 3.5, 25))[PATH.size - 3]
    mean = 12.0 * 0.25 * west * (2.0e7 / 2.5e7)  # a sample flow of 2.5e7 against the reference 2e7
    y = 0.8 * mean
    report = Report("ww_west", now - 2, y, flow=2.5e7)
    want = stats.t.logpdf(math.log(y), 4.0, loc=math.log(mean), scale=0.5) - math.log(y)
    np.testing.assert_allclose(m.report_log_likelihood(ps, report, now), [want], rtol=1e-9)


def test_draws_are_log_normal_and_log_t_around_the_expected_value():
    # 20000 draws per series, compared with scipy's distributions by a KS test on the
    # standardised log (fixed seed, so the p-value is a fixed number; a wrong sd of
    # 10 % or a mean shift of sd^2/2 gives p < 1e-6). Bug caught: noise on the natural
    # scale, or the wrong spread.
    m = model()
    ps = with_path(m, PATH, [7.0] * 20_000)
    rng = np.random.default_rng(2024)
    east = m.sample_concentration(ps, "ww_east", rng)
    west = m.sample_concentration(ps, "ww_west", rng)
    z_east = (np.log(east) - np.log(m.expected(ps, "ww_east"))) / 0.4
    z_west = (np.log(west) - np.log(m.expected(ps, "ww_west"))) / 0.5
    assert stats.kstest(z_east, "norm").pvalue > 0.01
    assert stats.kstest(z_west, "t", args=(4.0,)).pvalue > 0.01


# ------------------------------------------------------------ what is refused
@pytest.mark.parametrize(
    ("values", "limits", "flows", "mentions"),
    [
        ({"ww_east": -3.0}, {}, {}, "concentration -3.0"),
        ({"ww_east": math.inf}, {}, {}, "concentration inf"),
        ({"ww_east": math.nan}, {}, {}, "concentration nan"),
        ({"ww_east": 0.0}, {}, {}, "without a limit of detection"),
        ({"ww_east": 10.0}, {"ww_east": 0.0}, {}, "limit of detection 0.0"),
        ({"ww_east": 10.0}, {"ww_east": -5.0}, {}, "limit of detection -5.0"),
        ({"ww_west": 10.0}, {}, {"ww_west": 0.0}, "flow 0.0"),
        ({"ww_east": 10.0}, {}, {"ww_east": 3e7}, "sets no reference_flow"),
        ({"cases": 10}, {"cases": 5.0}, {}, "not a concentration series"),
    ],
)
def test_bad_concentrations_are_refused(values, limits, flows, mentions):
    m = model()
    with pytest.raises(ObservationError, match=mentions):
        m.check_observation(Observation(0, values, limits=limits, flows=flows))


def test_a_concentration_needs_no_whole_number():
    model().check_observation(Observation(0, {"ww_east": 1234.56, "ww_west": 0.0}, limits={"ww_west": 80.0}))


def test_a_negative_scale_is_a_model_error():
    m = model()
    ps = with_path(m, PATH, [7.0, 7.0])
    ps.params[1, m.param_names.index("ww_scale")] = -1.0
    with pytest.raises(ModelGuardError, match="scale 'ww_scale' = -1.0"):
        m.log_likelihood(ps, Observation(0, {"ww_west": 10.0}))


@pytest.mark.parametrize(
    ("index", "change", "mentions"),
    [
        (1, {"noise": {"dist": "poisson"}}, "noise lognormal or studentt"),
        (1, {"noise": {"dist": "lognormal"}}, "needs 'sd'"),
        (2, {"noise": {"dist": "studentt", "sd": 0.5}}, "needs 'df'"),
        (1, {"shedding": None}, "a 'shedding' profile and a 'scale'"),
        (1, {"catchment": 1.5}, "catchment must be a share"),
        (1, {"scale": 0.0}, "scale must be finite and > 0"),
        (1, {"shedding": {"dist": "gamma", "mean": 0.0, "sd": 3.0, "max_days": 20}}, "shedding mean must be in (0, 60]"),
        (1, {"scale": "copies"}, "scale = 'copies' is not a parameter"),
        (0, {"catchment": 0.5}, "['catchment'] belong to series of kind"),
        (0, {"noise": {"dist": "lognormal", "sd": 0.3}}, "lognormal noise is for concentration series"),
    ],
)
def test_spec_errors_name_the_field(index, change, mentions):
    spec = load_model_spec(SPEC).model_dump(by_alias=True)
    spec["series"][index].update(change)
    with pytest.raises(ValidationError) as info:
        ModelSpec.model_validate(spec)
    assert mentions in str(info.value)
