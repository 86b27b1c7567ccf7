"""Forecasts from a cloud: shapes and levels, common random numbers, the
probability read-outs against brute-force loops over the draws, weekly blocks,
latent quantities against closed forms, observation noise against the law of
total variance, and the message block.

Sources
-------
- Quantile levels: the 23 levels (median plus the 10%..90%, 95% and 98%
  central intervals) used by collaborative epidemic forecast hubs; Bracher,
  Ray, Gneiting & Reich (2021), "Evaluating epidemic forecasts in an interval
  format", PLoS Computational Biology 17(2): e1008618 (from memory).
- Systematic resampling gives every particle floor(M w_i) or ceil(M w_i)
  offspring: Kitagawa (1996), "Monte Carlo filter and smoother for
  non-Gaussian nonlinear state space models", J. Comput. Graph. Stat. 5(1);
  Douc, Cappe & Moulines (2005), "Comparison of resampling schemes for
  particle filtering" (from memory).
- Law of total variance, Var(Y) = E[Var(Y | mu)] + Var(E[Y | mu]); Poisson
  variance = mean; negative binomial (gamma-Poisson) variance mu + mu^2 / k:
  Johnson, Kemp & Kotz (2005), "Univariate Discrete Distributions", 3rd ed.,
  Wiley (from memory).
- Effective reproduction number of SIR, R = beta S / (gamma N): Anderson & May
  (1991), "Infectious Diseases of Humans: Dynamics and Control", Oxford
  University Press (from memory).
- Conservation of flows: with no flow into S, the day's new infections are
  exactly the day's decrease of S (bookkeeping of the model's own flows).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import orjson
import pytest

import schemas
from filters import (
    compile_interventions,
    FORECAST_LEVELS,
    CompartmentalModel,
    FilterConfig,
    FirstExceedance,
    Forecast,
    ParticleFilter,
    forecast,
    simulate_season,
)

SPECS = Path(__file__).parent / "specs"


def _model(name: str) -> CompartmentalModel:
    path = SPECS / f"{name}.toml" if (SPECS / f"{name}.toml").exists() else schemas.example_model_path(name)
    return CompartmentalModel(schemas.load_model_spec(path))


def _rng(*words: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(list(words))))


def _cloud(name: str, days: int, n_particles: int, seed: int, params: dict[str, float] | None = None):
    """A filtered cloud after ``days`` days of a season simulated from the model."""
    model = _model(name)
    season = simulate_season(model, days, _rng(seed, 1), params)
    pf = ParticleFilter(model, FilterConfig(n_particles=n_particles), _rng(seed, 2))
    for obs in season.observations:
        pf.step(obs, with_summary=False)
    return model, pf


@pytest.fixture(scope="module")
def two_band():
    return _cloud("seir_two_band", 35, 1000, 11)


@pytest.fixture(scope="module")
def two_band_fc(two_band):
    model, pf = two_band
    return forecast(model, pf.particles, pf.weights(), pf.time, 28, 2000, seed=5)


@pytest.fixture(scope="module")
def sir():
    return _cloud("sir", 25, 800, 3, {"beta": 0.6})  # R0 = 2.4: thousands of cases a day around the peak


def _all_arrays(fc: Forecast) -> dict[str, np.ndarray]:
    out = {f"reported.{k}": v for k, v in fc.reported.items()}
    out.update({f"expected.{k}": v for k, v in fc.expected.items()})
    out.update({f"latent.{k}": v for k, v in fc.latent.items()})
    out["ancestors"] = fc.ancestors
    return out


# ------------------------------------------------------------------- levels
def test_forecast_levels_are_the_23_hub_levels():
    # Bracher et al. 2021: median, 11 central intervals (10%..90% by 10%, 95%, 98%).
    intervals = [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.98]
    expected = sorted({round(0.5 - a / 2, 4) for a in intervals} | {0.5} | {round(0.5 + a / 2, 4) for a in intervals})
    assert len(FORECAST_LEVELS) == 23
    assert list(FORECAST_LEVELS) == pytest.approx(expected, abs=1e-12)
    assert list(FORECAST_LEVELS) == sorted(FORECAST_LEVELS)


# ------------------------------------------------------------------- shapes
def test_shapes_names_and_quantiles_match_numpy(two_band_fc):
    fc = two_band_fc
    assert (fc.horizon, fc.n_trajectories) == (28, 2000)
    assert set(fc.reported) == set(fc.expected) == {"ed_child", "ed_adult"}
    assert set(fc.latent) == {"infections", "susceptibles", "R_eff"}
    assert fc.names == ["ed_child", "ed_adult", "latent.infections", "latent.susceptibles", "latent.R_eff"]
    for a in _all_arrays(fc).values():
        assert not a.flags.writeable
    q = fc.quantiles()
    m = fc.mean()
    assert set(q) == set(m) == set(fc.names)
    for name in fc.names:
        draws = fc.draws(name)
        assert draws.shape == (2000, 28)
        assert q[name].shape == (23, 28)
        assert m[name].shape == (28,)
        # monotone in the level, and the reference computation (numpy's default quantile)
        assert np.all(np.diff(q[name], axis=0) >= 0)
        np.testing.assert_array_equal(q[name], np.quantile(draws, FORECAST_LEVELS, axis=0))
        np.testing.assert_array_equal(m[name], draws.mean(axis=0))
    assert fc.quantiles((0.5,))["ed_child"].shape == (1, 28)
    assert fc.infections_source.startswith("infection flows 'infection'")
    with pytest.raises(ValueError, match="levels"):
        fc.quantiles((0.0, 0.5))
    with pytest.raises(ValueError, match="no quantity 'nope'.*allowed"):
        fc.draws("nope")


def test_selection_is_systematic_by_weight(two_band, two_band_fc):
    """Kitagawa 1996: each particle gets floor(M w) or ceil(M w) trajectories."""
    _, pf = two_band
    w = pf.weights()
    counts = np.bincount(two_band_fc.ancestors, minlength=w.size)
    assert counts.sum() == 2000
    assert np.all(counts >= np.floor(2000 * w - 1e-9)) and np.all(counts <= np.ceil(2000 * w + 1e-9))


def test_cloud_is_not_modified(two_band):
    model, pf = two_band
    before = {k: v.copy() for k, v in pf.particles.arrays().items()}
    forecast(model, pf.particles, pf.weights(), pf.time, 5, 300, seed=1)
    forecast(model, pf.particles, pf.weights(), pf.time, 5, 300, _rng(1))
    for k, v in pf.particles.arrays().items():
        np.testing.assert_array_equal(v, before[k])


# -------------------------------------------------------------- randomness
def test_common_random_numbers(two_band):
    model, pf = two_band
    w = pf.weights()
    a = forecast(model, pf.particles, w, pf.time, 14, 400, seed=42)
    b = forecast(model, pf.particles, w, pf.time, 14, 400, seed=42)
    c = forecast(model, pf.particles, w, pf.time, 14, 400, seed=43)
    short = forecast(model, pf.particles, w, pf.time, 6, 400, seed=42)
    for name, x in _all_arrays(a).items():
        np.testing.assert_array_equal(x, _all_arrays(b)[name], err_msg=name)  # bit-identical
    for name in a.reported:
        assert not np.array_equal(a.reported[name], c.reported[name])
        # day h's generator depends on (seed, h) only: a shorter horizon is a prefix
        np.testing.assert_array_equal(short.reported[name], a.reported[name][:, :6])
        np.testing.assert_array_equal(short.expected[name], a.expected[name][:, :6])
    for name in a.latent:
        np.testing.assert_array_equal(short.latent[name], a.latent[name][:, :6])


def test_exactly_one_source_of_randomness(two_band):
    model, pf = two_band
    w = pf.weights()
    with pytest.raises(ValueError, match="exactly one source of randomness"):
        forecast(model, pf.particles, w, pf.time, 3, 10)
    with pytest.raises(ValueError, match="exactly one source of randomness"):
        forecast(model, pf.particles, w, pf.time, 3, 10, _rng(1), seed=1)
    with pytest.raises(ValueError, match="seed must be a whole number >= 0"):
        forecast(model, pf.particles, w, pf.time, 3, 10, seed=-1)
    with pytest.raises(ValueError, match="horizon"):
        forecast(model, pf.particles, w, pf.time, 0, 10, seed=1)
    with pytest.raises(ValueError, match="n_trajectories"):
        forecast(model, pf.particles, w, pf.time, 3, 0, seed=1)
    with pytest.raises(ValueError, match="weights must have shape"):
        forecast(model, pf.particles, w[:-1], pf.time, 3, 10, seed=1)
    with pytest.raises(ValueError, match="non-negative"):
        forecast(model, pf.particles, -w, pf.time, 3, 10, seed=1)


def test_positional_rng_call_draws_like_a_plain_loop(two_band):
    """forecast(model, particles, weights, start, horizon, n, rng) as the service
    calls it: systematic selection, then per day advance + observation noise,
    all from the one Generator (the reference is that loop written out)."""
    from filters import resample

    model, pf = two_band
    w = pf.weights()
    fc = forecast(model, pf.particles, w, pf.time, 7, 300, _rng(9))
    rng = _rng(9)
    ps = pf.particles.take(resample(w, rng, "systematic", n=300))
    for h in range(7):
        model.advance(ps, pf.time + h, pf.time + h + 1, rng)
        drawn = model.sample_observation(ps, rng)
        for name in fc.reported:
            np.testing.assert_array_equal(fc.reported[name][:, h], drawn[name])
            np.testing.assert_array_equal(fc.expected[name][:, h], model.expected(ps, name))


class _RecordingModel(CompartmentalModel):
    """Records the keyword arguments ``advance`` is called with."""

    calls: list

    def advance(self, particles, t0, t1, rng, **kwargs):  # type: ignore[override]
        self.calls.append(kwargs)
        super().advance(particles, t0, t1, rng)


def test_effects_are_passed_through_only_when_given(two_band):
    _, pf = two_band
    model = _RecordingModel(schemas.load_model_spec(schemas.example_model_path("seir_two_band")))
    model.calls = []
    base = forecast(model, pf.particles, pf.weights(), pf.time, 3, 50, seed=3)
    assert model.calls == [{}, {}, {}]
    marker = compile_interventions(model, [], pf.time)  # real effects with nothing in force
    model.calls.clear()
    same = forecast(model, pf.particles, pf.weights(), pf.time, 3, 50, seed=3, effects=marker)
    assert len(model.calls) == 3 and all(c == {"effects": marker} for c in model.calls)
    # an "intervention" that changes nothing reproduces the baseline bit for bit
    for name in base.reported:
        np.testing.assert_array_equal(base.reported[name], same.reported[name])


# ------------------------------------------------------------ probabilities
def _brute_first_day(row, threshold, within):
    for d in range(within):
        if row[d] > threshold:
            return d + 1
    return None


def test_exceedance_and_first_exceedance_against_loops(two_band_fc):
    fc = two_band_fc
    draws = fc.reported["ed_child"]
    for threshold in (np.quantile(draws[:, 0], 0.5), np.quantile(draws[:, 13], 0.9), draws.max() + 1, -1):
        for within in (1, 7, 28):
            firsts = [_brute_first_day(row, threshold, within) for row in draws]
            hits = [f for f in firsts if f is not None]
            p = len(hits) / len(firsts)
            assert fc.exceedance("ed_child", threshold, within) == pytest.approx(p, abs=1e-15)
            first = fc.first_exceedance("ed_child", threshold, within)
            assert isinstance(first, FirstExceedance)
            assert first.probability == pytest.approx(p, abs=1e-15)
            if hits:
                assert first.mean_day == pytest.approx(sum(hits) / len(hits), rel=1e-12)
            else:
                assert first.mean_day is None
    # at the median of the 7-day maximum the probability is about one half
    mid = fc.exceedance("ed_child", np.quantile(draws[:, :7].max(axis=1), 0.5), 7)
    assert 0.3 < mid <= 0.5
    with pytest.raises(ValueError, match=r"within must be a whole number of days in \[1, 28\]"):
        fc.exceedance("ed_child", 10, 29)
    with pytest.raises(ValueError, match="within"):
        fc.exceedance("ed_child", 10, 0)


def test_growth_probability_against_loops(two_band_fc):
    fc = two_band_fc
    inf = fc.latent["infections"]
    for days in (1, 7, 14):
        grows = [sum(row[days : 2 * days]) > sum(row[:days]) for row in inf.tolist()]
        assert fc.growth_probability(days) == pytest.approx(sum(grows) / len(grows), abs=1e-15)
    with pytest.raises(ValueError, match="days must be"):
        fc.growth_probability(15)


def test_peak_against_loops(two_band_fc):
    fc = two_band_fc
    peaks = fc.peak()
    assert set(peaks) == {"ed_child", "ed_adult", "latent.infections"}
    for name, summary in peaks.items():
        rows = fc.draws(name).tolist()
        days = [row.index(max(row)) + 1 for row in rows]  # first day of the maximum
        sizes = [max(row) for row in rows]
        assert summary["day"]["mean"] == pytest.approx(sum(days) / len(days), rel=1e-12)
        assert summary["size"]["mean"] == pytest.approx(sum(sizes) / len(sizes), rel=1e-12)
        np.testing.assert_allclose(summary["day"]["quantiles"], np.quantile(days, (0.05, 0.25, 0.5, 0.75, 0.95)))
        assert summary["p_at_horizon"] == pytest.approx(days.count(28) / len(days), abs=1e-15)


# ------------------------------------------------------------------- weekly
def test_weekly_blocks_of_a_daily_and_a_weekly_series():
    """seir_weekly reports onsets daily and as weekly totals through the same
    delay and reporting fraction, so the weekly series' expected value at the
    end of each block is the sum of the daily series' expected values over it."""
    model, pf = _cloud("seir_weekly", 28, 600, 21)
    fc = forecast(model, pf.particles, pf.weights(), pf.time, 17, 500, seed=2)
    assert fc.weekly_series == frozenset({"weekly_onsets"})
    np.testing.assert_array_equal(fc.weekly_ends(), [pf.time + 7, pf.time + 14])
    daily = fc.reported["daily_onsets"]
    blocks = fc.weekly("daily_onsets")
    assert blocks.shape == (500, 2)  # days 15..17 are a partial block, left out
    for k in range(2):
        np.testing.assert_array_equal(blocks[:, k], [sum(row[7 * k : 7 * k + 7]) for row in daily.tolist()])
    np.testing.assert_array_equal(fc.weekly("weekly_onsets"), fc.reported["weekly_onsets"][:, [6, 13]])
    block_expected = fc.expected["daily_onsets"][:, :14].reshape(500, 2, 7).sum(axis=2)
    np.testing.assert_allclose(fc.expected["weekly_onsets"][:, [6, 13]], block_expected, rtol=1e-12)
    inf = fc.weekly("latent.infections")
    np.testing.assert_array_equal(inf, fc.latent["infections"][:, :14].reshape(500, 2, 7).sum(axis=2))
    with pytest.raises(ValueError, match="not a count of events"):
        fc.weekly("latent.susceptibles")
    short = forecast(model, pf.particles, pf.weights(), pf.time, 6, 50, seed=2)
    with pytest.raises(ValueError, match="at least 7 days"):
        short.weekly("daily_onsets")
    block = fc.to_message_block()
    assert "weekly" in block["series"]["weekly_onsets"] and "weekly" not in block["series"]["daily_onsets"]
    assert block["series"]["weekly_onsets"]["weekly"]["ends"] == [pf.time + 7, pf.time + 14]


