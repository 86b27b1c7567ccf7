"""The bootstrap particle filter with adaptive resampling."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, replace
from typing import Any

import numpy as np

from ._model import Model
from ._observation import Observation, ObservationError
from ._particles import ParticleSet
from ._predictive import Predictive, one_step_predictive
from ._reports import Report
from ._resampling import RESAMPLERS, resample
from ._rng import generator_state, restore_generator
from ._summary import DEFAULT_PROBS, Summary, summarise
from ._weights import effective_sample_size, log_sum_exp

__all__ = ["FilterConfig", "StepResult", "ParticleFilter", "STATE_FORMAT"]

STATE_FORMAT = 1


@dataclass(frozen=True)
class FilterConfig:
    """How the filter runs (configuration only; the cloud lives in the filter).

    n_particles : number of particles.
    resample_threshold : resample when ESS < threshold * n_particles (0..1].
    scheme : 'systematic' (default), 'stratified', 'residual' or 'multinomial'.
    liu_west_discount : None to disable, else delta in (0, 1) (e.g. 0.99):
        static parameters are shrunk toward their weighted mean and jittered
        after each resampling (Liu & West 2001), a = (3 delta - 1) / (2 delta);
        parameters a model learns from each particle's path instead are moved
        by its ``move_parameters`` after every weighting. None: neither.
    summary_probs : quantile levels reported in summaries.
    """

    n_particles: int = 2000
    resample_threshold: float = 0.5
    scheme: str = "systematic"
    liu_west_discount: float | None = None
    summary_probs: tuple[float, ...] = DEFAULT_PROBS

    def __post_init__(self) -> None:
        if not (isinstance(self.n_particles, int) and 1 <= self.n_particles <= 10_000_000):
            raise ValueError(f"n_particles must be an integer in [1, 10000000], got {self.n_particles!r}")
        if not 0 < self.resample_threshold <= 1:
            raise ValueError(f"resample_threshold must be in (0, 1], got {self.resample_threshold!r}")
        if self.scheme not in RESAMPLERS:
            raise ValueError(f"scheme must be one of {sorted(RESAMPLERS)}, got {self.scheme!r}")
        if self.liu_west_discount is not None and not 0 < self.liu_west_discount < 1:
            raise ValueError(f"liu_west_discount must be in (0, 1) or None, got {self.liu_west_discount!r}")
        if not all(0 < p < 1 for p in self.summary_probs):
            raise ValueError(f"summary_probs must lie in (0, 1), got {self.summary_probs!r}")


@dataclass(frozen=True)
class StepResult:
    """What one assimilation step did.

    ``log_evidence_increment`` is log p(y_t | y_1:t-1) estimated by the
    filter, or ``None`` when the step collapsed. ``ess`` is the effective
    sample size after weighting and before any resampling. ``predictive``
    (when asked for): each report with the cloud's one-step-ahead predictive
    of its value, before the step re-weighted the cloud.
    """

    time: int
    step: int
    log_evidence_increment: float | None
    ess: float
    resampled: bool
    collapsed: bool
    summary: Summary | None
    predictive: tuple[tuple[Report, Predictive], ...] | None = None


class ParticleFilter:
    """A particle cloud for one stream, advanced one observation at a time.

    Collapse policy: when no particle can explain an observation (every
    log-likelihood is -inf or NaN), the observation is *not* assimilated; the
    propagated particles keep their previous weights, the step is reported as
    collapsed with no log-evidence increment, and the filter carries on with
    the next observation. Nothing NaN reaches the weights or the summary.
    """

    def __init__(
        self,
        model: Model,
        config: FilterConfig,
        rng: np.random.Generator,
        particles: ParticleSet | None = None,
        time: int = 0,
        step_count: int = 0,
        log_evidence: float = 0.0,
    ) -> None:
        self.model = model
        self.config = config
        self.rng = rng
        self.particles = particles if particles is not None else model.initial(config.n_particles, rng)
        self.time = int(time)
        self.step_count = int(step_count)
        self.log_evidence = float(log_evidence)
        # lineage[i, k]: index, in the cloud of day time - k, of particle i's ancestor on that day
        # (k = 0..window); it counts the distinct paths a late value is judged against.
        n = self.particles.size
        self.window_days = int(getattr(model, "window_days", 0))
        self.lineage = np.broadcast_to(np.arange(n, dtype=np.int32)[:, None], (n, self.window_days + 1)).copy()

    # ----------------------------------------------------------------- update
    def predict(self, to_time: int) -> None:
        """Propagate the cloud to ``to_time`` without an observation (a gap)."""
        if to_time < self.time:
            raise ObservationError(f"cannot move the cloud back from day {self.time} to day {to_time}")
        if to_time > self.time:
            self.model.advance(self.particles, self.time, to_time, self.rng)
            days = min(int(to_time) - self.time, self.lineage.shape[1])
            self.lineage[:, days:] = self.lineage[:, :-days].copy()
            self.lineage[:, :days] = np.arange(self.particles.size, dtype=np.int32)[:, None]
            self.time = int(to_time)

    def step(self, observation: Observation, with_summary: bool = True) -> StepResult:
        """Assimilate one observation: propagate, weight, maybe resample."""
        self.model.check_observation(observation)
        if observation.time <= self.time and self.step_count > 0:
            raise ObservationError(
                f"observation for day {observation.time} is not after the cloud's day {self.time}"
            )
        self.predict(observation.time)
        return self._weigh(self.model.log_likelihood(self.particles, observation), with_summary)

    def assimilate(
        self, time: int, reports: list[Report], with_summary: bool = True, predictive: Sequence[float] | None = None
    ) -> StepResult:
        """Move the cloud to day ``time`` (never back) and weigh it by every report at once.

        A report for a past day inside the model's window is judged against each
        particle's own retained path; nothing is re-simulated. The model must
        offer ``check_report`` and ``report_log_likelihood``. ``predictive``:
        quantile levels of each report's one-step-ahead predictive (the moved
        cloud with its weights before this step, :func:`one_step_predictive`;
        each report's marginal), returned in the result when the model offers
        ``report_law``. It draws no random numbers.
        """
        time = max(int(time), self.time)
        for report in reports:
            if report.time > time:
                raise ObservationError(f"report of {report.series!r} for day {report.time} is after day {time}")
            self.model.check_report(report, time)  # type: ignore[attr-defined]
        self.predict(time)
        checks = None
        if predictive is not None and hasattr(self.model, "report_law"):
            weights = self.weights()
            checks = tuple((report, self._one_step(report, weights, predictive)) for report in reports)
        loglik = np.zeros(self.particles.size)
        for report in reports:
            loglik += self.model.report_log_likelihood(self.particles, report, self.time)  # type: ignore[attr-defined]
        result = self._weigh(loglik, with_summary)
        return result if checks is None else replace(result, predictive=checks)

    def _one_step(self, report: Report, weights: np.ndarray, probs: Sequence[float]) -> Predictive:
        law = self.model.report_law(self.particles, report, self.time)  # type: ignore[attr-defined]
        censored = report.lod is not None and report.value < report.lod
        return one_step_predictive(law, weights, None if censored else float(report.value), probs, report.lod)

    def distinct_paths(self) -> int:
        """How many distinct ancestors the cloud has at the oldest day of the window (path degeneracy)."""
        return int(np.unique(self.lineage[:, -1]).size)

    def _weigh(self, loglik: np.ndarray, with_summary: bool) -> StepResult:
        ps = self.particles
        n = ps.size
        prior_log_w = ps.log_weights - log_sum_exp(ps.log_weights)
        loglik = np.asarray(loglik, dtype=float)
        loglik = np.where(np.isnan(loglik), -np.inf, loglik)
        posterior = prior_log_w + loglik
        total = log_sum_exp(posterior)
        self.step_count += 1
        if not math.isfinite(total):
            weights = np.exp(prior_log_w)
            summary = self._summary(weights) if with_summary else None
            return StepResult(self.time, self.step_count, None, effective_sample_size(weights), False, True, summary)
        self.log_evidence += total
        weights = np.exp(posterior - total)
        weights /= weights.sum()
        ess = effective_sample_size(weights)
        summary = self._summary(weights) if with_summary else None
        ps.log_weights = posterior - total
        resampled = ess < self.config.resample_threshold * n
        if resampled:
            self._resample(weights)
        move = getattr(self.model, "move_parameters", None)
        if move is not None and self.config.liu_west_discount is not None:
            move(self.particles, self.rng)
        return StepResult(self.time, self.step_count, total, ess, resampled, False, summary)

    def _resample(self, weights: np.ndarray) -> None:
        index = resample(weights, self.rng, self.config.scheme)
        static = getattr(self.model, "static_parameters", np.zeros(0, dtype=np.intp))
        delta = self.config.liu_west_discount
        if delta is not None and static.size:
            theta = self.model.to_unconstrained(self.particles.params)[:, static]  # type: ignore[attr-defined]
            mean = weights @ theta
            centred = theta - mean
            cov = (centred * weights[:, None]).T @ centred
        self.particles = self.particles.take(index)
        self.lineage = self.lineage[index]
        self.particles.log_weights = np.zeros(index.size)
        if delta is not None and static.size:
            a = (3 * delta - 1) / (2 * delta)
            chosen = theta[index]
            eigval, eigvec = np.linalg.eigh(cov)
            root = eigvec * np.sqrt(np.clip(eigval, 0, None))
            noise = self.rng.standard_normal(chosen.shape) @ root.T
            jittered = a * chosen + (1 - a) * mean + math.sqrt(1 - a * a) * noise
            full = self.model.to_unconstrained(self.particles.params)  # type: ignore[attr-defined]
            full[:, static] = jittered
            self.particles.params = self.model.from_unconstrained(full)  # type: ignore[attr-defined]

    # -------------------------------------------------------------- summaries
    def weights(self) -> np.ndarray:
        lw = self.particles.log_weights
        w = np.exp(lw - log_sum_exp(lw))
        return w / w.sum()

    def _summary(self, weights: np.ndarray) -> Summary:
        quantities = self.model.describe(self.particles, self.time)
        return summarise(quantities, weights, self.config.summary_probs)

    def summary(self) -> Summary:
        """Weighted mean and quantiles of the model's quantities now."""
        return self._summary(self.weights())

    def ess(self) -> float:
        return effective_sample_size(self.weights())

    # ------------------------------------------------------------ persistence
    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """The whole filter state: a JSON-able header and plain arrays (no pickle)."""
        header = {
            "format": STATE_FORMAT,
            "model_fingerprint": self.model.fingerprint(),
            "time": self.time,
            "step": self.step_count,
            "log_evidence": self.log_evidence if math.isfinite(self.log_evidence) else None,
            "rng": generator_state(self.rng),
            "config": {k: list(v) if isinstance(v, tuple) else v for k, v in asdict(self.config).items()},
            "numpy": np.__version__,
        }
        arrays = {k: v.copy() for k, v in self.particles.arrays().items()}
        arrays["lineage"] = self.lineage.copy()
        return header, arrays

    @classmethod
    def from_state(
        cls, model: Model, header: dict[str, Any], arrays: dict[str, np.ndarray]
    ) -> "ParticleFilter":
        """Rebuild a filter saved by :meth:`state`; refuses a different model."""
        if header.get("format") != STATE_FORMAT:
            raise ValueError(f"filter state format {header.get('format')!r} is not supported; expected {STATE_FORMAT}")
        if header.get("model_fingerprint") != model.fingerprint():
            raise ValueError(
                f"saved state belongs to model fingerprint {header.get('model_fingerprint')!r}, "
                f"but the model given has fingerprint {model.fingerprint()!r}"
            )
        cfg = dict(header["config"])
        cfg["summary_probs"] = tuple(cfg["summary_probs"])
        evidence = header["log_evidence"]
        pf = cls(
            model,
            FilterConfig(**cfg),
            restore_generator(header["rng"]),
            particles=ParticleSet.from_arrays(arrays),
            time=header["time"],
            step_count=header["step"],
            log_evidence=float("-inf") if evidence is None else evidence,
        )
        lineage = arrays.get("lineage")
        if lineage is not None and lineage.shape == pf.lineage.shape:
            pf.lineage = np.array(lineage, dtype=np.int32)
        return pf
