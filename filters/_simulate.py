"""Simulate a "true" epidemic and its reported counts from a model."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._compartmental import CompartmentalModel
from ._observation import Observation

__all__ = ["SimulatedSeason", "simulate_season"]


@dataclass
class SimulatedSeason:
    """A simulated truth.

    states : ndarray of shape (days + 1, n_groups, n_compartments), day 0 first.
    params : ndarray of shape (days + 1, n_params).
    observations : one Observation per day 1..days.
    """

    states: np.ndarray
    params: np.ndarray
    observations: list[Observation]


def simulate_season(
    model: CompartmentalModel,
    days: int,
    rng: np.random.Generator,
    params: dict[str, float] | None = None,
) -> SimulatedSeason:
    """One trajectory from the model's prior (or with ``params`` fixed).

    Weekly series get a value on days that are multiples of 7 only.
    """
    ps = model.initial(1, rng)
    for name, value in (params or {}).items():
        if name not in model.param_names:
            raise ValueError(f"parameter {name!r} not in model; allowed: {model.param_names}")
        ps.params[:, model.param_names.index(name)] = value
    states, pars, obs = [ps.states[0].copy()], [ps.params[0].copy()], []
    weekly = {s.name for s in model.series if s.weekly}
    for day in range(1, days + 1):
        model.advance(ps, day - 1, day, rng)
        drawn = model.sample_observation(ps, rng)
        values = {k: float(v[0]) for k, v in drawn.items() if k not in weekly or day % 7 == 0}
        obs.append(Observation(time=day, values=values))
        states.append(ps.states[0].copy())
        pars.append(ps.params[0].copy())
    return SimulatedSeason(np.array(states), np.array(pars), obs)