# ------------------------------------------------------------------- latent
def test_latent_quantities_of_sir_match_closed_forms(sir):
    """sir observes its infection flow: reported cases have mean rho x infections;
    R_eff = beta S / (gamma N) (Anderson & May 1991); no flow enters S, so the
    day's infections are the day's decrease of S."""
    model, pf = sir
    fc = forecast(model, pf.particles, pf.weights(), pf.time, 10, 500, seed=8)
    inf, s, r = fc.latent["infections"], fc.latent["susceptibles"], fc.latent["R_eff"]
    np.testing.assert_array_equal(fc.expected["cases"], 0.5 * inf)
    s0 = pf.particles.states[fc.ancestors, 0, model.compartments.index("S")]
    np.testing.assert_array_equal(inf, -np.diff(np.column_stack([s0, s]), axis=1))
    beta = pf.particles.params[fc.ancestors, model.param_names.index("beta")]
    # 1e-9: float arithmetic plus the 1e-12 regulariser on V (relative 4e-12 at gamma = 0.25)
    np.testing.assert_allclose(r, beta[:, None] * s / (0.25 * 100000), rtol=1e-9)


def test_unobserved_infection_flow_is_counted_exactly(two_band, two_band_fc):
    """seir_two_band observes onsets, not infections; nothing flows into S, so
    the tracked infections must equal the decrease of S summed over both groups."""
    model, pf = two_band
    fc = two_band_fc
    s0 = pf.particles.states[fc.ancestors][:, :, model.compartments.index("S")].sum(axis=1)
    s = fc.latent["susceptibles"]
    np.testing.assert_array_equal(fc.latent["infections"], -np.diff(np.column_stack([s0, s]), axis=1))
    assert fc.latent["infections"].sum() > 0


