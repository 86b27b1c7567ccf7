"""``run_scenarios``: the baseline and intervention scenarios from one cloud with
common random numbers.

External facts checked:

* Monotonicity in the transmission rate. In the Sellke (1983) construction of
  the stochastic SIR/SEIR epidemic (each susceptible has an exponential
  threshold and is infected when the infection pressure it has received
  passes it; cited from memory) lowering the infection rate lowers the
  pressure at every time, so fewer people are infected by any date: expected
  infections and cases cannot increase when transmission is reduced.
* Common random numbers reduce the variance of the difference between two
  scenarios when both outputs respond in the same direction to the shared
  random numbers (Glasserman & Yao 1992, "Some guidelines and guarantees for
  common random numbers", Management Science 38(6); cited from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from filters import CompartmentalModel, Interval, compile_interventions, forecast, run_scenarios
from schemas import (
    BASELINE,
    ContactChange,
    RateChange,
    Scenario,
    ScenarioThreshold,
    Vaccination,
    example_model_path,
    example_scenario_path,
    load_model_spec,
    load_scenario_file,
)

TWO_BAND = CompartmentalModel(load_model_spec(example_model_path("seir_two_band")))
ORIGIN = 10


@pytest.fixture(scope="module")
def cloud():
    ps = TWO_BAND.initial(600, np.random.default_rng(31))
    TWO_BAND.advance(ps, 0, ORIGIN, np.random.default_rng(32))
    weights = np.random.default_rng(33).uniform(0.5, 1.5, ps.size)
    return ps, weights


def scenario(name: str, *interventions) -> Scenario:
    return Scenario(name=name, interventions=list(interventions))


def transmission(factor: float, **window) -> RateChange:
    return RateChange(kind="rate", flow="infection", factor=factor, **window)


def test_no_change_scenarios_reproduce_the_baseline_exactly(cloud):
    ps, w = cloud
    report = run_scenarios(
        TWO_BAND,
        ps,
        w,
        ORIGIN,
        [
            scenario("nothing"),
            scenario("factor-one", transmission(1.0), ContactChange(kind="contact", factors=[[1, 1], [1, 1]])),
            scenario("after-the-horizon", transmission(0.1, start_day=30)),
        ],
        horizon=21,
        n_trajectories=300,
        seed=8,
    )
    base = report.forecasts[BASELINE]
    for name in ("nothing", "factor-one", "after-the-horizon"):
        fc = report.forecasts[name]
        for series in base.reported:
            np.testing.assert_array_equal(fc.reported[series], base.reported[series], err_msg=f"{name}/{series}")
            np.testing.assert_array_equal(fc.expected[series], base.expected[series], err_msg=f"{name}/{series}")
        np.testing.assert_array_equal(fc.latent["infections"], base.latent["infections"])
        o = report.outcome(name)
        assert o.averted_cases == Interval(0.0, 0.0, 0.0, 0.0) and o.averted_infections == Interval(0.0, 0.0, 0.0, 0.0)
        assert o.cases == report.outcome(BASELINE).cases
    assert any("after-the-horizon" in note and "no effect" in note for note in report.notes)


def test_baseline_comes_first_and_has_no_averted_figures(cloud):
    ps, w = cloud
    report = run_scenarios(TWO_BAND, ps, w, ORIGIN, scenario("half", transmission(0.5)), 14, 200, 1)
    assert report.names == [BASELINE, "half"]
    base = report.outcome(BASELINE)
    assert base.averted_cases is None and base.averted_infections is None
    assert report.cases_series == ("ed_child", "ed_adult") and report.cases_cadence == "daily"
    # Cases are the per-trajectory sums of both ED series over the horizon.
    fc = report.forecasts["half"]
    totals = fc.reported["ed_child"].sum(axis=1) + fc.reported["ed_adult"].sum(axis=1)
    assert report.outcome("half").cases == Interval.of(totals, report.levels)
    paired = report.forecasts[BASELINE].reported["ed_child"].sum(axis=1) + report.forecasts[BASELINE].reported["ed_adult"].sum(axis=1)
    assert report.outcome("half").averted_cases == Interval.of(paired - totals, report.levels)
    combined = fc.reported["ed_child"] + fc.reported["ed_adult"]
    assert report.outcome("half").peak_day == Interval.of(np.argmax(combined, axis=1) + 1, report.levels)


def test_stronger_transmission_reductions_never_increase_expected_cases(cloud):
    ps, w = cloud
    factors = [1.0, 0.8, 0.6, 0.4]
    report = run_scenarios(
        TWO_BAND, ps, w, ORIGIN, [scenario(f"x{f}", transmission(f)) for f in factors], 28, 800, 21
    )
    names = [BASELINE] + [f"x{f}" for f in factors]
    infections = [report.outcome(n).infections.mean for n in names]
    cases = [report.outcome(n).cases.mean for n in names]
    expected = [sum(report.forecasts[n].expected[s].sum(axis=1).mean() for s in ("ed_child", "ed_adult")) for n in names]
    assert infections[0] == infections[1] and cases[0] == cases[1]  # x1.0 is the baseline
    for label, values in (("infections", infections), ("reported cases", cases), ("expected cases", expected)):
        steps = np.diff(values[1:])
        assert np.all(steps < 0), f"{label} by factor {factors}: {values[1:]}"


def test_common_random_numbers_reduce_the_variance_of_scenario_differences(cloud, record_property):
    ps, w = cloud
    lower = scenario("distancing", transmission(0.8))
    report = run_scenarios(TWO_BAND, ps, w, ORIGIN, lower, 28, 1000, 5)
    base_crn = report.forecasts[BASELINE].latent["infections"].sum(axis=1)
    scen_crn = report.forecasts["distancing"].latent["infections"].sum(axis=1)
    # Independent random numbers: the scenario with another seed (other particles, other draws).
    from filters import compile_interventions

    other = forecast(TWO_BAND, ps, w, ORIGIN, 28, 1000, seed=6, effects=compile_interventions(TWO_BAND, lower, ORIGIN))
    scen_ind = other.latent["infections"].sum(axis=1)
    var_crn = np.var(base_crn - scen_crn, ddof=1)
    var_ind = np.var(base_crn - scen_ind, ddof=1)
    ratio = var_crn / var_ind
    record_property("crn_variance_ratio_infections", float(ratio))
    assert ratio < 1.0, f"CRN variance {var_crn:.4g} vs independent {var_ind:.4g} (ratio {ratio:.3f})"
    # Same for reported cases (observation noise is shared too).
    cases = lambda fc: fc.reported["ed_child"].sum(axis=1) + fc.reported["ed_adult"].sum(axis=1)  # noqa: E731
    ratio_cases = np.var(cases(report.forecasts[BASELINE]) - cases(report.forecasts["distancing"]), ddof=1) / np.var(
        cases(report.forecasts[BASELINE]) - cases(other), ddof=1
    )
    record_property("crn_variance_ratio_cases", float(ratio_cases))
    assert ratio_cases < 1.0, f"reported cases: CRN/independent variance ratio {ratio_cases:.3f}"


def test_the_same_seed_gives_the_same_report(cloud):
    ps, w = cloud
    sc = [scenario("vax", Vaccination(kind="vaccination", source="S", target="R", rate_per_day=0.02, efficacy=0.7))]
    a = run_scenarios(TWO_BAND, ps, w, ORIGIN, sc, 10, 150, 44, thresholds=[("ed_child", 20)])
    b = run_scenarios(TWO_BAND, ps, w, ORIGIN, sc, 10, 150, 44, thresholds=[("ed_child", 20)])
    assert a.as_dict() == b.as_dict() and a.rows() == b.rows()
    c = run_scenarios(TWO_BAND, ps, w, ORIGIN, sc, 10, 150, 45, thresholds=[("ed_child", 20)])
    assert a.as_dict() != c.as_dict()


def test_thresholds_exceedance_and_its_change(cloud):
    ps, w = cloud
    report = run_scenarios(
        TWO_BAND,
        ps,
        w,
        ORIGIN,
        [scenario("stop", transmission(0.0))],
        14,
        400,
        3,
        thresholds=[("ed_child", 10, 7), ScenarioThreshold(series="latent.infections", threshold=500, within_days=40)],
    )
    keys = [t.key for t in report.thresholds]
    assert keys == ["ed_child>10 within 7d", "latent.infections>500 within 14d"]
    assert any("beyond the horizon" in n for n in report.notes)
    for name in report.names:
        fc = report.forecasts[name]
        hits = np.any(fc.reported["ed_child"][:, :7] > 10, axis=1)
        assert report.outcome(name).exceedance[keys[0]].p == hits.mean()
        prob = report.outcome(name).exceedance[keys[1]]
        assert prob.low <= prob.p <= prob.high
    change = report.outcome("stop").exceedance_change[keys[1]]
    assert change == report.outcome("stop").exceedance[keys[1]].p - report.outcome(BASELINE).exceedance[keys[1]].p
    assert report.outcome("stop").exceedance[keys[1]].p == 0.0  # no infections at all
    with pytest.raises(ValueError, match="series 'icu' is not in the forecast"):
        run_scenarios(TWO_BAND, ps, w, ORIGIN, [], 5, 10, 0, thresholds=[("icu", 3)])


@pytest.mark.parametrize("k, n", [(30, 100), (0, 50), (50, 50), (7, 2000), (1999, 2000)])
def test_exceedance_interval_is_the_wilson_score_interval(k, n):
    """Reference library: statsmodels.stats.proportion.proportion_confint(method="wilson")."""
    from statsmodels.stats.proportion import proportion_confint

    from filters import Probability

    hits = np.zeros(n, dtype=bool)
    hits[:k] = True
    prob = Probability.of(hits, 0.90)
    low, high = proportion_confint(k, n, alpha=0.10, method="wilson")
    assert prob.p == k / n
    assert prob.low == pytest.approx(low, abs=1e-12) and prob.high == pytest.approx(high, abs=1e-12)


def test_weekly_series_are_counted_in_complete_weeks():
    model = CompartmentalModel(load_model_spec(example_model_path("seirs")))
    ps = model.initial(300, np.random.default_rng(2))
    model.advance(ps, 0, 14, np.random.default_rng(3))
    report = run_scenarios(model, ps, np.ones(ps.size), 14, [scenario("less", transmission(0.5))], 17, 200, 9)
    assert report.cases_cadence == "weekly" and report.cases_series == ("weekly_cases",)
    fc = report.forecasts["less"]
    blocks = fc.weekly("weekly_cases")
    assert blocks.shape == (200, 2)
    assert report.outcome("less").cases == Interval.of(blocks.sum(axis=1), report.levels)
    for x in (report.outcome("less").peak_day.low, report.outcome("less").peak_day.high):
        assert x in (7.0, 14.0) or 7.0 < x < 14.0
    days = report.outcome("less").per_series["weekly_cases"]["peak_day"]
    assert days.low >= 7 and days.high <= 14


def test_a_scenario_file_and_its_thresholds(cloud):
    ps, w = cloud
    loaded = load_scenario_file(example_scenario_path("brackenford_schools"), TWO_BAND.spec)
    report = run_scenarios(TWO_BAND, ps, w, ORIGIN, loaded, loaded.horizon_days, 100, 2)
    assert report.names == [BASELINE, "school-closure", "closure-and-vaccination", "distancing"]
    assert [t.key for t in report.thresholds] == ["ed_child>40 within 28d", "ed_adult>60 within 56d"]
    rows = report.rows()
    assert {r["scenario"] for r in rows} == set(report.names)
    as_dict = report.as_dict()
    for row in rows:
        if row["metric"] == "cases":
            entry = next(s for s in as_dict["scenarios"] if s["name"] == row["scenario"])
            assert entry["cases"]["median"] == row["median"]
    daily = report.daily()
    assert len(daily) == 4 * 56 * 3  # scenarios x days x (2 series + latent infections)


def test_bad_arguments_are_refused_with_what_was_given(cloud):
    ps, w = cloud
    with pytest.raises(ValueError, match="horizon must be a whole number >= 1, got 0"):
        run_scenarios(TWO_BAND, ps, w, ORIGIN, [], 0, 10, 0)
    with pytest.raises(ValueError, match="repeated: \\['a'\\]"):
        run_scenarios(TWO_BAND, ps, w, ORIGIN, [scenario("a"), scenario("a")], 5, 10, 0)
    with pytest.raises(ValueError, match="cases_series: 'onsets' is not an incidence series"):
        run_scenarios(TWO_BAND, ps, w, ORIGIN, [], 5, 10, 0, cases_series=["onsets"])
    with pytest.raises(ValueError, match="seed must be a whole number >= 0"):
        run_scenarios(TWO_BAND, ps, w, ORIGIN, [], 5, 10, -1)


@pytest.mark.parametrize("outcome", ["cases", "infections"])
@pytest.mark.slow  # about 5 s each: 40 runs of two 200-trajectory forecasts and one more
def test_paired_averted_estimates_are_less_variable_across_runs_and_unbiased(cloud, outcome, capsys):
    """Over R = 40 repeated runs (seeds 100..139) of M = 200 trajectories each, the run's estimate of
    the mean number averted by a 20 % transmission cut is computed two ways:
    - paired (common random numbers): run_scenarios' own ``averted_*`` mean, baseline minus
      scenario trajectory by trajectory;
    - independent: the baseline's mean minus the mean of the scenario forecast with another seed.
    Both estimate the same expectation (linearity of expectation; common practice), so:
    1. variance: F test of var(independent) / var(paired) across runs, F(39, 39), one-sided at
       1e-3 (critical ratio 2.7); seen: ratios far above it (see the printed figures);
    2. bias: Welch t test of the two means at two-sided 1e-3 (t = 3.6 with these sizes). Its power:
       a bias of 4 standard errors of the difference (printed) is detected with probability about
       0.65, of 5 with probability 0.9."""
    ps, w = cloud
    cut = scenario("cut", transmission(0.8))
    effects = compile_interventions(TWO_BAND, cut, ORIGIN)
    runs, m, horizon = 40, 200, 21

    def total(fc):
        if outcome == "cases":
            return fc.reported["ed_child"].sum(axis=1) + fc.reported["ed_adult"].sum(axis=1)
        return fc.latent["infections"].sum(axis=1)

    paired, independent = [], []
    for r in range(runs):
        report = run_scenarios(TWO_BAND, ps, w, ORIGIN, cut, horizon, m, 100 + r)
        averted = report.outcome("cut").averted_cases if outcome == "cases" else report.outcome("cut").averted_infections
        paired.append(averted.mean)
        other = forecast(TWO_BAND, ps, w, ORIGIN, horizon, m, seed=10_000 + r, effects=effects)
        independent.append(total(report.forecasts[BASELINE]).mean() - total(other).mean())
    paired, independent = np.array(paired), np.array(independent)
    f_ratio = independent.var(ddof=1) / paired.var(ddof=1)
    f_critical = stats.f.isf(1e-3, runs - 1, runs - 1)
    se_diff = math.sqrt(paired.var(ddof=1) / runs + independent.var(ddof=1) / runs)
    welch = stats.ttest_ind(paired, independent, equal_var=False)
    with capsys.disabled():
        print(f"\n{outcome} averted: paired mean {paired.mean():.1f} (sd {paired.std(ddof=1):.1f}), independent mean "
              f"{independent.mean():.1f} (sd {independent.std(ddof=1):.1f}); variance ratio {f_ratio:.1f} "
              f"(critical {f_critical:.2f}); Welch p {welch.pvalue:.3f}; se of the difference {se_diff:.1f}")
    assert paired.mean() > 0  # a cut in transmission averts something
    assert f_ratio > f_critical, (f_ratio, f_critical)
    assert welch.pvalue > 1e-3, (paired.mean(), independent.mean(), se_diff)
