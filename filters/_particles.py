"""The particle set: a struct of arrays sharing a leading particle axis."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["ParticleSet"]


@dataclass
class ParticleSet:
    """Every particle's hypothesis, stored column-wise.

    Attributes
    ----------
    states : ndarray of shape (n_particles, ...)
        Latent state. Compartmental models use integer counts of shape
        (n_particles, n_groups, n_compartments); other models choose their own.
    params : ndarray of shape (n_particles, n_params)
        Parameter values on their natural scale.
    history : ndarray of shape (n_particles, history_days, ...)
        Recent per-day incidence, newest day first (index 0), used for
        reporting delays and weekly totals. May have a zero-length day axis.
    log_weights : ndarray of shape (n_particles,)
        Unnormalised log-weights.
    """

    states: np.ndarray
    params: np.ndarray
    history: np.ndarray
    log_weights: np.ndarray = field(default=None)  # type: ignore[assignment]

    def __post_init__(self) -> None:
        n = self.states.shape[0]
        if self.log_weights is None:
            self.log_weights = np.zeros(n)
        for name in ("params", "history", "log_weights"):
            arr = getattr(self, name)
            if arr.shape[0] != n:
                raise ValueError(
                    f"ParticleSet.{name} has {arr.shape[0]} rows but states has {n}; "
                    "every array must share the leading particle axis"
                )

    @property
    def size(self) -> int:
        return int(self.states.shape[0])

    def take(self, index: np.ndarray) -> "ParticleSet":
        """Gather every array with one index vector (used by resampling)."""
        return ParticleSet(
            states=self.states[index],
            params=self.params[index],
            history=self.history[index],
            log_weights=self.log_weights[index],
        )

    def arrays(self) -> dict[str, np.ndarray]:
        return {
            "states": self.states,
            "params": self.params,
            "history": self.history,
            "log_weights": self.log_weights,
        }

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> "ParticleSet":
        missing = {"states", "params", "history", "log_weights"} - set(arrays)
        if missing:
            raise ValueError(f"particle arrays are missing {sorted(missing)}")
        return cls(
            states=np.array(arrays["states"]),
            params=np.array(arrays["params"], dtype=float),
            history=np.array(arrays["history"]),
            log_weights=np.array(arrays["log_weights"], dtype=float),
        )
