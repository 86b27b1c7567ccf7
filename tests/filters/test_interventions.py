"""Interventions compiled into ``Effects`` and the ``effects`` hook of
``CompartmentalModel.advance``.

External checks (sources named beside each test):
- final sizes under interventions: an SIR whose transmission is scaled by f
  for the whole horizon ends at the Kermack-McKendrick final size at R0 f, and
  vaccinating a fraction v of susceptibles before the outbreak ends at the
  final-size equation with initial immunity (Kermack & McKendrick 1927);
- the closed form of the vaccination flow (the probability of leaving at
  per-capita rate v over one day is 1 - exp(-v), and binomial thinning over
  the day's sub-steps composes to that exactly);
- the next-generation matrix (van den Driessche & Watmough 2002) for R_eff;
- exact population conservation.

Regression pins (not external checks): SHA-256 digests of the project's own
runs from before the hook existed, so that ``effects=None`` and "no change"
interventions keep drawing exactly the same random numbers.
"""

from __future__ import annotations

import hashlib
import math
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import brentq

from filters import CompartmentalModel, InterventionError, compile_interventions, forecast
from schemas import (
    EXAMPLE_SCENARIOS,
    ContactChange,
    RateChange,
    Scenario,
    SpecError,
    Vaccination,
    example_model_path,
    example_scenario_path,
    load_model_spec,
    load_scenario_file,
)

SPECS = Path(__file__).parent / "specs"


def model_of(name: str) -> CompartmentalModel:
    path = SPECS / f"{name}.toml" if (SPECS / f"{name}.toml").exists() else example_model_path(name)
    # window_days=0: the saved runs below predate the assimilation window, so their
    # incidence history holds the delay kernel's days only.
    return CompartmentalModel(load_model_spec(path), window_days=0)


# ------------------------------------ regression pins: effects=None is unchanged
# REGRESSION PINS, not external checks: saved runs of the project's own pre-hook code (git commit 8af86d8, filters/_compartmental.py
# before ``effects`` existed; numpy 2.4.6, OpenBLAS single-threaded): SHA-256 of
# (states, params, history) after advancing 300 particles over days 0-9 and then
# 9-16, and of the generator state at the end. Recorded by running ``_digest``
# below against that code. A change here means the effects=None path (or numpy's
# binomial stream) no longer gives the same draws.
SAVED_RUNS = {
    "sir": "1b198417de6f1ecdce933fcf6c84a11b588ef7fd67c29572704d6e49cbc17e51",
    "seir": "2c602944d105e0ad3c5181242fa273c675dca4e267a006b62624917137372ff0",
    "seirs": "15be6ed6e6c0e05ebc0c7c0e9215fd351f9637740876f1f25e6259af181123a6",
    "seir_two_band": "9b1dfedc1abeaf63dc576b4b938df729cf4f60cb84bd6cc4655db0148e53b9b5",
    "seir_weekly": "934fd2f3dfe5b63133ebb7a20eefac99246537c99c03be6d0a03524590ced856",
    "sir_binomial": "69613bf09155a4d59c0ae8ddcbe75f140f6026478b09969fa56220a7fc588b32",
    "sir_one": "abf6f2f52310bbd61cd1ceea8f99aeca6d234829ccfc1e540f852541e25858d9",
}


def _digest(model: CompartmentalModel, effects=None, n: int = 300, days=(0, 9, 16)) -> str:
    ps = model.initial(n, np.random.default_rng(101))
    rng = np.random.default_rng(202)
    h = hashlib.sha256()
    for a, b in zip(days, days[1:]):
        if effects is None:
            model.advance(ps, a, b, rng)
        else:
            model.advance(ps, a, b, rng, effects=effects)
        for arr in (ps.states, ps.params, ps.history):
            h.update(np.ascontiguousarray(arr).tobytes())
    h.update(str(rng.bit_generator.state["state"]["state"]).encode())
    return h.hexdigest()


@pytest.mark.parametrize("name", sorted(SAVED_RUNS))
def test_regression_pin_effects_none_is_bit_identical_to_the_saved_pre_hook_run(name):
    model = model_of(name)
    assert _digest(model) == SAVED_RUNS[name], f"{name}: advance without effects changed its draws or results"
    # Passing effects=None explicitly is the same call.
    assert _digest(model, effects=None) == SAVED_RUNS[name]