def test_infections_with_waning_are_not_the_decrease_of_s():
    """seirs: waning immunity refills S, so infections >= decrease of S, strictly
    on some days (why the decrease of S is not used as incidence)."""
    model, pf = _cloud("seirs", 35, 400, 4)
    fc = forecast(model, pf.particles, pf.weights(), pf.time, 21, 400, seed=4)
    s0 = pf.particles.states[fc.ancestors, 0, model.compartments.index("S")]
    decrease = -np.diff(np.column_stack([s0, fc.latent["susceptibles"]]), axis=1)
    assert np.all(fc.latent["infections"] >= decrease)
    assert np.any(fc.latent["infections"] > decrease)


class _NoTrackingAccess:
    """A model that hides the compartmental model's incidence-tracking internals."""

    def __init__(self, model: CompartmentalModel) -> None:
        self._inner = model

    def __getattr__(self, name: str):
        if name == "_observed_flows":
            raise AttributeError(name)
        return getattr(self._inner, name)


def test_fallback_infections_are_the_first_observed_flow(sir):
    """Without access to the tracking, infections are the daily incidence of the
    first observed incidence flow; for sir that flow is the infection flow, so
    both definitions give the same numbers."""
    model, pf = sir
    exact = forecast(model, pf.particles, pf.weights(), pf.time, 5, 200, seed=12)
    fallback = forecast(_NoTrackingAccess(model), pf.particles, pf.weights(), pf.time, 5, 200, seed=12)
    assert fallback.infections_source.startswith("fallback")
    np.testing.assert_array_equal(fallback.latent["infections"], exact.latent["infections"])
    np.testing.assert_array_equal(fallback.reported["cases"], exact.reported["cases"])


