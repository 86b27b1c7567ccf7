"""Reference checks of the compartmental dynamics against epidemic theory.

Every check compares the project's simulation (or its next-generation-matrix
code) with something computed here from outside the project: a closed form, a
root found with scipy, or an eigenvalue computed with numpy from matrices
written by hand.

Sources
-------
- Whittle, P. (1955). "The outcome of a stochastic epidemic -- a note on
  Bailey's paper." Biometrika 42, 116-122: starting from one infective in a
  large population, a major outbreak occurs with probability 1 - 1/R0
  (R0 > 1) in the Markovian SIR epidemic.
- Harris, T. E. (1963). "The Theory of Branching Processes." Springer: the
  extinction probability of a Galton-Watson process is the smallest root in
  [0, 1] of s = G(s), G the offspring probability generating function.
- Kermack, W. O. & McKendrick, A. G. (1927). "A contribution to the
  mathematical theory of epidemics." Proc. R. Soc. A 115, 700-721: final
  attack fraction z solves z = 1 - exp(-R0 z).
- Andersson, H. & Britton, T. (2000). "Stochastic Epidemic Models and Their
  Statistical Analysis." Springer, Theorem 4.2 (quoted from memory): in a major
  outbreak the final attack fraction is asymptotically normal with variance
  z (1 - z) (1 + c_v^2 R0^2 (1 - z)) / (N (1 - R0 (1 - z))^2), c_v the
  coefficient of variation of the infectious period (1 for exponential).
- van den Driessche, P. & Watmough, J. (2002). "Reproduction numbers and
  sub-threshold endemic equilibria for compartmental models of disease
  transmission." Math. Biosci. 180, 29-48: R = spectral radius of F V^-1.
- Breto, C., He, D., Ionides, E. L. & King, A. A. (2009). "Time series
  analysis via mechanistic models." Ann. Appl. Stat. 3, 319-348: the
  Euler-multinomial scheme the project documents (used here only to state the
  time-discretisation allowance).
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import brentq

import schemas
from filters import CompartmentalModel

SPECS = Path(__file__).parent / "specs"
SIR_ONE = SPECS / "sir_one.toml"

N_EPIDEMICS = 6000
GAMMA = 0.25  # recovery rate per day used for the one-infective runs
MAJOR_CUTOFF = 0.1  # final attack fraction separating major from minor outbreaks


def _km_root(r0: float) -> float:
    """Positive root of z = 1 - exp(-R0 z) (Kermack & McKendrick 1927), R0 > 1."""
    return brentq(lambda z: z - 1.0 + math.exp(-r0 * z), 1e-9, 1.0, xtol=1e-14)


def _discrete_time_quantities(r0: float, gamma: float, dt: float) -> tuple[float, float]:
    """Extinction probability and effective R0 of the time-discretised SIR.

    In the Euler-multinomial scheme (Breto et al. 2009) an infective present at
    the start of a sub-step infects ~ Poisson(beta dt) others in it (large
    population, S/N ~ 1) and recovers at its end with probability
    q = 1 - exp(-gamma dt), so it is infectious for M ~ Geometric(q) >= 1
    sub-steps. Its offspring PGF is G(s) = q e^{lam(s-1)} / (1 - (1-q) e^{lam(s-1)})
    with lam = beta dt, the mean offspring number is lam / q, and the
    extinction probability is the smallest root of G(s) = s (Harris 1963).
    Both tend to 1/R0 and R0 as dt -> 0.
    """
    beta = r0 * gamma
    lam = beta * dt
    q = -math.expm1(-gamma * dt)

    def g_minus_s(s: float) -> float:
        e = math.exp(lam * (s - 1.0))
        return q * e / (1.0 - (1.0 - q) * e) - s

    extinction = brentq(g_minus_s, 0.0, 1.0 - 1e-9, xtol=1e-14)
    return extinction, lam / q


@pytest.fixture(scope="module", params=[2.0, 1.5], ids=["R0=2", "R0=1.5"])
def one_infective_runs(request):
    """N_EPIDEMICS independent closed SIR epidemics from one infective, run to extinction."""
    r0 = request.param
    spec = schemas.load_model_spec(SIR_ONE)
    model = CompartmentalModel(spec)
    rng = np.random.Generator(np.random.PCG64(20240611 + int(10 * r0)))
    ps = model.initial(N_EPIDEMICS, rng)
    assert np.all(ps.states[:, 0, model.compartments.index("I")] == 1)
    ps.params[:, model.param_names.index("beta")] = r0 * GAMMA
    ps.params[:, model.param_names.index("gamma")] = GAMMA
    i_col = model.compartments.index("I")
    day = 0
    while ps.states[:, 0, i_col].any():
        model.advance(ps, day, day + 10, rng)
        day += 10
        assert day < 2000, "epidemics did not die out"
    n_pop = int(spec.groups[0].population)
    final = (n_pop - ps.states[:, 0, model.compartments.index("S")]) / n_pop
    return {"r0": r0, "final": final, "N": n_pop, "dt": 1.0 / spec.substeps_per_day}


@pytest.mark.slow  # shares a ~3-6 s simulation of 2 x 6000 epidemics
def test_major_outbreak_probability_matches_whittle(one_infective_runs):
    """P(major outbreak | one initial infective) = 1 - 1/R0 (Whittle 1955)."""
    r0, final, dt = one_infective_runs["r0"], one_infective_runs["final"], one_infective_runs["dt"]
    major = final > MAJOR_CUTOFF
    # Minor outbreaks are tiny (subcritical branching): the classification must be clear-cut.
    assert final[~major].max() < 0.01 and final[major].min() > 0.3
    p_hat = major.mean()
    se = math.sqrt(p_hat * (1 - p_hat) / final.size)  # binomial standard error
    whittle = 1.0 - 1.0 / r0
    extinction, _ = _discrete_time_quantities(r0, GAMMA, dt)
    # Allowance for dt = 1/16 day: the gap between the discrete-time branching
    # process and the continuous-time limit, computed above (about 0.008 here).
    allowance = abs((1.0 - extinction) - whittle)
    print(f"R0={r0}: major fraction {p_hat:.4f} (se {se:.4f}), Whittle {whittle:.4f}, "
          f"discrete-time branching {1 - extinction:.4f}")
    assert abs(p_hat - whittle) <= 3.5 * se + allowance
    # Sharper: against the branching-process value for the same time step, no allowance.
    assert abs(p_hat - (1.0 - extinction)) <= 3.5 * se


@pytest.mark.slow  # shares a ~3-6 s simulation of 2 x 6000 epidemics
def test_major_outbreak_final_size_matches_kermack_mckendrick(one_infective_runs):
    """Mean attack fraction of major outbreaks -> root of z = 1 - exp(-R0 z)."""
    r0, final, n_pop, dt = (one_infective_runs[k] for k in ("r0", "final", "N", "dt"))
    major = final[final > MAJOR_CUTOFF]
    mean, se = major.mean(), major.std(ddof=1) / math.sqrt(major.size)
    z = _km_root(r0)
    _, r0_discrete = _discrete_time_quantities(r0, GAMMA, dt)
    # The mean-field recursion of the discretised model, S' = S exp(-beta dt I / N),
    # gives z = 1 - exp(-R0_dt z) with R0_dt = beta dt / q (see the helper).
    z_discrete = _km_root(r0_discrete)
    # Allowances: time step (computed, ~0.004-0.008 here) and finite population
    # (the KM root is the N -> infinity limit; the mean differs by O(1/N),
    # allowance 20 / N = 0.001, a chosen bound).
    allowance = abs(z_discrete - z) + 20.0 / n_pop
    print(f"R0={r0}: mean final size {mean:.5f} (se {se:.5f}), KM root {z:.5f}, "
          f"KM root at discretised R0 {z_discrete:.5f}")
    assert abs(mean - z) <= 4 * se + allowance
    assert abs(mean - z_discrete) <= 4 * se + 20.0 / n_pop


@pytest.mark.slow  # shares a ~3-6 s simulation of 2 x 6000 epidemics
def test_major_outbreak_final_size_spread_matches_clt(one_infective_runs):
    """Spread of the final size in major outbreaks (Andersson & Britton 2000, Thm 4.2)."""
    r0, final, n_pop, dt = (one_infective_runs[k] for k in ("r0", "final", "N", "dt"))
    major = final[final > MAJOR_CUTOFF]
    sd_hat = major.std(ddof=1)

    def clt_sd(r: float, cv2: float) -> float:
        z = _km_root(r)
        return math.sqrt(z * (1 - z) * (1 + cv2 * r * r * (1 - z)) / (n_pop * (1 - r * (1 - z)) ** 2))

    expected = clt_sd(r0, 1.0)
    _, r0_discrete = _discrete_time_quantities(r0, GAMMA, dt)
    q = -math.expm1(-GAMMA * dt)
    # Geometric infectious period in sub-steps: c_v^2 = 1 - q.
    allowance = abs(clt_sd(r0_discrete, 1.0 - q) - expected) / expected
    # Sampling error of a standard deviation ~ 1 / sqrt(2 n) in relative terms.
    rel_se = 1.0 / math.sqrt(2 * major.size)
    print(f"R0={r0}: sd of final size {sd_hat:.5f}, CLT {expected:.5f}")
    assert abs(sd_hat / expected - 1.0) <= 4 * rel_se + allowance


# ------------------------------------------------------- reproduction number
def _random_states(rng, n, populations, n_compartments):
    """Random integer partitions of each group's population into compartments."""
    out = np.zeros((n, len(populations), n_compartments), dtype=np.int64)
    for g, pop in enumerate(populations):
        out[:, g, :] = rng.multinomial(pop, rng.dirichlet(np.ones(n_compartments), size=n))
    return out


