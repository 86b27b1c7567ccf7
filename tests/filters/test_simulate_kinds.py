"""simulate_season with positivity and concentration series (tests/filters/specs/sir_all_kinds.toml:
cases, lab_pos binomial out of tests, ww log-normal with sd 0.3)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from filters import CompartmentalModel, delay_kernel, simulate_season
from schemas import load_model_spec

SPECS = Path(__file__).parent / "specs"
DAYS = 60


def model(name: str = "sir_all_kinds") -> CompartmentalModel:
    return CompartmentalModel(load_model_spec(SPECS / f"{name}.toml"))


def test_positives_out_of_the_days_tests_match_the_binomial_mean_and_variance():
    """Positives ~ Binomial(tests, p_t) with p_t = 1 - (1 - 0.02) exp(-20 x_t), x_t the true share in I
    (schemas.Positivity). Summed over the season, (sum y - sum n p) / sqrt(sum n p (1 - p)) is
    approximately standard normal (sum of independent binomials, normal approximation); |z| < 4 fails
    by chance with probability 6e-5. Bug caught: the tests ignored (positives drawn out of another n),
    or p read from the wrong compartment (a z of hundreds)."""
    m = model()
    tests = [0 if d % 5 == 0 else 150 + d for d in range(1, DAYS + 1)]
    season = simulate_season(m, DAYS, np.random.default_rng(11), {"beta": 0.5}, tests={"lab_pos": tests})
    share = season.states[1:, 0, 1] / season.states[1:].sum(axis=(1, 2))
    p = 1 - 0.98 * np.exp(-20.0 * share)
    ys, ns, ps = [], [], []
    for o, n, pt in zip(season.observations, tests, p):
        if n == 0:
            assert o.values["lab_pos"] is None and "lab_pos" not in o.trials  # no tests: not reported
            continue
        assert o.trials["lab_pos"] == n and 0 <= o.values["lab_pos"] <= n and o.values["lab_pos"] == int(o.values["lab_pos"])
        ys.append(o.values["lab_pos"]), ns.append(n), ps.append(pt)
    ys, ns, ps = map(np.asarray, (ys, ns, ps))
    assert ps.max() > 0.3  # an epidemic, so the check has a signal to follow
    z = (ys.sum() - (ns * ps).sum()) / math.sqrt((ns * ps * (1 - ps)).sum())
    assert abs(z) < 4, z


def test_concentrations_follow_the_shedding_convolution_with_log_normal_noise_and_are_censored_below_the_limit():
    """Median = scale * catchment * (incidence convolved with the gamma shedding profile), computed
    here with numpy.convolve from the season's true daily infections; log(value / median) ~ N(0, 0.3^2).
    Over 40 days the sample mean of the log ratio has sd 0.3 / sqrt(40) = 0.047 (tolerance 0.2, over
    4 sd) and the sample sd is within 0.3 +- 0.1 (the sd of a sample sd of 40 normals is about
    0.3 / sqrt(80) = 0.034; 0.1 is 3 of them). Censoring draws no random numbers, so the same seed with
    a limit gives the same samples, those below it replaced by 0.0 with the limit."""
    m = model()
    kw = {"params": {"beta": 0.5}, "tests": {"lab_pos": 100}}
    free = simulate_season(m, DAYS, np.random.default_rng(5), **kw)
    kernel = delay_kernel("gamma", 6.0, 3.0, 20)
    infections = free.incidence["infection"]
    assert infections.shape == (DAYS,)
    # the true daily infections are the S compartment's fall (SIR: infection is S's only exit)
    assert np.array_equal(infections, -np.diff(free.states[:, 0, 0]))
    # model day t's load: sum_d w_d I(t - d), days before day 1 had no infections
    median = 10.0 * 0.5 * np.convolve(infections, kernel)[:DAYS]
    values = np.array([o.values["ww"] for o in free.observations])
    use = np.arange(DAYS) >= 20  # once the profile's 20 days are all inside the season
    ratio = np.log(values[use] / median[use])
    assert abs(ratio.mean()) < 0.2 and abs(ratio.std(ddof=1) - 0.3) < 0.1, (ratio.mean(), ratio.std(ddof=1))
    lod = float(np.quantile(values, 0.4))
    censored = simulate_season(m, DAYS, np.random.default_rng(5), **kw, limits={"ww": lod})
    got = np.array([o.values["ww"] for o in censored.observations])
    below = values < lod
    assert below.sum() >= 10  # the check sees censored samples
    assert np.array_equal(got[~below], values[~below]) and np.all(got[below] == 0.0)
    assert all(o.limits == {"ww": lod} for o in censored.observations)


def test_a_sample_flow_dilutes_by_reference_flow_over_flow():
    """sir_wastewater's ww_west (reference_flow 2e7): the same draws at twice the flow are halved."""
    m = model("sir_wastewater")
    base = simulate_season(m, 20, np.random.default_rng(2), flows={"ww_west": 2.0e7})
    double = simulate_season(m, 20, np.random.default_rng(2), flows={"ww_west": 4.0e7})
    a = np.array([o.values["ww_west"] for o in base.observations])
    b = np.array([o.values["ww_west"] for o in double.observations])
    np.testing.assert_allclose(b, a / 2, rtol=1e-12)
    assert double.observations[0].flows == {"ww_west": 4.0e7}
    with pytest.raises(ValueError, match="'ww_east', whose spec sets no reference_flow"):
        simulate_season(m, 5, np.random.default_rng(2), flows={"ww_east": 1.0e7})


@pytest.mark.parametrize(
    "kwargs, says",
    [
        ({}, r"positivity series \['lab_pos'\] need their number of tests"),
        ({"tests": {"lab_pos": 10, "cases": 10}}, "tests given for series 'cases', which is not a positivity series"),
        ({"tests": {"lab_pos": [10, 10]}}, "2 values given; allowed: one per day 1..5"),
        ({"tests": {"lab_pos": 10.5}}, "allowed: whole numbers >= 0"),
        ({"tests": {"lab_pos": 10}, "limits": {"ww": 0.0}}, "limit of detection of series 'ww': allowed: finite numbers > 0"),
        ({"tests": {"lab_pos": 10}, "limits": {"cases": 1.0}}, "not a concentration series"),
    ],
)
def test_bad_arguments_say_what_is_allowed(kwargs, says):
    with pytest.raises(ValueError, match=says):
        simulate_season(model(), 5, np.random.default_rng(0), **kwargs)


def test_models_without_the_new_kinds_draw_as_before():
    """No extra random numbers for count-only models: the fifth day's state equals a hand-run
    of initial/advance/sample_observation with the same generator (the pre-change loop)."""
    m = CompartmentalModel(load_model_spec(SPECS / "sir_tiny.toml"))
    season = simulate_season(m, 5, np.random.default_rng(4))
    rng = np.random.default_rng(4)
    ps = m.initial(1, rng)
    for day in range(1, 6):
        m.advance(ps, day - 1, day, rng)
        drawn = m.sample_observation(ps, rng)
        assert season.observations[day - 1].values == {k: float(v[0]) for k, v in drawn.items()}
    assert np.array_equal(season.states[-1], ps.states[0])
