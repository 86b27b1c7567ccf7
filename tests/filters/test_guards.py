"""Guard rails: a rate, reporting fraction or dispersion that is NaN, negative or infinite for
any particle is a model error naming the expression, the flow or series, the group, the day and
one offending particle's parameters. Bug caught: the old behaviour of reading such rates as "no
flow" (nobody recovered for a week, R_eff of 8e11, only a numpy warning on stderr)."""

from __future__ import annotations

import numpy as np
import pytest

from filters import CompartmentalModel, FilterConfig, ModelGuardError, Observation, ParticleFilter
from schemas import example_model_path, load_model_spec


def _sir(tmp_path, recovery: str = "gamma", reporting: str | None = None) -> CompartmentalModel:
    text = example_model_path("sir").read_text(encoding="utf-8").replace('rate = "gamma"', f'rate = "{recovery}"')
    if reporting is not None:
        text = text.replace("reporting = 0.5", 'reporting = "rho"') + (
            f'\n[parameters.rho]\nkind = "static"\nprior = {{ dist = "uniform", low = {reporting} }}\n'
        )
    path = tmp_path / "sir_guard.toml"
    path.write_text(text, encoding="utf-8")
    return CompartmentalModel(load_model_spec(path))


@pytest.mark.parametrize(
    ("rate", "given", "day"),
    [
        ("gamma * log(t - 5)", "nan", "0"),  # log of a negative number: NaN from day 0
        ("-gamma", "-0.25", "0"),  # negative
        ("gamma / ((t - 3) * (t - 3))", "inf", "3"),  # division by zero on day 3 only
    ],
    ids=["nan", "negative", "infinite"],
)
def test_a_bad_rate_is_an_error_that_names_where(tmp_path, rate, given, day):
    model = _sir(tmp_path, rate)
    pf = ParticleFilter(model, FilterConfig(n_particles=50), np.random.default_rng(1))
    with pytest.raises(ModelGuardError) as info:  # and no numpy warning first (warnings are errors here)
        for t in range(1, 8):
            pf.step(Observation(t, {"cases": 3}))
    text = str(info.value)
    assert "flow 'recovery'" in text and repr(rate) in text and "group 'all'" in text
    assert f"is {given}" in text and f"on day {day}" in text
    assert "particle " in text and "'gamma': 0.25" in text and "finite and >= 0" in text


def test_a_reporting_fraction_outside_0_1_is_an_error(tmp_path):
    # a uniform prior on [0.5, 1.5] for the reporting fraction lets some particles exceed 1
    model = _sir(tmp_path, reporting="0.5, high = 1.5")
    pf = ParticleFilter(model, FilterConfig(n_particles=200), np.random.default_rng(2))
    with pytest.raises(ModelGuardError, match=r"series 'cases' has reporting fraction 'rho' = 1\.\d+ .*must be in \[0, 1\]"):
        pf.step(Observation(1, {"cases": 3}))


def test_good_specs_are_untouched():
    # the shipped examples run a season without tripping a guard (the guard is not a false alarm)
    for name in ("sir", "seir", "seirs", "seir_two_band", "seir_two_band_lab"):
        model = CompartmentalModel(load_model_spec(example_model_path(name)))
        pf = ParticleFilter(model, FilterConfig(n_particles=100), np.random.default_rng(3))
        pf.predict(60)
        model.sample_observation(pf.particles, np.random.default_rng(4))
