"""Calibration of filter + forecast on seasons drawn from the model's own prior.

Why this test is valid: when the "truth" is simulated from the very model and
prior the filter starts from, the exact Bayesian predictive distribution
p(y_{t+7} | y_1..t) is calibrated by construction: the probability integral
transform (PIT) of the realised count is uniform, central intervals cover at
their nominal rate and event probabilities are reliable. A particle filter and
a Monte Carlo forecast approximate that predictive; the checks below ask that
the approximation is good enough not to be told apart from calibrated with
this many forecasts, and a negative control shows the same checks do reject
a forecast that leaves out observation noise.

Set-up (numbers stated because the power depends on them): the ``seir``
example (drifting transmission rate, static reporting fraction and negative
binomial dispersion, gamma reporting delay), 240 seasons of 70 days each,
400 particles, forecasts of 500 trajectories issued on days 14, 21, ..., 63
(8 origins per season, 1920 forecasts), each 7 days ahead. Origins are 7 days
apart, so the target of one forecast is observed before the next is issued:
under the exact predictive the PITs of one season are independent (each is
uniform given everything observed before it), and seasons are independent.

Sources
-------
- Randomised PIT for count data: u = F(y - 1) + v (F(y) - F(y - 1)),
  v ~ U(0, 1): Czado, Gneiting & Held (2009), "Predictive model assessment for
  count data", Biometrics 65(4):1254-1261 (from memory). Uniform exactly under
  a calibrated predictive, so central-interval coverage read off the PIT has
  exactly its nominal rate even for small counts.
- Uniformity: Pearson chi-square on 10 equal bins and Kolmogorov-Smirnov,
  both from scipy.stats (reference library), each at level 0.01.
- Reliability diagram: Murphy & Winkler (1977), "Reliability of subjective
  probability forecasts of precipitation and temperature", Applied
  Statistics 26(1):41-47; consistency band for each bin's observed count as in
  Broecker & Smith (2007), "Increasing the reliability of reliability
  diagrams", Weather and Forecasting 22(3):651-661 (both from memory), here in
  its normal approximation: the count of events in a bin is Poisson-binomial
  with mean sum(p) and variance sum(p (1 - p)).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import schemas
from filters import CompartmentalModel, FilterConfig, ParticleFilter, forecast, simulate_season

SEASONS = 240
DAYS = 70
PARTICLES = 400
TRAJECTORIES = 500
ORIGINS = tuple(range(14, DAYS - 7 + 1, 7))  # 14, 21, ..., 63
AHEAD = 7
ALPHA = 0.01  # level of each uniformity test


def _rng(*words: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(list(words))))


@pytest.fixture(scope="module")
def calibration():
    model = CompartmentalModel(schemas.load_model_spec(schemas.example_model_path("seir")))
    series = "onsets"
    out: dict[str, list] = {k: [] for k in ("pit", "pit_no_noise", "inside50", "inside90", "p", "event")}
    for s in range(SEASONS):
        truth = simulate_season(model, DAYS, _rng(2024, s, 0))
        y = np.array([o.values[series] for o in truth.observations])  # y[d - 1] is day d
        pf = ParticleFilter(model, FilterConfig(n_particles=PARTICLES), _rng(2024, s, 1))
        aux = _rng(2024, s, 2)  # PIT randomisation and thresholds: independent of everything else
        for obs in truth.observations[: ORIGINS[-1]]:
            pf.step(obs, with_summary=False)
            if pf.time not in ORIGINS:
                continue
            fc = forecast(model, pf.particles, pf.weights(), pf.time, AHEAD, TRAJECTORIES, seed=s * 1000 + pf.time)
            target = y[pf.time + AHEAD - 1]
            v = aux.random()
            draws = fc.reported[series][:, AHEAD - 1]
            out["pit"].append(np.mean(draws < target) + v * np.mean(draws == target))
            # negative control: the noise-free expected counts as the predictive
            mean = fc.expected[series][:, AHEAD - 1]
            out["pit_no_noise"].append(np.mean(mean < target) + v * np.mean(mean == target))
            q = fc.quantiles((0.05, 0.25, 0.75, 0.95))[series][:, AHEAD - 1]
            out["inside50"].append(q[1] <= target <= q[2])
            out["inside90"].append(q[0] <= target <= q[3])
            # an exceedance alert: threshold from what is known at the origin only
            recent = y[pf.time - 7 : pf.time].mean()
            threshold = max(3.0, aux.uniform(0.8, 2.0) * recent)
            out["p"].append(fc.exceedance(series, threshold, AHEAD))
            out["event"].append(bool(np.any(y[pf.time : pf.time + AHEAD] > threshold)))
    return {k: np.array(v) for k, v in out.items()}


def _uniformity(pit: np.ndarray) -> tuple[np.ndarray, float, float, float, float]:
    counts = np.histogram(pit, bins=10, range=(0.0, 1.0))[0]
    chi = stats.chisquare(counts)
    ks = stats.kstest(pit, "uniform")
    return counts, float(chi.statistic), float(chi.pvalue), float(ks.statistic), float(ks.pvalue)


@pytest.mark.slow
def test_randomised_pit_is_uniform(calibration, capsys):
    pit = calibration["pit"]
    assert pit.size == SEASONS * len(ORIGINS)
    counts, chi, chi_p, ks, ks_p = _uniformity(pit)
    report = f"PIT n={pit.size} bins={counts.tolist()} chi2={chi:.2f} p={chi_p:.3f} KS D={ks:.4f} p={ks_p:.3f}"
    with capsys.disabled():
        print("\n" + report)
    assert chi_p > ALPHA and ks_p > ALPHA, report


@pytest.mark.slow
def test_pit_check_rejects_a_forecast_without_observation_noise(calibration, capsys):
    """The same check has the power to fail: with the expected counts standing in
    for the reported ones (no observation noise), the PIT piles up at 0 and 1."""
    counts, chi, chi_p, ks, ks_p = _uniformity(calibration["pit_no_noise"])
    report = f"no-noise PIT bins={counts.tolist()} chi2={chi:.1f} p={chi_p:.2e} KS p={ks_p:.2e}"
    with capsys.disabled():
        print("\n" + report)
    assert chi_p < 1e-6 and ks_p < 1e-6, report


@pytest.mark.slow
def test_central_interval_coverage(calibration, capsys):
    """Coverage within 5 points of nominal. Basis: with n = 1920 independent
    forecasts the binomial standard error is 1.1 points at 50% and 0.7 at 90%,
    so 5 points is more than 4 standard errors; the Monte Carlo error of a PIT
    from 500 trajectories (sd at most 0.022) blurs the interval edges by far
    less. Coverage is read off the randomised PIT (exactly nominal when
    calibrated, even for small counts); the quantile intervals of the forecast
    itself are closed intervals of counts and may only over-cover, by the
    probability mass at their ends."""
    pit = calibration["pit"]
    cov50 = float(np.mean((pit > 0.25) & (pit < 0.75)))
    cov90 = float(np.mean((pit > 0.05) & (pit < 0.95)))
    q50 = float(calibration["inside50"].mean())
    q90 = float(calibration["inside90"].mean())
    report = f"coverage (PIT) 50%: {cov50:.3f} 90%: {cov90:.3f}; quantile intervals 50%: {q50:.3f} 90%: {q90:.3f}"
    with capsys.disabled():
        print("\n" + report)
    assert abs(cov50 - 0.50) <= 0.05 and abs(cov90 - 0.90) <= 0.05, report
    assert q50 >= 0.45 and q90 >= 0.85, report


@pytest.mark.slow
def test_exceedance_probabilities_are_reliable(calibration, capsys):
    """Reliability diagram with 5 equal-width bins of the predicted probability.
    In every bin with at least 30 forecasts the observed number of exceedances is
    within z * sd of the expected number sum(p), sd^2 = sum(p (1 - p)) plus the
    Monte Carlo variance of each p from 500 trajectories, sum(p (1 - p)) / 500;
    z = 2.576 (two-sided 1%, Bonferroni over the 5 bins: 5% family-wise)."""
    p, event = calibration["p"], calibration["event"]
    bins = np.minimum((p * 5).astype(int), 4)
    rows, failures, populated = [], [], 0
    for b in range(5):
        sel = bins == b
        n = int(sel.sum())
        if n == 0:
            rows.append(f"[{b / 5:.1f}, {(b + 1) / 5:.1f}) n=0")
            continue
        expected = float(p[sel].sum())
        observed = int(event[sel].sum())
        var = float(np.sum(p[sel] * (1 - p[sel]))) * (1 + 1 / TRAJECTORIES)
        band = 2.576 * math.sqrt(var)
        rows.append(
            f"[{b / 5:.1f}, {(b + 1) / 5:.1f}) n={n} mean p={expected / n:.3f} "
            f"observed={observed / n:.3f} (count {observed} vs {expected:.1f} +- {band:.1f})"
        )
        if n >= 30:
            populated += 1
            if abs(observed - expected) > band:
                failures.append(b)
    report = "reliability:\n  " + "\n  ".join(rows)
    with capsys.disabled():
        print("\n" + report)
    assert populated >= 3, report
    assert not failures, report