# ---------------------------------------------------------- observation noise
def _total_variance_check(y: np.ndarray, mu: np.ndarray, cond_var: np.ndarray, label: str) -> None:
    """Law of total variance on the draws: var0(Y) - var0(mu) - mean(Var(Y|mu))
    equals mean(W) - ebar^2 exactly, with W = (Y-mu)^2 - Var(Y|mu) + 2 (Y-mu)(mu-mubar)
    of conditional mean 0; tolerance 4 standard errors of mean(W) plus ebar^2."""
    e = y - mu
    w = e * e - cond_var + 2 * e * (mu - mu.mean())
    gap = y.var() - mu.var() - cond_var.mean()
    tol = 4 * w.std() / math.sqrt(y.size) + e.mean() ** 2
    assert abs(gap) <= tol, f"{label}: var(Y) - var(mu) - E[Var(Y|mu)] = {gap:.3f}, tolerance {tol:.3f}"
    # the conditional variance itself: E[(Y - mu)^2 - Var(Y|mu)] = 0
    z = e * e - cond_var
    assert abs(z.mean()) <= 4 * z.std() / math.sqrt(y.size), f"{label}: conditional variance {z.mean():.3f}"
    assert y.var() >= mu.var(), label


def test_observation_noise_poisson_law_of_total_variance(sir):
    model, pf = sir
    fc = forecast(model, pf.particles, pf.weights(), pf.time, 14, 4000, seed=6)
    for h in (0, 6, 13):
        y, mu = fc.reported["cases"][:, h].astype(float), fc.expected["cases"][:, h]
        _total_variance_check(y, mu, mu, f"sir day {h + 1}")  # Poisson: Var(Y | mu) = mu