@pytest.mark.parametrize("name", sorted(SAVED_RUNS))
def test_regression_pin_empty_effects_reproduce_the_saved_run(name):
    model = model_of(name)
    assert _digest(model, effects=compile_interventions(model, [], origin=0)) == SAVED_RUNS[name]


def test_regression_pin_factor_one_interventions_run_the_effects_path_and_reproduce_the_baseline():
    """A factor of exactly 1 is not dropped: these days go through the effects code
    path, whose rates and contact matrix then equal the model's bit for bit."""
    model = model_of("seir_two_band")
    ones = [
        RateChange(kind="rate", flow="infection", factor=1.0),
        RateChange(kind="rate", flow="onset", factor=1.0, groups=["child"], start_day=2, end_day=9),
        ContactChange(kind="contact", factors=[[1.0, 1.0], [1.0, 1.0]], start_day=1),
    ]
    effects = compile_interventions(model, ones, origin=0)
    assert all(effects.on_day(d) is not None for d in range(16))
    assert _digest(model, effects=effects) == SAVED_RUNS["seir_two_band"]


def test_regression_pin_zero_rate_vaccination_is_dropped_so_the_baseline_is_kept():
    model = model_of("seir_two_band")
    effects = compile_interventions(
        model, [Vaccination(kind="vaccination", source="S", target="R", rate_per_day=0.0)], origin=0
    )
    assert effects.empty and effects.on_day(0) is None
    assert _digest(model, effects=effects) == SAVED_RUNS["seir_two_band"]


# ------------------------------------------------- final sizes (external checks)
# Kermack, W. O. & McKendrick, A. G. (1927), "A contribution to the mathematical theory of
# epidemics", Proc. R. Soc. A 115: for the closed SIR, dS/dR = -R0 S / N, so with S(0) = S0,
# R(0) = R_init and no infectives left at the end, log(S0 / S_inf) = R0 (N - R_init - S_inf) / N.
# Our dynamics are the Euler-multinomial scheme (Breto et al. 2009) with dt = 1/16 day: an infective
# stays for Geometric(q) sub-steps, q = 1 - exp(-gamma dt), so the same equation holds with
# R0_dt = beta dt / q (derived in test_epidemic_theory.py; 0.8 % above R0 here).
FS_POPULATION, FS_INFECTIVES, FS_R0, FS_GAMMA, FS_RUNS = 20_000, 50, 2.5, 0.5, 1000


def _final_susceptible(r0: float, s0: float, r_init: float) -> float:
    """S_inf / N solving log(s0 / s) = r0 (1 - r_init - s), s < s0 (fractions of N)."""
    return brentq(lambda s: math.log(s0 / s) - r0 * (1.0 - r_init - s), 1e-12, s0 * (1 - 1e-12), xtol=1e-15)


def _closed_sir_to_the_end(effects, seed: int):
    """FS_RUNS closed SIR epidemics from 50 infectives in 20000 (a minor outbreak has probability
    (1 / 1.5)^50 < 1e-8), run until no infective is left; returns (S after day 1, S at the end)."""
    model = model_of("sir_one")
    rng = np.random.Generator(np.random.PCG64(seed))
    ps = model.initial(FS_RUNS, rng)
    s, i, r = (model.compartments.index(c) for c in "SIR")
    ps.states[:, 0, s], ps.states[:, 0, i], ps.states[:, 0, r] = FS_POPULATION - FS_INFECTIVES, FS_INFECTIVES, 0
    ps.params[:, model.param_names.index("beta")] = FS_R0 * FS_GAMMA
    ps.params[:, model.param_names.index("gamma")] = FS_GAMMA
    model.advance(ps, 0, 1, rng, effects=effects)
    after_day_one = ps.states[:, 0, s].copy()
    day = 1
    while ps.states[:, 0, i].any():
        model.advance(ps, day, day + 10, rng, effects=effects)
        day += 10
        assert day < 3000, "epidemics did not end"
    return after_day_one.astype(float), ps.states[:, 0, s].astype(float)


