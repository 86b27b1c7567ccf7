"""Property-based checks (hypothesis) of the numerical core's invariants.

* Euler-multinomial dynamics (Breto, He, Ionides & King 2009, "Time series
  analysis via mechanistic models", Ann. Appl. Stat.) move whole individuals
  between compartments: counts stay integer and non-negative and each group's
  population is conserved exactly, whatever the rates; the incidence history
  obeys the mass balance of the flow graph.
* ``normalised_weights`` is the softmax (reference: ``scipy.special.softmax``).
* ``weighted_quantiles`` is the inverse of the weighted ECDF (reference:
  ``numpy.quantile(..., method='inverted_cdf')``, Hyndman & Fan 1996
  definition 1), on equal weights and on integer weights expanded into
  repeated values.
* resampling inside the filter gathers states, params, history and
  log-weights with one index vector.

Determinism: ``derandomize=True`` and no example database, so every run tries
the same examples; every random draw in the code under test comes from a numpy
Generator seeded by a hypothesis-drawn integer.
"""

from __future__ import annotations

import hashlib

import numpy as np
from hypothesis import HealthCheck, assume, example, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from scipy.special import softmax

from filters import (
    CompartmentalModel,
    FilterConfig,
    Observation,
    ObservationError,
    ParticleFilter,
    ParticleSet,
    RESAMPLERS,
    normalised_weights,
    weighted_quantiles,
)
from schemas import ModelSpec, example_model_path, load_model_spec

PROPERTY = settings(
    max_examples=30,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow],
)

SPECS = {name: load_model_spec(example_model_path(name)) for name in ("sir", "seirs", "seir_two_band")}

# Parameter values from zero through tiny to absurdly large (rates per day).
EXTREME = st.one_of(
    st.sampled_from([0.0, 1e-300, 1e-12, 1.0, 1e6, 1e12, 1e300]),
    st.floats(min_value=0.0, max_value=1e3, allow_nan=False),
)


@st.composite
def small_models(draw):
    """An example spec with random group populations and sub-step count."""
    name = draw(st.sampled_from(sorted(SPECS)))
    doc = SPECS[name].model_dump(by_alias=True)
    for group in doc["groups"]:
        group["population"] = draw(st.one_of(st.integers(1, 50), st.integers(51, 10**9)))
    doc["substeps_per_day"] = draw(st.integers(1, 6))
    return name, CompartmentalModel(ModelSpec.model_validate(doc))


def _set_extreme_params(model: CompartmentalModel, ps: ParticleSet, draw) -> None:
    for j, name in enumerate(model.param_names):
        value = draw(EXTREME)
        lo, hi = model.spec.parameters[name].bounds
        ps.params[:, j] = float(np.clip(value, lo, hi))


def _check_counts(model: CompartmentalModel, ps: ParticleSet) -> None:
    assert np.issubdtype(ps.states.dtype, np.integer)
    assert np.issubdtype(ps.history.dtype, np.integer)
    assert np.all(ps.states >= 0), ps.states.min()
    assert np.all(ps.history >= 0), ps.history.min()
    np.testing.assert_array_equal(ps.states.sum(axis=2), np.broadcast_to(model.population, ps.states.shape[:2]))


@PROPERTY
@given(model=small_models(), n=st.integers(1, 25), days=st.integers(1, 8), seed=st.integers(0, 2**32 - 1),
       data=st.data())
def test_euler_multinomial_conserves_population(model, n, days, seed, data):
    name, model = model
    rng = np.random.default_rng(seed)
    ps = model.initial(n, rng)
    _check_counts(model, ps)
    if data.draw(st.booleans(), label="extreme parameters"):
        _set_extreme_params(model, ps, data.draw)
    c = {comp: i for i, comp in enumerate(model.compartments)}
    for day in range(days):
        before = ps.states.copy()
        model.advance(ps, day, day + 1, rng)
        _check_counts(model, ps)
        newest = ps.history[:, 0, 0, :]  # (n, groups): today's count of the observed flow
        # Mass balance of the flow graph (exact, per particle and group).
        if name == "sir":  # observed flow S -> I is the only way out of S
            np.testing.assert_array_equal(newest, before[:, :, c["S"]] - ps.states[:, :, c["S"]])
        if name == "seir_two_band":  # observed flow E -> I is the only way into I and R
            into = ps.states[:, :, [c["I"], c["R"]]].sum(axis=2) - before[:, :, [c["I"], c["R"]]].sum(axis=2)
            np.testing.assert_array_equal(newest, into)


