"""The protocol every model follows to plug into :class:`ParticleFilter`.

A model is vectorised over particles: each method receives the whole
:class:`ParticleSet` and works on arrays with a leading particle axis. It
never holds random state; every draw uses the Generator passed in.
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable

import numpy as np

from ._observation import Observation
from ._particles import ParticleSet

__all__ = ["Model", "ModelError", "ModelGuardError", "first_bad"]


class ModelError(ValueError):
    """A model spec compiles to something that cannot run."""


class ModelGuardError(ModelError):
    """A rate or observation quantity of the model came out NaN, negative or infinite at run time.

    The message names the expression, the flow or series, the group, the day and
    the parameter values of one offending particle.
    """


def first_bad(values: np.ndarray, allow_zero: bool = True, upper: float | None = None) -> tuple[int, ...] | None:
    """Index of the first entry that is NaN, infinite, negative (or zero when not
    ``allow_zero``) or above ``upper``; None when every entry is fine. Two reductions
    on the fast path."""
    values = np.asarray(values, dtype=float)
    if values.size == 0:
        return None
    lo, hi = values.min(), values.max()
    ok = (lo >= 0 if allow_zero else lo > 0) and np.isfinite(hi) and (upper is None or hi <= upper)
    if ok:
        return None
    bad = ~np.isfinite(values) | (values < 0 if allow_zero else values <= 0)
    if upper is not None:
        bad |= values > upper
    return tuple(int(i) for i in np.argwhere(bad)[0])


@runtime_checkable
class Model(Protocol):
    """What the filter needs from a model.

    Required
    --------
    initial(n, rng) -> ParticleSet
        Draw ``n`` particles from the prior at the model's start.
    advance(particles, t0, t1, rng) -> None
        Move every particle from day ``t0`` to day ``t1`` in place (t1 > t0).
    log_likelihood(particles, observation) -> ndarray of shape (n,)
        Per-particle log-probability of the observation; ``-inf`` where a
        particle cannot explain it. Must not return NaN.
    check_observation(observation) -> None
        Raise ObservationError if the observation can never be assimilated.
    describe(particles, t) -> dict[str, ndarray of shape (n,)]
        Named per-particle quantities to summarise (states, parameters, ...).
    fingerprint() -> str
        A short stable hash of the model's definition, stored in checkpoints.

    Optional
    --------
    static_parameters : ndarray of int
        Columns of ``params`` that are static (receive Liu-West jitter).
    to_unconstrained(params) / from_unconstrained(values)
        Maps between natural and unconstrained scales for those columns.
    move_parameters(particles, rng) -> None
        An MCMC move on parameters the model learns from each particle's own
        path (kept in ``particles.stats``), leaving the weights as they are;
        called after every weighting when static parameters are learned online
        (``liu_west_discount`` set), in place of the Liu-West jitter for them.
    """

    def initial(self, n: int, rng: np.random.Generator) -> ParticleSet: ...

    def advance(self, particles: ParticleSet, t0: int, t1: int, rng: np.random.Generator) -> None: ...

    def log_likelihood(self, particles: ParticleSet, observation: Observation) -> np.ndarray: ...

    def check_observation(self, observation: Observation) -> None: ...

    def describe(self, particles: ParticleSet, t: float) -> dict[str, np.ndarray]: ...

    def fingerprint(self) -> str: ...