def _r0_dt(r0: float) -> float:
    dt = 1.0 / model_of("sir_one").spec.substeps_per_day
    return r0 * FS_GAMMA * dt / -math.expm1(-FS_GAMMA * dt)


def test_transmission_scaled_for_the_whole_horizon_gives_the_final_size_at_r0_times_f():
    f = 0.6  # R0 f = 1.5
    model = model_of("sir_one")
    effects = compile_interventions(model, [RateChange(kind="rate", flow="infection", factor=f)], origin=0)
    _, s_end = _closed_sir_to_the_end(effects, seed=31)
    attack = (FS_POPULATION - FS_INFECTIVES - s_end) / FS_POPULATION  # share of N infected during the run
    s0 = (FS_POPULATION - FS_INFECTIVES) / FS_POPULATION
    want = s0 - _final_susceptible(_r0_dt(FS_R0 * f), s0, 0.0)
    continuous = s0 - _final_susceptible(FS_R0 * f, s0, 0.0)
    # Tolerance: 4 standard errors of the mean of 1000 runs (sd 0.013 -> 0.0017) plus 20 / N = 0.001
    # for the O(1/N) gap between the stochastic mean and the N -> infinity root (chosen, as in
    # test_epidemic_theory.py). A factor 1 % off moves the final size by about 0.009 (dz/dR = 0.6 at
    # R = 1.5), several tolerances; unscaled transmission (R0 2.5) would give 0.89.
    tolerance = 4 * attack.std(ddof=1) / math.sqrt(attack.size) + 20 / FS_POPULATION
    print(f"f = {f}: mean attack {attack.mean():.5f}, final-size root {want:.5f} (continuous time {continuous:.5f})")
    assert abs(attack.mean() - want) <= tolerance, (attack.mean(), want, tolerance)
    assert abs(continuous - want) > 2 * tolerance  # the time-step correction is needed and visible


def test_vaccinating_a_fraction_before_the_outbreak_gives_the_final_size_with_initial_immunity():
    v = 0.3
    model = model_of("sir_one")
    effects = compile_interventions(
        model,
        [
            # Day 0 only: nobody is infected or recovers; a share v = 1 - exp(-rate) of S is vaccinated.
            RateChange(kind="rate", flow="infection", factor=0.0, end_day=1),
            RateChange(kind="rate", flow="recovery", factor=0.0, end_day=1),
            Vaccination(kind="vaccination", source="S", target="R", rate_per_day=-math.log(1 - v), efficacy=1.0, end_day=1),
        ],
        origin=0,
    )
    s1, s_end = _closed_sir_to_the_end(effects, seed=32)
    s0 = FS_POPULATION - FS_INFECTIVES
    vaccinated = (s0 - s1) / s0
    # Binomial(s0, v) per run: 4 standard errors of the mean over the runs.
    assert abs(vaccinated.mean() - v) <= 4 * math.sqrt(v * (1 - v) / s0 / vaccinated.size), vaccinated.mean()
    attack = (s1 - s_end) / FS_POPULATION
    # Per run, the final-size equation with initial immunity R_init = that run's vaccinated.
    want = np.array([a / FS_POPULATION - _final_susceptible(_r0_dt(FS_R0), a / FS_POPULATION, (s0 - a) / FS_POPULATION)
                     for a in s1])
    no_vaccine = s0 / FS_POPULATION - _final_susceptible(_r0_dt(FS_R0), s0 / FS_POPULATION, 0.0)
    gap = attack - want
    # Tolerance as above: 4 standard errors of the mean gap over 1000 runs (sd 0.006 -> 0.0008) plus 20 / N.
    tolerance = 4 * gap.std(ddof=1) / math.sqrt(gap.size) + 20 / FS_POPULATION
    print(f"v = {v}: mean attack {attack.mean():.5f}, final-size root {want.mean():.5f}, without vaccination {no_vaccine:.5f}")
    assert abs(gap.mean()) <= tolerance, (attack.mean(), want.mean(), tolerance)


# ------------------------------------------------------------------- windows
def _cloud(model: CompartmentalModel, n: int = 400, days: int = 10):
    ps = model.initial(n, np.random.default_rng(5))
    model.advance(ps, 0, days, np.random.default_rng(6))
    return ps


