"""Forecasts and exceedance for positivity and concentration series.

A cloud with no one infectious makes no new infections, so the wastewater level
ahead is known exactly: the convolution of the past infection path (padded with
zeros) with the shedding profile. With independent log-normal noise each day,
P(the level passes X on at least one of days 1..H) = 1 - prod_h Phi((log X -
log m_h) / sd), a closed form (``scipy.stats.norm.cdf``, ``numpy.convolve``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from filters import CompartmentalModel, delay_kernel, forecast
from filters._particles import ParticleSet
from schemas import load_model_spec

SPECS = Path(__file__).parent / "specs"
PATH = np.round(400 * np.exp(-0.5 * ((np.arange(60) - 35) / 8.0) ** 2)).astype(np.int64)


def quiet_cloud(m: CompartmentalModel, n: int, params: dict[str, float], infectious: int = 0) -> ParticleSet:
    """n identical particles with PATH as past infections and ``infectious`` in I (S 60000, R the rest)."""
    history = np.zeros((n, m.history_days, 1, 1), dtype=np.int64)
    newest_first = PATH[::-1][: m.history_days]
    history[:, : newest_first.size, 0, 0] = newest_first
    states = np.zeros((n, 1, 3), dtype=np.int64)
    states[:, 0, 0], states[:, 0, 1], states[:, 0, 2] = 60_000, infectious, 40_000 - infectious
    p = np.zeros((n, len(m.param_names)))
    for name, value in params.items():
        p[:, m.param_names.index(name)] = value
    return ParticleSet(states=states, params=p, history=history)


def test_wastewater_exceedance_matches_the_closed_form():
    # 20000 trajectories: each probability has binomial sd <= 0.0036; 4 sd allowed.
    # Bugs caught: one noise draw shared by all trajectories of a day (the exceedance then
    # is 0 or 1 per day), draws truncated to whole numbers, or the forecast level read on
    # the wrong day (the level falls by about 10 % a day here).
    m = CompartmentalModel(load_model_spec(SPECS / "sir_wastewater.toml"))
    ps = quiet_cloud(m, 50, {"beta": 0.4, "gamma": 0.25, "shed_mean": 7.0, "ww_scale": 12.0})
    fc = forecast(m, ps, np.ones(50), 0, horizon=7, n_trajectories=20_000, rng=np.random.default_rng(9))
    padded = np.concatenate([PATH, np.zeros(7, dtype=np.int64)])
    levels = 10.0 * 0.4 * np.convolve(padded, delay_kernel("gamma", 6.0, 3.0, 20))[PATH.size : PATH.size + 7]
    np.testing.assert_allclose(fc.expected["ww_east"], np.broadcast_to(levels, (20_000, 7)), rtol=1e-12)
    for x in (0.9 * levels[0], levels[0], 1.3 * levels[0], 2.0 * levels[0]):
        want = 1 - np.prod(stats.norm.cdf((np.log(x) - np.log(levels)) / 0.4))
        got = fc.exceedance("ww_east", float(x), 7)
        assert abs(got - want) < 4 * np.sqrt(want * (1 - want) / 20_000) + 1e-12, (x, got, want)
    # the published block keeps levels (6 significant digits), not counts
    block = fc.to_message_block()
    assert block["series"]["ww_east"]["mean"][0] == float(f"{fc.reported['ww_east'][:, 0].mean():.6g}")


def test_positivity_forecast_is_the_share_positive():
    # Bug caught: draws stored as whole numbers (every share truncated to 0) or rounded
    # to the counts' 0.1 in the published block.
    m = CompartmentalModel(load_model_spec(SPECS / "sir_positivity.toml"))
    ps = quiet_cloud(m, 20, {"beta": 0.0, "gamma": 0.25, "background": 0.03, "enrichment": 9.0}, infectious=3000)
    fc = forecast(m, ps, np.ones(20), 0, horizon=5, n_trajectories=200, rng=np.random.default_rng(4))
    share = fc.reported["lab_positive"]
    np.testing.assert_array_equal(share, fc.expected["lab_positive"])
    assert np.all((share > 0.03) & (share < 1))
    # no new infections (beta = 0) and recoveries at rate 0.25: prevalence, and so positivity, falls
    assert np.all(np.diff(share.mean(axis=0)) < 0)
    mean = fc.to_message_block()["series"]["lab_positive"]["mean"]
    np.testing.assert_allclose(mean, share.mean(axis=0), atol=5e-5)


def test_log_scale_noise_on_a_known_signal_matches_a_kalman_filter():
    # The linear-Gaussian special case: with nobody infectious the shedding signal ahead
    # is known up to the scale, so z_t = log y_t - log(signal_t) = log scale + 0.5 e_t, and
    # a static log scale with a normal prior (the spec's lognormal) has the Kalman
    # filter's posterior (Kalman 1960; a static state: x_t = x_{t-1}, observation noise
    # variance 0.25), computed here by the textbook recursion. 20000 particles keep about
    # 3300 distinct scale values after resampling: the Monte Carlo sd of the weighted mean
    # is about 0.17 / sqrt(3300) = 0.003 (0.006 seen); 0.02 allowed, and 10 % on the sd. Bug caught: the log-scale noise centred on the mean instead of
    # the median (a shift of sd^2 / 2 = 0.125 in the posterior mean), the sd read as a
    # variance, or the wrong day's signal.
    spec = load_model_spec(SPECS / "sir_wastewater.toml").model_dump(by_alias=True)
    spec["parameters"]["ww_scale"] = {"kind": "static", "prior": {"dist": "lognormal", "mean_log": 2.3, "sd_log": 0.3}}
    spec["series"][2]["shedding"]["mean"] = 7.0
    spec["series"][2]["noise"] = {"dist": "lognormal", "sd": 0.5}
    from filters import FilterConfig, ParticleFilter, Report
    from schemas import ModelSpec

    m = CompartmentalModel(ModelSpec.model_validate(spec))
    n, days = 20_000, 6
    rng = np.random.default_rng(31)
    ps = m.initial(n, rng)
    quiet = quiet_cloud(m, n, {})
    ps.states[:] = quiet.states
    ps.history[:] = 0
    ps.history[:, :, m.series[2].slot, :] = quiet.history[:, :, 0, :]
    padded = np.concatenate([PATH, np.zeros(days, dtype=np.int64)])
    signal = 0.25 * np.convolve(padded, delay_kernel("lognormal", 7.0, 3.5, 25))[PATH.size : PATH.size + days]
    truth = 2.0
    y = np.exp(truth + np.log(signal) + 0.5 * np.random.default_rng(8).standard_normal(days))
    pf = ParticleFilter(m, FilterConfig(n_particles=n), rng, particles=ps, time=0)
    for t in range(1, days + 1):
        pf.assimilate(t, [Report("ww_west", t, float(y[t - 1]))])
    x = np.log(pf.particles.params[:, m.param_names.index("ww_scale")])
    w = pf.weights()
    mean_pf = float(np.sum(w * x))
    sd_pf = float(np.sqrt(np.sum(w * (x - mean_pf) ** 2)))
    # Kalman recursion for the static state
    mean_kf, var_kf = 2.3, 0.3**2
    for z in np.log(y) - np.log(signal):
        gain = var_kf / (var_kf + 0.25)
        mean_kf, var_kf = mean_kf + gain * (z - mean_kf), (1 - gain) * var_kf
    assert abs(mean_pf - mean_kf) < 0.02, (mean_pf, mean_kf)
    assert sd_pf == pytest.approx(np.sqrt(var_kf), rel=0.10)
