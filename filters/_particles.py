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
    stats : ndarray of shape (n_particles, n_stats), float
        Running statistics of each particle's own path that a model keeps
        (e.g. the sufficient statistics of parameters it learns from the
        path); no columns for models that keep none.
    """

    states: np.ndarray
    params: np.ndarray
    history: np.ndarray
    log_weights: np.ndarray = field(default=None)  # type: ignore[assignment]
    stats: np.ndarray = field(default=None)  # type: ignore[assignment]

    def __post_init__(self) -> None:
        n = self.states.shape[0]
        if self.log_weights is None:
            self.log_weights = np.zeros(n)
        if self.stats is None:
            self.stats = np.zeros((n, 0))
        for name in ("params", "history", "log_weights", "stats"):
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
            stats=self.stats[index],
        )

    def arrays(self) -> dict[str, np.ndarray]:
        """The named arrays (``stats`` only when the model keeps some)."""
        out = {
            "states": self.states,
            "params": self.params,
            "history": self.history,
            "log_weights": self.log_weights,
        }
        if self.stats.shape[1]:
            out["stats"] = self.stats
        return out

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
            stats=np.array(arrays["stats"], dtype=float) if "stats" in arrays else None,
        )