def test_observation_noise_negbin_law_of_total_variance(two_band):
    model, pf = two_band
    fc = forecast(model, pf.particles, pf.weights(), pf.time, 14, 4000, seed=7)
    k = pf.particles.params[fc.ancestors, model.param_names.index("k")]  # static: unchanged ahead
    for name in fc.reported:
        for h in (0, 13):
            y, mu = fc.reported[name][:, h].astype(float), fc.expected[name][:, h]
            _total_variance_check(y, mu, mu + mu * mu / k, f"{name} day {h + 1}")


# ----------------------------------------------------------------- message
def _numbers(value):
    if isinstance(value, dict):
        for v in value.values():
            yield from _numbers(v)
    elif isinstance(value, list):
        for v in value:
            yield from _numbers(v)
    else:
        yield value


def test_message_block_is_compact_json(two_band_fc, capsys):
    fc = two_band_fc
    block = fc.to_message_block()
    raw = orjson.dumps(block)
    assert orjson.loads(raw) == block
    numbers = list(_numbers(block))
    assert all(isinstance(x, (int, float, str)) and not isinstance(x, bool) for x in numbers)
    assert all(math.isfinite(x) for x in numbers if isinstance(x, (int, float)))
    assert block["levels"] == list(FORECAST_LEVELS)
    assert set(block["series"]) == {"ed_child", "ed_adult"}
    assert set(block["latent"]) == {"infections", "susceptibles", "R_eff"}
    for entry in [*block["series"].values(), *block["latent"].values()]:
        assert len(entry["mean"]) == 28
        assert len(entry["quantiles"]) == 23 and all(len(row) == 28 for row in entry["quantiles"])
    q = fc.quantiles()
    assert block["series"]["ed_child"]["quantiles"] == np.round(q["ed_child"], 1).tolist()
    assert block["latent"]["R_eff"]["quantiles"] == np.round(q["latent.R_eff"], 3).tolist()
    assert block["latent"]["susceptibles"]["mean"] == np.round(fc.mean()["latent.susceptibles"]).tolist()
    assert block["growth_probability"] == round(fc.growth_probability(7), 4)
    assert set(block["series"]["ed_child"]["peak"]) == {"day", "size", "p_at_horizon"}
    with capsys.disabled():
        print(f"\nmessage block, seir_two_band, 2 series x 28 days, 2000 trajectories: {len(raw)} bytes")
    # the size stated in Forecast.to_message_block's docstring (about 22 kB), with room for other clouds
    assert 15_000 < len(raw) < 35_000