def test_windows_are_relative_to_the_origin_and_end_exclusive():
    model = model_of("seir_two_band")
    effects = compile_interventions(model, [RateChange(kind="rate", flow="infection", factor=0.5, start_day=3, end_day=5)], 40)
    assert [d for d in range(38, 50) if effects.on_day(d) is not None] == [43, 44]
    assert effects.windows() == [(43, 45)]
    open_ended = compile_interventions(model, [RateChange(kind="rate", flow="infection", factor=0.5, start_day=2)], 40)
    assert open_ended.on_day(41) is None and open_ended.on_day(42) is not None and open_ended.on_day(10_000) is not None


def test_rate_factor_zero_stops_new_infections_inside_the_window_and_not_outside():
    model = model_of("seir_two_band")
    ps, origin, horizon = _cloud(model), 10, 14
    weights = np.ones(ps.size)
    stop = compile_interventions(model, [RateChange(kind="rate", flow="infection", factor=0.0, start_day=4, end_day=9)], origin)
    base = forecast(model, ps, weights, origin, horizon, 500, seed=3)
    fc = forecast(model, ps, weights, origin, horizon, 500, seed=3, effects=stop)
    daily = fc.latent["infections"].sum(axis=0)  # day h ahead covers model day origin + h - 1
    inside = np.arange(horizon) + 0  # index h - 1 = scenario day
    in_window = (inside >= 4) & (inside < 9)
    assert np.all(daily[in_window] == 0), daily
    assert np.all(daily[~in_window] > 0), daily
    # Before the window the scenario is the baseline, trajectory by trajectory.
    np.testing.assert_array_equal(fc.latent["infections"][:, :4], base.latent["infections"][:, :4])
    np.testing.assert_array_equal(fc.reported["ed_child"][:, :4], base.reported["ed_child"][:, :4])


def test_rate_change_for_some_groups_leaves_the_others_alone():
    model = model_of("seir_two_band")
    ps = _cloud(model)
    slot = model._slot_of["onset"]
    effects = compile_interventions(model, [RateChange(kind="rate", flow="onset", factor=0.0, groups=["adult"])], 10)
    before_e = ps.states[:, :, model._cidx["E"]].copy()
    model.advance(ps, 10, 13, np.random.default_rng(9), effects=effects)
    onsets = ps.history[:, :3, slot, :].sum(axis=(0, 1))
    assert onsets[model.groups.index("adult")] == 0
    assert onsets[model.groups.index("child")] > 0
    assert np.all(ps.states[:, 1, model._cidx["E"]] >= before_e[:, 1])  # adults' E only fills


# --------------------------------------------------------------- vaccination
def test_vaccination_moves_people_at_the_closed_form_rate():
    """With the infection flow switched off only vaccination leaves S. Over one
    day at per-capita rate v = r * e the number moved from S occupants is
    Binomial(S, 1 - exp(-v)) (closed form; the sub-steps' binomial thinnings
    compose to it exactly), so sum(moved - S q) / sqrt(sum(S q (1 - q))) is
    approximately standard normal across particles. Checked per day and group."""
    model = model_of("seir_two_band")
    ps = _cloud(model, n=2000, days=5)
    r, e = 0.04, 0.6
    q = 1.0 - np.exp(-r * e)
    effects = compile_interventions(
        model,
        [
            RateChange(kind="rate", flow="infection", factor=0.0, end_day=3),
            Vaccination(kind="vaccination", source="S", target="R", rate_per_day=r, efficacy=e, groups=["adult"], end_day=3),
        ],
        origin=5,
    )
    s, rr = model._cidx["S"], model._cidx["R"]
    child, adult = model.groups.index("child"), model.groups.index("adult")
    rng = np.random.default_rng(77)
    for day in range(5, 8):
        s_before = ps.states[:, :, s].copy()
        r_before = ps.states[:, :, rr].copy()
        i_before = ps.states[:, :, model._cidx["I"]].copy()
        model.advance(ps, day, day + 1, rng, effects=effects)
        moved = s_before - ps.states[:, :, s]
        # Nobody leaves S in the unvaccinated group; only vaccination leaves it in the other.
        assert np.all(moved[:, child] == 0)
        recovered = r_before[:, adult] + moved[:, adult]
        assert np.all(ps.states[:, adult, rr] >= recovered)  # R gains the vaccinated (plus recoveries)
        assert np.all(ps.states[:, adult, rr] - recovered <= i_before[:, adult])
        expected = s_before[:, adult] * q
        z = (moved[:, adult] - expected).sum() / np.sqrt((expected * (1 - q)).sum())
        assert abs(z) < 4.0, f"day {day}: moved {moved[:, adult].mean():.2f}/particle vs closed form {expected.mean():.2f} (z = {z:.2f})"
    # After the window (day 8 on) S is left alone again by vaccination.
    assert effects.on_day(8) is None


