"""Wastewater concentrations observed from an individual-based town, through the shared
observation layer: the town's daily infections (counted person by person) shed into the
sewer over the days since infection, exactly as a compartmental model's infection flow does.

External check: the expected concentration of a particle equals
scale x catchment x (numpy.convolve of its daily infections with the discretised shedding
profile) at today, the definition in schemas/REFERENCE.md, computed here with numpy alone.
"""

from __future__ import annotations

import numpy as np
import pytest

import schemas
from filters import FilterConfig, IndividualModel, Observation, ParticleFilter, delay_kernel, simulate_season
from schemas import SpecError

TOWN = {
    "name": "sewerby", "seed": 12, "size": 900,
    "bands": [{"name": "child", "share": 0.3}, {"name": "adult", "share": 0.7}],
    "households": {"size": {"dist": "discrete", "values": [1, 2, 3, 4], "weights": [0.3, 0.3, 0.25, 0.15]}, "head_bands": ["adult"]},
    "settings": [{"name": "school", "size": 80, "members": {"child": 0.95}}],
}
SHEDDING = {"dist": "gamma", "mean": 5.0, "sd": 2.5, "max_days": 14}
SCALE, CATCHMENT = 3000.0, 0.7


def _spec(series_kind: str = "concentration") -> dict:
    ww = {"name": "ww_north", "kind": series_kind, "flow": "infection", "shedding": SHEDDING, "scale": "ww_scale",
          "catchment": CATCHMENT, "noise": {"dist": "lognormal", "sd": 0.3}}
    if series_kind == "positivity":
        ww = {"name": "ww_north", "kind": "positivity", "compartment": "I", "noise": {"dist": "binomial"},
              "positivity": {"background": 0.02, "enrichment": 5.0}}
    elif series_kind == "prevalence":
        ww = {"name": "ww_north", "kind": "prevalence", "compartment": "I", "reporting": 0.5, "noise": {"dist": "poisson"}}
    return {
        "kind": "individual", "name": "sewerby_flu", "population": TOWN,
        "transmission": {"household": 0.5, "community": "beta", "settings": {"school": 0.4}, "importation": 0.2},
        "disease": {"latent": {"dist": "discrete", "days": [1, 2], "weights": [0.5, 0.5]},
                    "infectious": {"dist": "gamma", "mean": 3.0, "sd": 1.0, "max_days": 7}},
        "parameters": {
            "beta": {"kind": "drifting", "prior": {"dist": "lognormal", "mean_log": -1.1, "sd_log": 0.2}, "volatility": 0.03},
            "ww_scale": {"kind": "static", "prior": {"dist": "lognormal", "mean_log": float(np.log(SCALE)), "sd_log": 0.2}},
        },
        "initial": {"exposed": {"dist": "uniform", "low": 3, "high": 8}},
        "series": [{"name": "ed", "kind": "incidence", "flow": "onset", "reporting": 0.4, "noise": {"dist": "poisson"}}, ww],
    }


def _model() -> IndividualModel:
    return IndividualModel(schemas.validate_document(schemas.IndividualModelSpec, _spec(), "sewerby"))


def test_expected_concentration_is_the_shedding_convolution_of_the_towns_infections():
    """Bugs caught: the series reading another event's counts (e.g. onsets), one band only, or
    the profile reversed in time (each tried: the comparison fails)."""
    model = _model()
    rng = np.random.default_rng(4)
    ps = model.initial(40, rng)
    daily = []
    for day in range(25):
        model.advance(ps, day, day + 1, rng)
        daily.append(ps.history[:, 0, model.slots.index("infection"), :].sum(axis=1))  # (n,) all bands
    daily = np.array(daily, dtype=float).T  # (n, days), oldest first
    assert daily.sum() > 50  # an epidemic to convolve
    profile = delay_kernel("gamma", SHEDDING["mean"], SHEDDING["sd"], SHEDDING["max_days"])  # days 0..14 since infection
    scale = ps.params[:, model.param_names.index("ww_scale")]
    reference = np.array([np.convolve(row, profile)[daily.shape[1] - 1] for row in daily]) * scale * CATCHMENT
    np.testing.assert_allclose(model.expected(ps, "ww_north"), reference, rtol=1e-12)


def test_the_filter_weighs_the_town_by_its_wastewater():
    """Bug caught: a concentration series silently ignored in this family (the log-evidence of a
    day with only a wastewater sample would be 0). A sample far above every particle's level is
    less likely than one at the cloud's median level."""
    model = _model()
    season = simulate_season(model, 20, np.random.default_rng(8), limits={"ww_north": 50.0})
    pf = ParticleFilter(model, FilterConfig(n_particles=300), np.random.default_rng(2))
    for obs in season.observations:
        result = pf.step(obs, with_summary=False)
    assert result.log_evidence_increment is not None and result.log_evidence_increment != 0.0
    level = float(np.median(model.expected(pf.particles, "ww_north")))
    assert level > 50.0

    def evidence(value: float) -> float:
        copy = ParticleFilter(model, FilterConfig(n_particles=300), np.random.default_rng(5), particles=pf.particles.take(np.arange(300)), time=pf.time)
        return copy.step(Observation(pf.time + 1, {"ww_north": value}), with_summary=False).log_evidence_increment

    assert evidence(level) > evidence(level * 50.0) + 5.0  # 50x is ln(50)/0.3 = 13 noise sd away


def test_positivity_and_prevalence_are_refused_with_what_this_family_observes():
    """Bad input: a positivity (or prevalence) series in an individual-based spec gets a SpecError
    naming the series, the kind given and the kinds allowed; nothing is built."""
    for kind in ("positivity", "prevalence"):
        with pytest.raises(SpecError) as err:
            schemas.validate_document(schemas.IndividualModelSpec, _spec(kind), "sewerby")
        text = str(err.value)
        assert "ww_north" in text and repr(kind) in text and "incidence" in text and "concentration" in text
