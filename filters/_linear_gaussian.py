"""A linear-Gaussian local-level model written by hand against the Model protocol.

x_t = x_{t-1} + eta_t,  eta_t ~ N(0, state_var)
y_t = x_t + eps_t,      eps_t ~ N(0, obs_var)

It exists to check the filter against an exact Kalman filter and to show
how any Python class plugs into :class:`ParticleFilter`.
"""

from __future__ import annotations

import hashlib

import numpy as np

from ._observation import Observation, ObservationError
from ._particles import ParticleSet
from ._reports import Report

__all__ = ["LocalLevelModel"]


class LocalLevelModel:
    """``window_days`` > 0 keeps each particle's last levels, so a late ``y`` for
    day t - k (k <= window_days) can be judged against the particle's own path."""

    def __init__(
        self, state_var: float, obs_var: float, initial_mean: float, initial_var: float, window_days: int = 0
    ) -> None:
        self.state_var, self.obs_var = float(state_var), float(obs_var)
        self.initial_mean, self.initial_var = float(initial_mean), float(initial_var)
        self.window_days = int(window_days)

    def fingerprint(self) -> str:
        text = f"local-level:{self.state_var}:{self.obs_var}:{self.initial_mean}:{self.initial_var}"
        if self.window_days:
            text += f":window={self.window_days}"
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def initial(self, n: int, rng: np.random.Generator) -> ParticleSet:
        # The prior describes x_0; the first observation is of x_1 = x_0 + eta.
        x = rng.normal(self.initial_mean, np.sqrt(self.initial_var), size=(n, 1))
        history = np.repeat(x, self.window_days + 1, axis=1) if self.window_days else np.zeros((n, 0))
        return ParticleSet(states=x, params=np.zeros((n, 0)), history=history)

    def advance(self, particles: ParticleSet, t0: int, t1: int, rng: np.random.Generator) -> None:
        for _ in range(t0, t1):
            particles.states += rng.normal(0.0, np.sqrt(self.state_var), size=particles.states.shape)
            if self.window_days:
                particles.history[:, 1:] = particles.history[:, :-1].copy()
                particles.history[:, 0] = particles.states[:, 0]

    def check_report(self, report: Report, now: int) -> None:
        self.check_observation(Observation(report.time, {report.series: report.value}))
        if not 0 <= now - report.time <= self.window_days:
            raise ObservationError(f"day {report.time} is outside the window of {self.window_days} days before day {now}")

    def report_log_likelihood(self, particles: ParticleSet, report: Report, now: int) -> np.ndarray:
        level = particles.history[:, now - report.time] if self.window_days else particles.states[:, 0]
        r = report.value - level
        return -0.5 * (np.log(2 * np.pi * self.obs_var) + r * r / self.obs_var)

    def check_observation(self, observation: Observation) -> None:
        unknown = set(observation.values) - {"y"}
        if unknown:
            raise ObservationError(f"series {sorted(unknown)} not known; allowed: ['y']")

    def log_likelihood(self, particles: ParticleSet, observation: Observation) -> np.ndarray:
        y = observation.values.get("y")
        if y is None:
            return np.zeros(particles.size)
        r = y - particles.states[:, 0]
        return -0.5 * (np.log(2 * np.pi * self.obs_var) + r * r / self.obs_var)

    def describe(self, particles: ParticleSet, t: float = 0.0) -> dict[str, np.ndarray]:
        return {"level": particles.states[:, 0]}
