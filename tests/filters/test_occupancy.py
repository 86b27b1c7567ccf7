"""Occupancy: the shipped ``seir_hospital`` example (admission flow, length-of-stay compartment H,
beds occupied observed as the prevalence of H).

Closed forms checked:

- competing exits (Breto et al. 2009, the Euler-multinomial split): of the people leaving I in a
  day, a share p_hosp go to H, so admissions out of I-leavers are Binomial(leavers, p_hosp);
- a compartment emptied at rate 1/los with nothing coming in keeps exp(-t/los) of its occupants in
  expectation (here exactly: the per-sub-step survival exp(-dt/los) multiplied over the day).
"""

from __future__ import annotations

import math

import numpy as np

from filters import CompartmentalModel, Observation
from filters._particles import ParticleSet
from schemas import example_model_path, load_model_spec


def setup(n: int, infectious: int = 0, hospital: int = 0, p_hosp: float = 0.05, los: float = 8.0):
    m = CompartmentalModel(load_model_spec(example_model_path("seir_hospital")))
    states = np.zeros((n, 1, 5), dtype=np.int64)
    states[:, 0, 2] = infectious
    states[:, 0, 3] = hospital
    states[:, 0, 0] = 250_000 - infectious - hospital
    params = np.zeros((n, len(m.param_names)))
    values = {"beta": 0.0, "sigma": 0.5, "gamma": 0.33, "iota": 0.0, "p_hosp": p_hosp, "los": los, "rho": 0.3}
    for name, v in values.items():
        params[:, m.param_names.index(name)] = v
    history = np.zeros((n, m.history_days, 2, 1), dtype=np.int64)  # two observed flows: onset, admission
    return m, ParticleSet(states=states, params=params, history=history)


def test_a_share_p_hosp_of_those_leaving_i_is_admitted():
    # 4000 particles each with 20000 infectious: admissions / leavers over all of them
    # estimates p_hosp with sd sqrt(p (1 - p) / leavers), leavers about 4000 * 20000 *
    # (1 - exp(-0.33)) = 2.3e7, so sd ~ 4.5e-5; 5 sd allowed. Bug caught: the admission
    # rate not scaled by gamma (a share gamma * p_hosp / (gamma + ...) instead) or the
    # home-recovery rate written without (1 - p_hosp).
    m, ps = setup(4000, infectious=20_000, p_hosp=0.05)
    m.advance(ps, 0, 1, np.random.default_rng(11))
    admissions = ps.history[:, 0, m.series[1].slot, 0].sum()
    # I gains no onsets: E starts empty, beta = 0 and no importation
    leavers = 4000 * 20_000 - ps.states[:, 0, 2].sum()
    share = admissions / leavers
    assert abs(share - 0.05) < 5 * math.sqrt(0.05 * 0.95 / leavers)


def test_occupancy_empties_with_the_length_of_stay():
    # 2000 particles with 5000 beds occupied and no admissions (I empty): after 4 days
    # E[H] = 5000 exp(-4/8); the mean over particles has sd about
    # sqrt(5000 * q (1 - q) / 2000) ~ 0.55 with q = exp(-0.5); 5 sd allowed. Bug caught: the
    # length of stay read as a rate (exp(-4 * 8)) or the beds series reading another compartment.
    m, ps = setup(2000, hospital=5000, los=8.0)
    m.advance(ps, 0, 4, np.random.default_rng(5))
    q = math.exp(-4 / 8.0)
    mean_beds = m.expected(ps, "beds_occupied").mean()
    assert abs(mean_beds - 5000 * q) < 5 * math.sqrt(5000 * q * (1 - q) / 2000)
    # the occupancy series is the census of H, weighed with Poisson noise
    loglik = m.log_likelihood(ps, Observation(4, {"beds_occupied": 3000}))
    assert np.isfinite(loglik).all()