def test_vaccination_of_a_compartment_without_flows_of_its_own():
    """R has no outflow in SEIR: vaccination out of it runs wholly in the deferred draws."""
    model = model_of("seir_two_band")
    ps = _cloud(model, n=500)
    r_idx, s_idx = model._cidx["R"], model._cidx["S"]
    effects = compile_interventions(model, [Vaccination(kind="vaccination", source="R", target="S", rate_per_day=0.1)], 10)
    r0 = ps.states[:, :, r_idx].sum()
    model.advance(ps, 10, 11, np.random.default_rng(4), effects=effects)
    assert ps.states[:, :, r_idx].sum() < r0
    assert np.all(ps.states >= 0)
    assert np.all(ps.states.sum(axis=2) == model.population)
    assert s_idx != r_idx


# -------------------------------------------------------------- conservation
def test_population_is_conserved_with_every_kind_of_intervention_active():
    model = model_of("seir_two_band")
    ps = _cloud(model, n=600)
    effects = compile_interventions(
        model,
        [
            RateChange(kind="rate", flow="infection", factor=1.7, groups=["child"], end_day=10),
            RateChange(kind="rate", flow="recovery", factor=0.5, start_day=2),
            ContactChange(kind="contact", factors=[[0.3, 2.0], [0.5, 1.5]], start_day=1, end_day=8),
            Vaccination(kind="vaccination", source="S", target="R", rate_per_day=0.2, efficacy=0.9),
            Vaccination(kind="vaccination", source="S", target="E", rate_per_day=0.05, groups=["child"], end_day=5),
            Vaccination(kind="vaccination", source="I", target="R", rate_per_day=0.3, start_day=3),
        ],
        origin=10,
    )
    rng = np.random.default_rng(12)
    for day in range(10, 24):
        model.advance(ps, day, day + 1, rng, effects=effects)
        assert ps.states.dtype == np.int64
        assert np.all(ps.states >= 0), day
        np.testing.assert_array_equal(ps.states.sum(axis=2), np.broadcast_to(model.population, (ps.size, model.n_groups)))


def test_effects_compiled_for_another_model_are_refused():
    two_band, seir = model_of("seir_two_band"), model_of("seir")
    effects = compile_interventions(seir, [RateChange(kind="rate", flow="infection", factor=0.5)], 0)
    ps = two_band.initial(10, np.random.default_rng(1))
    with pytest.raises(InterventionError, match="compiled for a model"):
        two_band.advance(ps, 0, 1, np.random.default_rng(2), effects=effects)


def test_compile_names_what_does_not_fit_the_model():
    model = model_of("seir_two_band")
    with pytest.raises(InterventionError) as info:
        compile_interventions(
            model,
            Scenario(
                name="typos",
                interventions=[
                    RateChange(kind="rate", flow="infektion", factor=0.5),
                    Vaccination(kind="vaccination", source="S", target="V", rate_per_day=0.01, groups=["elders"]),
                ],
            ),
            origin=0,
        )
    text = str(info.value)
    assert "field interventions[0].rate.flow: flow 'infektion'" in text and "'infection', 'onset', 'recovery'" in text
    assert "interventions[1].vaccination.target" in text and "'V'" in text
    assert "interventions[1].vaccination.groups" in text and "'elders'" in text
    with pytest.raises(InterventionError, match="origin must be a whole model day"):
        compile_interventions(model, [], origin=1.5)


# ------------------------------------------------------------ scenario files
TWO_BAND = load_model_spec(example_model_path("seir_two_band"))