@pytest.mark.parametrize("name", ["sir", "seir"])
def test_reproduction_number_one_group_closed_form(name):
    """One group: R_eff = beta / gamma * S / N (van den Driessche & Watmough 2002, sec. 4)."""
    model = CompartmentalModel(schemas.load_model_spec(schemas.example_model_path(name)))
    rng = np.random.Generator(np.random.PCG64(11))
    ps = model.initial(300, rng)
    ps.states[:] = _random_states(rng, 300, model.population, model.n_compartments)
    r = model.reproduction_number(ps, t=3.0)
    beta = ps.params[:, model.param_names.index("beta")]
    gamma = ps.params[:, model.param_names.index("gamma")]
    s_frac = ps.states[:, 0, model.compartments.index("S")] / model.population[0]
    expected = beta / gamma * s_frac
    assert np.ptp(expected) > 0.5  # the check spans many different values
    np.testing.assert_allclose(r, expected, rtol=1e-8)


def test_reproduction_number_two_band_next_generation_matrix():
    """Two-band SEIR: R_eff = spectral radius of F V^-1, built here from the TOML."""
    path = schemas.example_model_path("seir_two_band")
    raw = tomllib.loads(path.read_text())
    contact = np.array(raw["transmission"]["contact"], dtype=float)
    susc = np.array([g["values"]["susceptibility"] for g in raw["groups"]])
    pops = np.array([g["population"] for g in raw["groups"]], dtype=float)
    sigma = raw["parameters"]["sigma"]["value"]
    gamma = raw["parameters"]["gamma"]["value"]

    model = CompartmentalModel(schemas.load_model_spec(path))
    rng = np.random.Generator(np.random.PCG64(12))
    n = 200
    ps = model.initial(n, rng)
    ps.states[:] = _random_states(rng, n, pops.astype(np.int64), 4)
    got = model.reproduction_number(ps, t=0.0)

    beta = ps.params[:, model.param_names.index("beta")]
    S = ps.states[:, :, raw["compartments"].index("S")].astype(float)
    expected = np.empty(n)
    reduced = np.empty(n)
    for i in range(n):
        # Infected classes ordered (E_child, I_child, E_adult, I_adult).
        # New infections in E_g: beta * susc_g * S_g * sum_j contact[g, j] I_j / N_j.
        F = np.zeros((4, 4))
        V = np.zeros((4, 4))
        for g in range(2):
            for j in range(2):
                F[2 * g, 2 * j + 1] = beta[i] * susc[g] * S[i, g] * contact[g, j] / pops[j]
            V[2 * g, 2 * g] = sigma
            V[2 * g + 1, 2 * g] = -sigma
            V[2 * g + 1, 2 * g + 1] = gamma
        expected[i] = np.max(np.abs(np.linalg.eigvals(F @ np.linalg.inv(V))))
        # Equivalent 2x2 form: every exposed person becomes infectious and stays 1/gamma days.
        K = beta[i] * (susc * S[i])[:, None] * contact / pops[None, :] / gamma
        reduced[i] = np.max(np.abs(np.linalg.eigvals(K)))
    np.testing.assert_allclose(expected, reduced, rtol=1e-10)
    assert np.ptp(expected) > 0.3
    np.testing.assert_allclose(got, expected, rtol=1e-8)


def test_reproduction_number_two_band_fully_susceptible_value():
    """At S = N in both bands, R0 = beta * rho(diag(susc) C) / gamma (same NGM, no depletion)."""
    path = schemas.example_model_path("seir_two_band")
    raw = tomllib.loads(path.read_text())
    contact = np.array(raw["transmission"]["contact"], dtype=float)
    susc = np.array([g["values"]["susceptibility"] for g in raw["groups"]])
    pops = np.array([g["population"] for g in raw["groups"]], dtype=np.int64)
    gamma = raw["parameters"]["gamma"]["value"]
    model = CompartmentalModel(schemas.load_model_spec(path))
    ps = model.initial(5, np.random.Generator(np.random.PCG64(13)))
    ps.states[:] = 0
    ps.states[:, :, 0] = pops
    beta = ps.params[:, model.param_names.index("beta")]
    # With S_g = N_g the matrix diag(susc) C diag(N) diag(1/N) = diag(susc) C.
    radius = np.max(np.abs(np.linalg.eigvals(np.diag(susc) @ contact)))
    np.testing.assert_allclose(model.reproduction_number(ps), beta * radius / gamma, rtol=1e-8)