@PROPERTY
@given(model=small_models(), seed=st.integers(0, 2**32 - 1), split=st.integers(1, 5))
def test_advance_over_a_gap_equals_conservation_too(model, seed, split):
    """Advancing several days in one call keeps the same invariants (a gap in the feed)."""
    _, model = model
    rng = np.random.default_rng(seed)
    ps = model.initial(7, rng)
    model.advance(ps, 0, split, rng)
    model.advance(ps, split, split + 3, rng)
    _check_counts(model, ps)


# ----------------------------------------------------------------- weights
finite_log_weights = hnp.arrays(
    np.float64,
    st.integers(1, 60),
    elements=st.floats(allow_nan=False, allow_infinity=False, width=64),
)


@PROPERTY
@given(log_w=finite_log_weights)
@example(log_w=np.array([-1.7e308, 1.7e308, 0.0]))  # spread beyond the float range
@example(log_w=np.array([1.7e308, 1.7e308]))
@example(log_w=np.array([-1e300, -1e300 + 1e285]))
def test_normalised_weights_sum_to_one(log_w):
    w = normalised_weights(log_w)
    assert w.shape == log_w.shape
    assert np.all(w >= 0) and np.all(np.isfinite(w))
    assert abs(w.sum() - 1.0) <= 4 * log_w.size * np.finfo(float).eps
    # The most likely particle has the most weight.
    assert w[np.argmax(log_w)] == w.max()


@PROPERTY
@given(
    log_w=hnp.arrays(np.float64, st.integers(1, 60), elements=st.floats(-700, 700)),
    shift=st.sampled_from([0.0, 1e5, -1e5, 1e12, -1e12]),
)
def test_normalised_weights_is_softmax(log_w, shift):
    """Equal to scipy.special.softmax, and invariant to adding a constant
    (as long as the constant leaves the spread representable: tolerance
    grows with |shift| * eps, the round-off of the shifted inputs)."""
    w = normalised_weights(log_w + shift)
    ref = softmax(log_w)
    tol = 1e-12 + 64 * (abs(shift) + 700) * np.finfo(float).eps
    np.testing.assert_allclose(w, ref, rtol=tol, atol=1e-300)


@PROPERTY
@given(
    log_w=hnp.arrays(np.float64, st.integers(2, 40), elements=st.floats(-50, 50)),
    dead=st.data(),
)
def test_minus_inf_log_weights_get_zero_weight(log_w, dead):
    mask = dead.draw(hnp.arrays(np.bool_, log_w.shape))
    assume(not mask.all())
    log_w = np.where(mask, -np.inf, log_w)
    w = normalised_weights(log_w)
    assert np.all(w[mask] == 0)
    assert abs(w.sum() - 1.0) <= 1e-12
    np.testing.assert_allclose(w[~mask], softmax(log_w[~mask]), rtol=1e-12)


# --------------------------------------------------------------- quantiles
probabilities = st.lists(st.floats(min_value=1e-6, max_value=1 - 1e-6), min_size=1, max_size=8)
sample_values = st.one_of(
    st.floats(-1e6, 1e6, allow_nan=False),
    st.integers(-3, 3).map(float),  # many ties
)


def _away_from_jumps(probs: list[float], total: int) -> bool:
    """At p = j / total exactly, the ECDF jumps and both implementations are at
    the mercy of round-off in p * total; compare only away from jumps."""
    x = np.asarray(probs) * total
    return bool(np.all(np.abs(x - np.round(x)) > 1e-9 * max(total, 1)))


@PROPERTY
@given(values=st.lists(sample_values, min_size=1, max_size=40), probs=probabilities)
def test_weighted_quantiles_equal_weights_match_numpy(values, probs):
    v = np.array(values)
    assume(_away_from_jumps(probs, v.size))
    w = np.full(v.size, 1.0 / v.size)
    got = weighted_quantiles(v, w, np.array(probs))
    want = np.quantile(v, probs, method="inverted_cdf")
    np.testing.assert_array_equal(got, want)