@pytest.mark.parametrize("name", EXAMPLE_SCENARIOS)
def test_shipped_scenario_files_fit_the_two_band_model(name):
    loaded = load_scenario_file(example_scenario_path(name), TWO_BAND)
    assert loaded.all_scenarios()
    for s in loaded.all_scenarios():
        compile_interventions(CompartmentalModel(TWO_BAND), s, 0)


BAD_FILES = [
    (
        "unknown flow",
        'name = "a"\n\n[[interventions]]\nkind = "rate"\nflow = "infektion"\nfactor = 0.5\n',
        5,
        "interventions[0].rate.flow",
        ["'infektion'", "allowed: ['infection', 'onset', 'recovery']"],
    ),
    (
        "negative factor",
        'name = "a"\n\n[[interventions]]\nkind = "rate"\nflow = "infection"\nfactor = -0.2\n',
        6,
        "interventions[0].rate.factor",
        ["greater than or equal to 0", "given -0.2"],
    ),
    (
        "unknown group",
        'name = "a"\n[[interventions]]\nkind = "rate"\nflow = "infection"\nfactor = 0.5\ngroups = ["elders"]\n',
        6,
        "interventions[0].rate.groups",
        ["'elders'", "allowed: ['child', 'adult']"],
    ),
    (
        "unknown compartment",
        'name = "a"\n[[interventions]]\nkind = "vaccination"\nsource = "S"\ntarget = "V"\nrate_per_day = 0.01\n',
        5,
        "interventions[0].vaccination.target",
        ["'V'", "allowed: ['S', 'E', 'I', 'R']"],
    ),
    (
        "matrix shape",
        'name = "a"\n[[interventions]]\nkind = "contact"\nfactors = [[0.5]]\n',
        4,
        "interventions[0].contact.factors",
        ["1x1", "2x2"],
    ),
    (
        "ragged matrix",
        'name = "a"\n[[interventions]]\nkind = "contact"\nfactors = [[0.5, 1.0], [1.0]]\n',
        2,
        "interventions[0].contact",
        ["square matrix", "2x1/2"],
    ),
    (
        "window order",
        'name = "a"\n[[interventions]]\nkind = "rate"\nflow = "infection"\nfactor = 0.5\nstart_day = 9\nend_day = 9\n',
        2,
        "interventions[0].rate",
        ["end_day (9) must be after start_day (9)"],
    ),
    (
        "efficacy above one",
        'name = "a"\n[[interventions]]\nkind = "vaccination"\nsource = "S"\ntarget = "R"\nrate_per_day = 0.01\nefficacy = 1.5\n',
        7,
        "interventions[0].vaccination.efficacy",
        ["less than or equal to 1", "given 1.5"],
    ),
    (
        "unknown kind",
        'name = "a"\n[[interventions]]\nkind = "lockdown"\n',
        2,
        "interventions[0]",
        ["'lockdown'", "'rate', 'contact', 'vaccination'"],
    ),
    (
        "reserved name",
        'horizon_days = 10\n[[scenarios]]\nname = "baseline"\n',
        3,
        "scenarios[0].name",
        ["'baseline' is reserved", "given 'baseline'"],
    ),
    (
        "repeated names",
        '[[scenarios]]\nname = "x"\n[[scenarios]]\nname = "x"\n',
        None,
        "(top level)",
        ["repeated: ['x']"],
    ),
    (
        "both forms",
        'name = "a"\ninterventions = []\n[[scenarios]]\nname = "x"\n',
        None,
        "(top level)",
        ["takes no top-level 'name' or [[interventions]]"],
    ),
    (
        "threshold series",
        'name = "a"\ninterventions = []\n[[thresholds]]\nseries = "icu"\nthreshold = 5\n',
        4,
        "thresholds[0].series",
        ["'icu'", "allowed: ['ed_child', 'ed_adult', 'latent.infections']"],
    ),
    (
        "misspelt field",
        'name = "a"\n[[interventions]]\nkind = "rate"\nflow = "infection"\nfactr = 0.5\n',
        2,
        "interventions[0].rate",
        ["factor", "Field required"],
    ),
]


