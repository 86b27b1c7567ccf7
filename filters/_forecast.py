"""Forecasts from the current cloud: simulate trajectories ahead, with
observation noise, and read off exceedance probabilities."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._compartmental import CompartmentalModel
from ._particles import ParticleSet
from ._resampling import resample

__all__ = ["Forecast", "forecast"]


@dataclass(frozen=True)
class Forecast:
    """Simulated futures.

    reported : dict series -> ndarray of shape (n_trajectories, horizon)
        Reported counts drawn from the observation model, day 1..horizon ahead.
    expected : dict series -> ndarray of shape (n_trajectories, horizon)
        Expected reported counts (before observation noise).
    start : the model day the forecast starts from (day 1 ahead is start + 1).
    """

    start: int
    reported: dict[str, np.ndarray]
    expected: dict[str, np.ndarray]

    def exceedance(self, series: str, threshold: float, within: int) -> float:
        """P(reported count > threshold on at least one of the next ``within`` days)."""
        draws = self.reported[series][:, :within]
        return float(np.mean(np.any(draws > threshold, axis=1)))


def forecast(
    model: CompartmentalModel,
    particles: ParticleSet,
    weights: np.ndarray,
    start: int,
    horizon: int,
    n_trajectories: int,
    rng: np.random.Generator,
) -> Forecast:
    """Draw ``n_trajectories`` particles by weight and simulate ``horizon`` days ahead."""
    if horizon < 1:
        raise ValueError(f"horizon must be at least 1 day, got {horizon}")
    index = resample(weights, rng, "systematic", n=n_trajectories)
    futures = particles.take(index)
    reported = {s.name: np.empty((n_trajectories, horizon), dtype=np.int64) for s in model.series}
    expected = {s.name: np.empty((n_trajectories, horizon)) for s in model.series}
    for h in range(horizon):
        model.advance(futures, start + h, start + h + 1, rng)
        drawn = model.sample_observation(futures, rng)
        for name in reported:
            reported[name][:, h] = drawn[name]
            expected[name][:, h] = model.expected(futures, name)
    return Forecast(start=start, reported=reported, expected=expected)
