"""Resampling schemes against their exact offspring-count distributions.

Reference: Douc, Cappe & Moulines (2005), "Comparison of resampling schemes
for particle filtering" (ISPA 2005), which defines the multinomial, residual,
stratified and systematic schemes and shows all are unbiased: particle i's
offspring count O_i has E[O_i] = n w_i. The exact per-particle variances used
below follow from the constructions in that paper (derived here, not quoted):

* multinomial: O_i ~ Binomial(n, w_i), Var = n w_i (1 - w_i);
* residual: O_i = floor(n w_i) + Binomial(M, r_i), M = n - sum_j floor(n w_j),
  r_i = (n w_i - floor(n w_i)) / M, Var = M r_i (1 - r_i);
* stratified: O_i is a sum of independent Bernoullis, one per stratum
  [k/n, (k+1)/n), with success probability n |stratum_k cap bin_i|, so
  Var = sum_k p_ik (1 - p_ik);
* systematic: one uniform shifts a lattice of spacing 1/n, so O_i takes only
  the values floor(n w_i) and ceil(n w_i), Var = f (1 - f) with f = frac(n w_i)
  (Kitagawa 1996, "Monte Carlo filter and smoother for non-Gaussian nonlinear
  state space models", JCGS; property from memory, checked exactly below).

Tolerances: z-bounds with standard errors computed in the test from the
repetitions (sample sd / sqrt(R) for means; for sample variances the exact
Var(s^2) = (mu4 - (R-3)/(R-1) sigma^4) / R with moments estimated from the sample), Bonferroni-corrected over particles and schemes at family-wise
error 1e-3.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from filters import RESAMPLERS, FilterConfig, ParticleSet, resample

SCHEMES = sorted(RESAMPLERS)
REPS = 8_000
ALPHA = 1e-3


def _weight_cases() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(2005)
    # Concentration 3 keeps every non-zero n * w_i above ~0.1, so each particle is
    # drawn hundreds of times in REPS repetitions and the sample moments used for
    # the standard errors are themselves reliable.
    dirichlet = rng.dirichlet(np.full(11, 3.0))
    random_with_zero = np.insert(dirichlet, 4, 0.0)  # 12 particles, one of weight zero
    dyadic = np.array([0.5, 0.25, 0.125, 0.125, 0.0, 0.0, 0.0, 0.0])  # n * w all integers for n = 8
    peaked = np.array([0.9, 0.05, 0.03, 0.02, 0.0])
    return {"random_with_zero": random_with_zero, "dyadic": dyadic, "peaked": peaked}


WEIGHTS = _weight_cases()
# (weights case, number of offspring n): n = len(weights) and n != len(weights).
CASES = [("random_with_zero", 12), ("dyadic", 8), ("peaked", 5), ("random_with_zero", 30)]


def exact_offspring_variance(scheme: str, w: np.ndarray, n: int) -> np.ndarray:
    nw = n * w
    if scheme == "multinomial":
        return n * w * (1 - w)
    if scheme == "systematic":
        f = nw - np.floor(nw)
        return f * (1 - f)
    if scheme == "residual":
        floors = np.floor(nw)
        m = n - floors.sum()
        if m == 0:
            return np.zeros_like(w)
        r = (nw - floors) / m
        return m * r * (1 - r)
    if scheme == "stratified":
        upper = np.cumsum(w)
        lower = upper - w
        k = np.arange(n)
        lo = np.maximum(lower[:, None], k[None, :] / n)
        hi = np.minimum(upper[:, None], (k[None, :] + 1) / n)
        p = n * np.clip(hi - lo, 0.0, None)  # (particles, strata)
        return (p * (1 - p)).sum(axis=1)
    raise AssertionError(scheme)


def offspring_counts(scheme: str, w: np.ndarray, n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    out = np.empty((REPS, w.size), dtype=np.int64)
    for r in range(REPS):
        idx = resample(w, rng, scheme, n=n)
        out[r] = np.bincount(idx, minlength=w.size)
    return out


@pytest.fixture(scope="module")
def counts() -> dict[tuple[str, str, int], np.ndarray]:
    out = {}
    for c, (case, n) in enumerate(CASES):
        for s, scheme in enumerate(SCHEMES):
            out[(scheme, case, n)] = offspring_counts(scheme, WEIGHTS[case], n, seed=1000 * c + s)
    return out


def _z(k: int) -> float:
    return float(stats.norm.ppf(1 - ALPHA / (2 * k)))


@pytest.mark.parametrize("scheme", SCHEMES)
@pytest.mark.parametrize("case,n", CASES)
def test_unbiased_offspring_counts(counts, scheme, case, n):
    """E[O_i] = n w_i (Douc, Cappe & Moulines 2005)."""
    w = WEIGHTS[case]
    o = counts[(scheme, case, n)]
    assert np.all(o.sum(axis=1) == n)
    mean = o.mean(axis=0)
    se = o.std(axis=0, ddof=1) / math.sqrt(REPS)
    z = _z(w.size * len(SCHEMES))
    # 1e-9 absorbs round-off only where an offspring count is deterministic (se = 0).
    assert np.all(np.abs(mean - n * w) <= z * se + 1e-9), (mean, n * w, se)


@pytest.mark.parametrize("scheme", SCHEMES)
@pytest.mark.parametrize("case,n", CASES)
def test_offspring_variance_matches_exact(counts, scheme, case, n):
    w = WEIGHTS[case]
    o = counts[(scheme, case, n)].astype(float)
    exact = exact_offspring_variance(scheme, w, n)
    var = o.var(axis=0, ddof=1)
    m4 = ((o - o.mean(axis=0)) ** 4).mean(axis=0)
    # Var(s^2) = (mu4 - (R-3)/(R-1) sigma^4) / R (e.g. Cramer 1946, Mathematical Methods of Statistics, 27.4).
    se = np.sqrt(np.clip(m4 - (REPS - 3) / (REPS - 1) * var**2, 0.0, None) / REPS)
    z = _z(w.size * len(SCHEMES))
    assert np.all(np.abs(var - exact) <= z * se + 1e-9), (var, exact, se)


@pytest.mark.parametrize("case,n", CASES)
def test_zero_weight_particles_are_never_chosen(counts, case, n):
    w = WEIGHTS[case]
    for scheme in SCHEMES:
        assert np.all(counts[(scheme, case, n)][:, w == 0] == 0), scheme


@pytest.mark.parametrize("case,n", CASES)
def test_systematic_and_stratified_beat_multinomial(counts, case, n):
    """Lower offspring-count variance than multinomial on the same weights
    (Douc, Cappe & Moulines 2005): exactly, particle by particle, from the
    closed forms, and in the simulated counts summed over particles."""
    w = WEIGHTS[case]
    multinomial_exact = exact_offspring_variance("multinomial", w, n)
    multinomial_var = counts[("multinomial", case, n)].var(axis=0, ddof=1).sum()
    for scheme in ("systematic", "stratified"):
        assert np.all(exact_offspring_variance(scheme, w, n) <= multinomial_exact + 1e-12)
        var = counts[(scheme, case, n)].var(axis=0, ddof=1).sum()
        assert var < multinomial_var, (scheme, var, multinomial_var)


@pytest.mark.parametrize("case,n", CASES)
def test_systematic_offspring_is_floor_or_ceil(counts, case, n):
    nw = n * WEIGHTS[case]
    o = counts[("systematic", case, n)]
    lo, hi = np.floor(nw - 1e-9), np.ceil(nw + 1e-9)
    assert np.all((o >= lo) & (o <= hi))


@pytest.mark.parametrize("case,n", CASES)
def test_residual_keeps_the_deterministic_copies(counts, case, n):
    floors = np.floor(n * WEIGHTS[case])
    o = counts[("residual", case, n)]
    assert np.all(o >= floors), (o.min(axis=0), floors)


@pytest.mark.parametrize("scheme", SCHEMES)
def test_indices_in_range_and_length(scheme):
    rng = np.random.default_rng(7)
    for size in (1, 2, 17, 1000):
        w = rng.dirichlet(np.full(size, 0.3))
        for n in (1, size, 3 * size + 1):
            idx = resample(w, rng, scheme, n=n)
            assert idx.shape == (n,)
            assert np.issubdtype(idx.dtype, np.integer)
            assert idx.min() >= 0 and idx.max() < size
        assert resample(w, rng, scheme).shape == (size,)  # default: as many as weights


def test_default_scheme_is_systematic():
    w = np.random.default_rng(1).dirichlet(np.ones(50))
    a = resample(w, np.random.default_rng(3))
    b = RESAMPLERS["systematic"](w, 50, np.random.default_rng(3))
    np.testing.assert_array_equal(a, b)


def test_unknown_scheme_names_the_allowed_ones():
    w = np.full(4, 0.25)
    with pytest.raises(ValueError) as info:
        resample(w, np.random.default_rng(0), "bootstrap")
    message = str(info.value)
    assert "bootstrap" in message
    for name in SCHEMES:
        assert name in message
    with pytest.raises(ValueError) as info:
        FilterConfig(scheme="bootstrap")
    assert all(name in str(info.value) for name in SCHEMES)


def _labelled_particles(n: int) -> ParticleSet:
    ids = np.arange(n)
    return ParticleSet(
        states=(ids[:, None, None] * 100 + np.arange(6).reshape(1, 2, 3)).astype(np.int64),
        params=ids[:, None] + np.array([[0.25, 0.5]]),
        history=(ids[:, None, None, None] * 10 + np.zeros((1, 4, 1, 2))).astype(np.int64),
        log_weights=-ids.astype(float) / 7.0,
    )


def test_take_gathers_every_array_with_one_index():
    ps = _labelled_particles(9)
    index = np.array([3, 3, 0, 8, 5, 5, 5, 1, 2, 8, 0])  # any length, with repeats
    out = ps.take(index)
    assert out.size == index.size
    np.testing.assert_array_equal(out.states, ps.states[index])
    np.testing.assert_array_equal(out.params, ps.params[index])
    np.testing.assert_array_equal(out.history, ps.history[index])
    np.testing.assert_array_equal(out.log_weights, ps.log_weights[index])
    # Rows stay together: each row's labels agree across arrays.
    np.testing.assert_array_equal(out.states[:, 0, 0] // 100, index)
    np.testing.assert_array_equal(np.floor(out.params[:, 0]).astype(int), index)
    np.testing.assert_array_equal(out.history[:, 0, 0, 0] // 10, index)
    np.testing.assert_allclose(out.log_weights, -index / 7.0)
    # The result owns its data: editing it leaves the source untouched.
    out.states[:] = -1
    out.params[:] = -1
    np.testing.assert_array_equal(ps.states[:, 0, 0] // 100, np.arange(9))
    np.testing.assert_array_equal(np.floor(ps.params[:, 0]), np.arange(9))


def test_particle_set_rejects_mismatched_rows():
    ps = _labelled_particles(4)
    with pytest.raises(ValueError, match="history"):
        ParticleSet(states=ps.states, params=ps.params, history=ps.history[:3])