@pytest.mark.parametrize("label, text, line, field, fragments", BAD_FILES, ids=[b[0] for b in BAD_FILES])
def test_bad_scenario_files_name_file_line_and_field(tmp_path, label, text, line, field, fragments):
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_scenario_file(path, TWO_BAND)
    message = str(info.value)
    where = f"{path}:{line}: " if line is not None else f"{path}: "
    assert where in message, message
    assert f"field {field}" in message, message
    for fragment in fragments:
        assert fragment in message, message


def test_errors_in_a_later_scenario_point_at_its_own_lines(tmp_path):
    """Nested [[scenarios.interventions]] are counted from their scenario's header."""
    text = (
        '[[scenarios]]\nname = "one"\n[[scenarios.interventions]]\nkind = "rate"\nflow = "infection"\nfactor = 0.5\n\n'
        '[[scenarios]]\nname = "two"\n[[scenarios.interventions]]\nkind = "rate"\nflow = "onset"\nfactor = 0.5\n'
        '[[scenarios.interventions]]\nkind = "rate"\nflow = "recovry"\nfactor = 0.5\n'
    )
    path = tmp_path / "nested.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_scenario_file(path, TWO_BAND)
    lines = text.splitlines()
    assert lines[16 - 1] == 'flow = "recovry"'
    assert f"{path}:16: field scenarios[1].interventions[1].rate.flow" in str(info.value)


def test_unreadable_and_malformed_files_name_the_file(tmp_path):
    missing = tmp_path / "missing.toml"
    with pytest.raises(SpecError, match=f"{missing}: cannot read file"):
        load_scenario_file(missing)
    broken = tmp_path / "broken.toml"
    broken.write_text("name = \n", encoding="utf-8")
    with pytest.raises(SpecError, match=f"{broken}: not valid TOML"):
        load_scenario_file(broken)


def test_reproduction_number_sees_interventions_in_force():
    """R_eff from the next-generation matrix is linear in the transmission rate and in the
    contact matrix (van den Driessche & Watmough 2002: K = F V^-1, F proportional to both),
    so halving either halves R_eff; an extra exit from an infected class (rate v) shortens
    the infectious period: for SIR R_eff scales by gamma / (gamma + v)."""
    model = model_of("seir_two_band")
    ps = _cloud(model)
    base = model.reproduction_number(ps, 10)
    half_rate = compile_interventions(model, [RateChange(kind="rate", flow="infection", factor=0.5, start_day=0)], 10)
    np.testing.assert_allclose(model.reproduction_number(ps, 10, half_rate.on_day(10)), 0.5 * base, rtol=1e-10)
    half_contact = compile_interventions(
        model, [ContactChange(kind="contact", factors=[[0.5, 0.5], [0.5, 0.5]], start_day=0)], 10
    )
    np.testing.assert_allclose(model.reproduction_number(ps, 10, half_contact.on_day(10)), 0.5 * base, rtol=1e-10)
    sir = model_of("sir")
    ps_sir = _cloud(sir)
    gamma = sir.spec.parameters["gamma"].value
    isolate = compile_interventions(
        sir, [Vaccination(kind="vaccination", source="I", target="R", rate_per_day=0.25, efficacy=1.0, start_day=0)], 10
    )
    np.testing.assert_allclose(
        sir.reproduction_number(ps_sir, 10, isolate.on_day(10)),
        sir.reproduction_number(ps_sir, 10) * gamma / (gamma + 0.25),
        rtol=1e-9,
    )


def test_scenario_forecasts_report_r_eff_under_the_intervention():
    model = model_of("seir_two_band")
    ps, origin = _cloud(model), 10
    weights = np.ones(ps.size)
    half = compile_interventions(model, [RateChange(kind="rate", flow="infection", factor=0.5, start_day=0)], origin)
    base = forecast(model, ps, weights, origin, 1, 300, seed=4)
    fc = forecast(model, ps, weights, origin, 1, 300, seed=4, effects=half)
    # Day 1 ahead: the same particles are selected and the states differ only through one
    # day's draws, so R_eff (exactly halved per state, test above) is about half the baseline's.
    ratio = fc.latent["R_eff"].mean() / base.latent["R_eff"].mean()
    assert 0.4 < ratio < 0.6, ratio
