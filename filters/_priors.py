"""Sampling and densities of the prior distributions a spec can name, and
the transforms between a parameter's natural and unconstrained scales."""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import stats

from schemas import Beta, Gamma, LogNormal, Normal, Uniform

__all__ = ["ParameterScales", "sample_prior", "prior_logpdf", "to_unconstrained", "from_unconstrained"]


def sample_prior(dist: object, rng: np.random.Generator, size: int) -> np.ndarray:
    """Draw ``size`` values from a spec distribution."""
    if isinstance(dist, Uniform):
        return rng.uniform(dist.low, dist.high, size)
    if isinstance(dist, Normal):
        return rng.normal(dist.mean, dist.sd, size)
    if isinstance(dist, LogNormal):
        return rng.lognormal(dist.mean_log, dist.sd_log, size)
    if isinstance(dist, Gamma):
        return rng.gamma(dist.shape, dist.scale, size)
    if isinstance(dist, Beta):
        return rng.beta(dist.a, dist.b, size)
    raise TypeError(f"not a prior distribution: {dist!r}")


def prior_logpdf(dist: object, x: np.ndarray | float) -> np.ndarray:
    """Log-density on the natural scale (scipy.stats)."""
    if isinstance(dist, Uniform):
        return stats.uniform.logpdf(x, dist.low, dist.high - dist.low)
    if isinstance(dist, Normal):
        return stats.norm.logpdf(x, dist.mean, dist.sd)
    if isinstance(dist, LogNormal):
        return stats.lognorm.logpdf(x, dist.sd_log, scale=np.exp(dist.mean_log))
    if isinstance(dist, Gamma):
        return stats.gamma.logpdf(x, dist.shape, scale=dist.scale)
    if isinstance(dist, Beta):
        return stats.beta.logpdf(x, dist.a, dist.b)
    raise TypeError(f"not a prior distribution: {dist!r}")


def to_unconstrained(x: np.ndarray, transform: str, bounds: tuple[float, float]) -> np.ndarray:
    if transform == "log":
        return np.log(np.maximum(x, 1e-300))
    if transform == "logit":
        lo, hi = bounds
        u = np.clip((x - lo) / (hi - lo), 1e-12, 1 - 1e-12)
        return np.log(u) - np.log1p(-u)
    return np.asarray(x, dtype=float)


def from_unconstrained(y: np.ndarray, transform: str, bounds: tuple[float, float]) -> np.ndarray:
    if transform == "log":
        return np.exp(y)
    if transform == "logit":
        lo, hi = bounds
        return lo + (hi - lo) / (1.0 + np.exp(-y))
    return np.asarray(y, dtype=float)


class ParameterScales:
    """``to_unconstrained`` / ``from_unconstrained`` over every parameter column, for a model
    whose ``_transforms`` lists each column's (transform, bounds): the scales Liu-West jitter,
    drift and PMMH proposals work on."""

    _transforms: list[tuple[str, tuple[float, float]]]
    _pidx: dict[str, int]
    param_names: list[str]
    spec: Any

    def _resolve(self, ref: float | str | None, where: str) -> int | None:
        """The parameter column a name in the spec refers to (None for a number)."""
        if isinstance(ref, str):
            if ref in self._pidx:
                return self._pidx[ref]
            from ._model import ModelError

            raise ModelError(f"model {self.spec.name!r}, {where}: {ref!r} must be a parameter; allowed: {self.param_names}")
        return None

    def draw_parameters(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """(n, parameters): fixed values, or draws from each parameter's prior, in spec order."""
        params = np.empty((n, len(self.spec.parameters)))
        for j, p in enumerate(self.spec.parameters.values()):
            params[:, j] = p.value if p.kind == "fixed" else sample_prior(p.prior, rng, n)
        return params

    def to_unconstrained(self, params: np.ndarray) -> np.ndarray:
        out = np.array(params, dtype=float)
        for j, (transform, bounds) in enumerate(self._transforms):
            out[..., j] = to_unconstrained(out[..., j], transform, bounds)
        return out

    def from_unconstrained(self, values: np.ndarray) -> np.ndarray:
        out = np.array(values, dtype=float)
        for j, (transform, bounds) in enumerate(self._transforms):
            out[..., j] = from_unconstrained(out[..., j], transform, bounds)
        return out
