"""Susceptible build-up: the forecast sees a surge coming while counts are flat.

Epidemiology. In a well-mixed SIR population the effective reproduction number
is R_eff = R0 x S / N, and an outbreak grows only while R_eff > 1, i.e. while
the susceptible fraction is above the threshold 1 / R0. After an epidemic the
population sits below that threshold; births (or waning immunity) then refill
the susceptible pool at a roughly constant rate, so R_eff climbs steadily while
imported infections still fizzle out in short chains and reported counts stay
flat and low. Once S / N passes 1 / R0 the next imported chain takes off: the
inter-epidemic surge. (Anderson & May (1991), "Infectious Diseases of Humans:
Dynamics and Control", Oxford University Press, chapter 6 on the threshold and
the recurrence of epidemics driven by the supply of susceptibles; from memory.)

A forecast made from the particle cloud carries the mechanism: each particle's
susceptibles keep growing in its simulated futures, so the probability that
reported cases pass a surge threshold within the next 28 days rises through
the flat period, before the counts move. The information is mechanistic (the
model's structure and its prior on the immune fraction and on R0); flat counts
carry little of it. A trend method that only extrapolates recent counts cannot
see it: here a log-linear least-squares fit of log(y + 1) on the last 14 daily
counts, projected 28 days ahead with Poisson noise around the projection
(common practice for short-term trend extrapolation; the +1 keeps zero counts).

Flat period: days 1 to the last forecast origin (every 7 days from day 14) at
least two weeks before the surge onset, the first day above the threshold.
One season (seed 0, fixed before looking at any run) is shown and checked in
full; a slow check over seeds 0-9 shows the behaviour is not one lucky season.

Fixture: tests/filters/specs/buildup_sirs.toml (R0 = 6, 2-day infectious
period, turnover 1/500 per day, 0.2 to 1 imported infections a day, 25% of
infections reported). The truth starts with 4% susceptible (R_eff = 0.24) and
one infective; the surge threshold is 30 reported cases in a day.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

import schemas
from filters import CompartmentalModel, FilterConfig, Observation, ParticleFilter, forecast

SPEC = Path(__file__).parent / "specs" / "buildup_sirs.toml"
THRESHOLD = 30  # reported cases in one day
HORIZON = 28
N = 1_000_000


def _rng(*words: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(list(words))))


def _truth(model: CompartmentalModel, seed: int, days: int) -> np.ndarray:
    """Daily reported cases of one simulated season, from a known state."""
    rng = _rng(seed, 0)
    ps = model.initial(1, rng)
    ps.params[0, model.param_names.index("beta")] = 3.012  # R0 = 3.012 / (0.5 + 0.002) = 6
    ps.states[0, 0] = [40_000, 1, N - 40_001]  # S, I, R
    cases = np.empty(days, dtype=np.int64)
    for day in range(1, days + 1):
        model.advance(ps, day - 1, day, rng)
        cases[day - 1] = model.sample_observation(ps, rng)["cases"][0]
    return cases


def _naive_probability(recent: np.ndarray) -> float:
    """P(some day of the next 28 > threshold) under the log-linear extrapolation:
    least squares of log(y + 1) on the day over the last 14 days, projected,
    Poisson counts around the projected means, days independent."""
    x = np.arange(14.0)
    slope, intercept = np.polyfit(x, np.log(recent[-14:] + 1.0), 1)
    means = np.maximum(np.exp(intercept + slope * (13.0 + np.arange(1, HORIZON + 1))) - 1.0, 0.0)
    return float(1.0 - np.prod(stats.poisson.cdf(THRESHOLD, means)))


def build_up(seed: int) -> dict:
    """Run the filter through the flat period; a forecast every 7 days."""
    model = CompartmentalModel(schemas.load_model_spec(SPEC))
    cases = _truth(model, seed, 200)
    onset = int(np.argmax(cases > THRESHOLD)) + 1  # first day above the threshold
    assert cases.max() > THRESHOLD, "the simulated season has no surge within 200 days"
    flat_end = 7 * ((onset - 14) // 7)  # last origin at least two weeks before the surge
    origins = list(range(14, flat_end + 1, 7))
    pf = ParticleFilter(model, FilterConfig(n_particles=2000), _rng(seed, 1))
    path = []
    for day in range(1, flat_end + 1):
        pf.step(Observation(day, {"cases": float(cases[day - 1])}), with_summary=False)
        if day in origins:
            fc = forecast(model, pf.particles, pf.weights(), day, HORIZON, 1000, seed=seed * 1000 + day)
            w = pf.weights()
            path.append(
                {
                    "day": day,
                    "cases_last_14": int(cases[day - 14 : day].sum()),
                    "p_model": fc.exceedance("cases", THRESHOLD, HORIZON),
                    "p_naive": _naive_probability(cases[:day]),
                    "S/N": float(w @ pf.particles.states[:, 0, 0]) / N,
                    "R_eff": float(fc.mean()["latent.R_eff"][0]),
                }
            )
    return {"onset": onset, "flat_end": flat_end, "cases": cases, "path": path}


def _table(run: dict) -> str:
    lines = [f"surge onset (first day > {THRESHOLD} cases): day {run['onset']}; flat period: days 1-{run['flat_end']}"]
    lines.append(" day  cases(14d)  P(surge in 28d) model   naive   S/N    R_eff")
    for r in run["path"]:
        lines.append(
            f"{r['day']:4d}  {r['cases_last_14']:10d}  {r['p_model']:21.3f}  {r['p_naive']:6.3f}  "
            f"{r['S/N']:.4f} {r['R_eff']:.3f}"
        )
    return "\n".join(lines)


def test_exceedance_probability_rises_while_counts_stay_flat(capsys):
    run = build_up(seed=0)
    table = _table(run)
    with capsys.disabled():
        print("\n" + table)
    path = run["path"]
    p_model = np.array([r["p_model"] for r in path])
    p_naive = np.array([r["p_naive"] for r in path])
    flat = run["cases"][: run["flat_end"]]
    # the scenario is what it claims: a long flat, low period well before the surge
    assert len(path) >= 8, table
    assert flat.max() <= THRESHOLD / 3 and flat.mean() <= 1.5, table
    # the model's probability starts near zero and rises through the flat period
    assert p_model[0] <= 0.02, table
    assert p_model[-1] >= 0.5 and p_model[-1] - p_model[0] >= 0.5, table
    assert stats.spearmanr(np.arange(p_model.size), p_model).statistic >= 0.9, table
    # ... while the trend extrapolation stays low: at the end and over the last three forecasts
    assert p_model[-1] - p_naive[-1] >= 0.3, table
    assert p_model[-3:].mean() - p_naive[-3:].mean() >= 0.3, table
    # the filter's own estimate shows the mechanism: susceptibles and R_eff grow
    assert path[-1]["S/N"] > path[0]["S/N"] and path[-1]["R_eff"] > path[0]["R_eff"] + 0.3, table


def _first_origin(path: list[dict], key: str, level: float) -> int | None:
    return next((r["day"] for r in path if r[key] >= level), None)


@pytest.mark.slow
def test_build_up_warning_is_not_one_lucky_season(capsys):
    """Seeds 0-9. In every season the model's probability starts near zero,
    rises through the flat period and is at least 0.5 at its end. The trend
    method sometimes fires too at the end, when the take-off has begun in the
    last two weeks of counts (or on a chance blip), so the comparison is over
    the seasons: the model gives a first warning (probability >= 0.03) at least
    a week before the trend method does (or the trend method never does) in at
    least 8 of 10 seasons, and on average its probability at the end of the
    flat period is higher by at least 0.3."""
    rows, leads, gaps = [], 0, []
    for seed in range(10):
        run = build_up(seed)
        path = run["path"]
        p_model = np.array([r["p_model"] for r in path])
        p_naive = np.array([r["p_naive"] for r in path])
        first_model = _first_origin(path, "p_model", 0.03)
        first_naive = _first_origin(path, "p_naive", 0.03)
        lead = first_model is not None and (first_naive is None or first_naive - first_model >= 7)
        leads += lead
        gaps.append(p_model[-1] - p_naive[-1])
        rows.append(
            f"seed {seed}: onset day {run['onset']}, model path {np.round(p_model, 3).tolist()}, "
            f"naive path {np.round(p_naive, 3).tolist()}, first warning model day {first_model} / naive day {first_naive}"
        )
        table = "\n".join(rows)
        assert p_model[0] <= 0.02 and p_model[-1] >= 0.5, table
        assert stats.spearmanr(np.arange(p_model.size), p_model).statistic >= 0.9, table
    table = "\n".join(rows) + f"\nmodel leads in {leads}/10; mean end gap {np.mean(gaps):.3f}"
    with capsys.disabled():
        print("\n" + table)
    assert leads >= 8, table
    assert np.mean(gaps) >= 0.3, table
