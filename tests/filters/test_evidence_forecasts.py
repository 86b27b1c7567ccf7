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