@PROPERTY
@given(
    values=st.lists(sample_values, min_size=1, max_size=25),
    counts=st.data(),
    probs=probabilities,
)
def test_weighted_quantiles_integer_weights_match_expanded(values, counts, probs):
    v = np.array(values)
    c = np.array(counts.draw(st.lists(st.integers(0, 6), min_size=v.size, max_size=v.size)))
    assume(c.sum() > 0)
    assume(_away_from_jumps(probs, int(c.sum())))
    got = weighted_quantiles(v, c / c.sum(), np.array(probs))
    want = np.quantile(np.repeat(v, c), probs, method="inverted_cdf")
    np.testing.assert_array_equal(got, want)


@PROPERTY
@given(
    matrix=hnp.arrays(np.float64, st.tuples(st.integers(1, 20), st.integers(1, 4)),
                      elements=st.floats(-100, 100)),
    probs=probabilities,
)
def test_weighted_quantiles_columnwise(matrix, probs):
    n = matrix.shape[0]
    assume(_away_from_jumps(probs, n))
    got = weighted_quantiles(matrix, np.full(n, 1.0 / n), np.array(probs))
    assert got.shape == (len(probs), matrix.shape[1])
    for j in range(matrix.shape[1]):
        np.testing.assert_array_equal(got[:, j], np.quantile(matrix[:, j], probs, method="inverted_cdf"))


# -------------------------------------------------------------- resampling
class LabelledModel:
    """A toy model whose every array carries the particle's label, so any
    mismatch between arrays after resampling is visible. Column 1 of params is
    static (for Liu-West jitter); column 0 is the label."""

    static_parameters = np.array([1], dtype=np.intp)

    def __init__(self, seed: int) -> None:
        self.seed = seed

    def fingerprint(self) -> str:
        return hashlib.sha256(f"labelled:{self.seed}".encode()).hexdigest()[:16]

    def initial(self, n: int, rng: np.random.Generator) -> ParticleSet:
        ids = np.arange(n)
        return ParticleSet(
            states=np.stack([ids, 2 * ids], axis=1).astype(np.int64),
            params=np.stack([ids.astype(float), rng.normal(size=n)], axis=1),
            history=np.repeat(ids[:, None, None], 3, axis=1).astype(np.int64) * 10,
        )

    def advance(self, particles: ParticleSet, t0: int, t1: int, rng: np.random.Generator) -> None:
        pass  # labels must survive untouched

    def check_observation(self, observation: Observation) -> None:
        if set(observation.values) - {"y"}:
            raise ObservationError("only 'y'")

    def log_likelihood(self, particles: ParticleSet, observation: Observation) -> np.ndarray:
        # Deterministic in the label: some particles impossible, others graded.
        label = particles.states[:, 0]
        score = np.sin(label * 12.9898 + self.seed) * 43758.5453
        ll = -4.0 * (score - np.floor(score))
        return np.where(label % 5 == 3, -np.inf, ll)

    def describe(self, particles: ParticleSet, t: float = 0.0) -> dict[str, np.ndarray]:
        return {"label": particles.states[:, 0].astype(float)}

    def to_unconstrained(self, params: np.ndarray) -> np.ndarray:
        return np.array(params, dtype=float)

    def from_unconstrained(self, values: np.ndarray) -> np.ndarray:
        return np.array(values, dtype=float)


@PROPERTY
@given(
    n=st.integers(6, 200),
    scheme=st.sampled_from(sorted(RESAMPLERS)),
    seed=st.integers(0, 2**32 - 1),
    liu_west=st.sampled_from([None, 0.98]),
    steps=st.integers(1, 4),
)
def test_filter_resampling_keeps_rows_together(n, scheme, seed, liu_west, steps):
    model = LabelledModel(seed % 1000)
    config = FilterConfig(n_particles=n, resample_threshold=1.0, scheme=scheme, liu_west_discount=liu_west)
    pf = ParticleFilter(model, config, np.random.default_rng(seed))
    for t in range(1, steps + 1):
        result = pf.step(Observation(time=t, values={"y": 0.0}))
        ps = pf.particles
        label = ps.states[:, 0]
        assert ps.size == n
        np.testing.assert_array_equal(ps.states[:, 1], 2 * label)
        np.testing.assert_array_equal(ps.params[:, 0], label.astype(float))
        np.testing.assert_array_equal(ps.history, np.repeat(label[:, None, None], 3, axis=1) * 10)
        # Impossible particles (label % 5 == 3) never survive resampling.
        assert not np.any(label % 5 == 3)
        if t == 1:  # impossible particles make the ESS < n, so step 1 always resamples
            assert result.resampled
        if result.resampled:
            np.testing.assert_array_equal(ps.log_weights, 0.0)
