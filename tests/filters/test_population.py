"""Synthetic populations (schemas.PopulationSpec -> filters.build_population) and
the individual-based model spec: validation with file, line and field, and the
town's structure against what its spec declares.

External checks: membership of settings is Bernoulli by band, so the share of
members per band is checked against the declared probability within a
binomial tolerance of 4.5 standard deviations for the band's size (a correct
draw fails about once in 150,000 such checks).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

import schemas
from filters import IndividualModel, PopulationError, build_model, build_population
from schemas import SpecError

EXAMPLE_DIR = Path(schemas.__file__).with_name("models") / "individual"
TOWN = EXAMPLE_DIR / "pellingwold_town.toml"

# REGRESSION PIN, not an external check: SHA-256 of the shipped town's arrays as
# drawn by this code (numpy PCG64, Generator.random only). A change means the
# town is no longer the one analysts calibrated against.
TOWN_DIGEST = "127bdee0b173dd57265b79d822b36b22c8fab5d04f3a068b40885b53f0c143ac"


@pytest.fixture(scope="module")
def town():
    spec = schemas.load_population_spec(TOWN)
    return spec, build_population(spec)


def test_the_town_is_the_same_every_time(town):
    """Bug caught: a draw outside the seeded generator (or from an unordered set)
    making the town differ between runs or machines."""
    spec, pop = town
    assert pop.digest() == TOWN_DIGEST
    assert build_population(spec).digest() == TOWN_DIGEST


def test_band_sizes_are_the_shares_rounded_by_largest_remainder(town):
    """Bug caught: bands that do not add up to the population (rounding each share alone)."""
    spec, pop = town
    counts = pop.band_counts()
    assert counts.sum() == spec.size
    raw = np.array([b.share for b in spec.bands]) * spec.size
    assert np.all(np.abs(counts - raw) < 1)


def test_households_partition_the_town_and_are_headed_by_the_head_bands(town):
    """Bugs caught: a person in no household or two; a household of children only."""
    spec, pop = town
    hh = pop.households
    sizes = hh.sizes
    assert sizes.sum() == spec.size and sizes.min() >= 1
    assert np.array_equal(hh.venue, np.repeat(np.arange(hh.count), sizes))
    heads = pop.band[hh.start[:-1]]
    allowed = [spec.band_names.index(b) for b in spec.households.head_bands]
    assert np.isin(heads, allowed).all()
    # Every household but the last (which takes whoever is left) has a size the spec allows.
    assert np.isin(sizes[:-1], spec.households.size.values).all()


def test_settings_draw_members_by_band_with_the_declared_probabilities(town):
    """Bug caught: membership probabilities applied to the wrong band (e.g. band order mixed up)."""
    spec, pop = town
    counts = pop.band_counts()
    for setting, venues in zip(spec.settings, pop.settings):
        members = venues.venue >= 0
        for b, name in enumerate(spec.band_names):
            p = setting.members.get(name, 0.0)
            got = members[pop.band == b].mean()
            tol = 4.5 * math.sqrt(p * (1 - p) / counts[b]) + 1e-12
            assert abs(got - p) <= tol, (setting.name, name, got, p)
        # The members list is the people with a place, sorted by place.
        assert np.array_equal(np.sort(venues.members), np.flatnonzero(members))
        assert np.array_equal(venues.venue[venues.members], np.repeat(np.arange(venues.count), venues.sizes))


def test_keep_households_together_puts_siblings_in_one_school(town):
    """Bug caught: the option ignored (members shuffled person by person)."""
    _, pop = town
    school = pop.settings[0]
    hh = pop.households.venue
    pupils = np.flatnonzero(school.venue >= 0)
    # Pairs of pupils from one household: same school unless a school boundary split them.
    same_home = hh[pupils[1:]] == hh[pupils[:-1]]
    same_school = school.venue[pupils[1:]] == school.venue[pupils[:-1]]
    assert same_home.sum() > 100
    assert same_school[same_home].mean() > 0.95


def test_too_few_heads_is_refused_with_what_was_given():
    doc = {
        "name": "tiny", "seed": 1, "size": 100,
        "bands": [{"name": "child", "share": 0.9}, {"name": "adult", "share": 0.1}],
        "households": {"size": 1, "head_bands": ["adult"]},
    }
    spec = schemas.validate_document(schemas.PopulationSpec, doc, "tiny")
    with pytest.raises(PopulationError, match=r"100 households need a first member from bands \['adult'\], which hold 10 people"):
        build_population(spec)


# ------------------------------------------------------------- validation
def _write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _line(text: str, needle: str) -> int:
    hits = [i + 1 for i, line in enumerate(text.splitlines()) if needle in line]
    assert len(hits) == 1, hits
    return hits[0]


def test_population_errors_name_file_line_field_and_value(tmp_path):
    text = TOWN.read_text().replace("share = 0.18", "share = 0.28").replace("members = { child = 0.93 }", "members = { pupil = 0.93 }")
    path = _write(tmp_path, "town.toml", text)
    with pytest.raises(SpecError) as info:
        schemas.load_population_spec(path)
    message = str(info.value)
    assert "band shares must add up to 1, they add up to 1.1" in message
    assert f"{path}:{_line(text, 'pupil = 0.93')}: field settings[0].members.pupil: setting 'school': 'pupil' is not a band" in message
    assert "allowed: ['child', 'adult', 'senior']" in message


def test_model_errors_name_the_model_file(tmp_path):
    """A setting the town lacks, an event no one counts and a parameter never declared are all reported at once."""
    text = (EXAMPLE_DIR / "pellingwold_flu.toml").read_text()
    text = text.replace('workplace = "beta_work" }', 'office = "beta_work" }').replace('flow = "onset"\ngroups = ["child"]', 'flow = "symptoms"\ngroups = ["child"]')
    text = text.replace('reporting = "rho"\ndelay = { dist = "gamma", mean = 1.5, sd = 1.0, max_days = 5 }\nnoise = { dist = "negbin", dispersion = "k" }\n\n[[series]]', 'reporting = "rho_ed"\ndelay = { dist = "gamma", mean = 1.5, sd = 1.0, max_days = 5 }\nnoise = { dist = "negbin", dispersion = "k" }\n\n[[series]]')
    _write(tmp_path, "pellingwold_town.toml", TOWN.read_text())
    path = _write(tmp_path, "flu.toml", text)
    with pytest.raises(SpecError) as info:
        schemas.load_spec(path)
    message = str(info.value)
    assert "3 problem(s)" in message
    assert f"{path}:{_line(text, 'office =')}: field transmission.settings.office: 'office' is not a setting of population 'pellingwold'" in message
    assert "event 'symptoms' unknown; allowed: ['infection', 'onset', 'infectious', 'recovery']" in message
    assert "reporting = 'rho_ed' is not a parameter" in message


def test_a_missing_population_file_is_named(tmp_path):
    text = (EXAMPLE_DIR / "pellingwold_flu.toml").read_text()
    path = _write(tmp_path, "flu.toml", text)
    with pytest.raises(SpecError, match=rf"{path}:{_line(text, 'population =')}: field population: file 'pellingwold_town.toml' not found"):
        schemas.load_spec(path)


def test_periods_longer_than_the_state_byte_holds_are_refused(tmp_path):
    """Bug caught: an infectious period of 70 days wrapping around in the one-byte state."""
    text = (EXAMPLE_DIR / "pellingwold_flu.toml").read_text().replace("sd = 1.2, max_days = 9", "sd = 1.2, max_days = 70")
    _write(tmp_path, "pellingwold_town.toml", TOWN.read_text())
    path = _write(tmp_path, "flu.toml", text)
    with pytest.raises(SpecError, match=r"infectious periods last 1 to 63 days, given up to 70"):
        schemas.load_spec(path)


def test_load_spec_tells_the_families_apart(tmp_path):
    """Bug caught: an individual-based file read as a compartmental spec (or the reverse)."""
    sir = schemas.example_model_path("sir")
    assert isinstance(schemas.load_spec(sir), schemas.ModelSpec)
    marked = _write(tmp_path, "sir.toml", 'kind = "compartmental"\n' + sir.read_text())
    assert schemas.load_spec(marked).fingerprint() == schemas.load_model_spec(sir).fingerprint()
    ibm = schemas.load_spec(schemas.example_individual_path("pellingwold_flu"))
    assert isinstance(ibm, schemas.IndividualModelSpec)
    assert isinstance(build_model(ibm), IndividualModel)
    wrong = _write(tmp_path, "agent.toml", 'kind = "agents"\n' + sir.read_text())
    with pytest.raises(SpecError, match=r"field kind: model family 'agents' unknown; allowed: \['compartmental', 'individual'\]"):
        schemas.load_spec(wrong)


def test_fingerprint_follows_the_population_not_its_path(tmp_path):
    """Bug caught: a changed town (another seed) resuming an old checkpoint."""
    base = schemas.load_spec(schemas.example_individual_path("pellingwold_flu"))
    _write(tmp_path, "pellingwold_town.toml", TOWN.read_text().replace("seed = 20260412", "seed = 20260413"))
    path = _write(tmp_path, "flu.toml", (EXAMPLE_DIR / "pellingwold_flu.toml").read_text())
    assert schemas.load_spec(path).fingerprint() != base.fingerprint()
    _write(tmp_path, "pellingwold_town.toml", TOWN.read_text().replace("description = ", "description = 'x' #"))
    assert schemas.load_spec(path).fingerprint() == base.fingerprint()
