"""Observed series shared by the model families: compiled once, then read from
each particle's incidence history.

A model that keeps its daily event counts in ``ParticleSet.history`` with shape
(n_particles, history_days, n_slots, n_groups), newest day first, gets the whole
observation layer (reporting fraction, delay kernel, weekly cadence, Poisson,
negative-binomial or binomial noise, late values and revisions of event-dated
series) by compiling its ``[[series]]`` tables with :func:`compile_series` and
inheriting :class:`ObservedSeries`. The host sets ``series``,
``_series_by_name``, ``_mask_groups`` (:func:`mask_groups`), ``_cdf_tables``
(an empty dict), ``window_days`` and ``spec.name``. Prevalence series read
``states[:, :, slot]``, the compartmental layout; other families declare
incidence series only.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._observation import (
    Observation,
    ObservationError,
    _negbin_loglik,
    _negbin_size_terms,
    betabinomial_loglik,
    binomial_loglik,
    log_concentration_loglik,
    delay_kernel,
    poisson_loglik,
)
from ._model import ModelGuardError, first_bad
from ._particles import ParticleSet
from ._predictive import PredictiveLaw
from ._reports import Report, ReportingCdfTable, reporting_cdf

__all__ = ["MAX_COUNT", "ObservedSeries", "compile_series", "mask_groups"]

# Counts above this are rejected as implausible for a surveillance series.
MAX_COUNT = 1e9


@dataclass(frozen=True)
class _CompiledSeries:
    name: str
    kind: str
    slot: int  # observed-flow slot (incidence) or compartment index (prevalence)
    group_mask: np.ndarray  # (G,) of 0/1
    weights: np.ndarray  # (L_s,) weights over history days (incidence)
    reporting: float | int  # constant fraction, or parameter column if int via _param
    reporting_param: int | None
    noise: str
    dispersion: float
    dispersion_param: int | None
    weekly: bool
    kernel: np.ndarray  # (K,) daily delay kernel (before the weekly sum)
    event_dated: bool = False
    # Reporting delay of an event-dated series: dist, (mean const, param), (sd const, param), max days.
    rdelay: tuple | None = None
    # Positivity series: ((background const, param), (enrichment const, param)).
    positivity: tuple | None = None
    # Concentration series (see _Shedding); None for every other kind.
    shedding: "_Shedding | None" = None


@dataclass(frozen=True)
class _Shedding:
    """A compiled concentration series: profile over days since infection, scale, catchment, noise."""

    dist: str
    mean: tuple  # (const, param column or None)
    sd: tuple
    max_days: int
    scale: tuple
    catchment: float
    reference_flow: float | None
    noise_sd: tuple
    df: float | None


def compile_series(
    series: Sequence[Any],
    groups: list[str],
    slot_of: Callable[[Any], int],
    resolve: Callable[[Any, str], int | None],
    window_days: int,
) -> tuple[list[_CompiledSeries], int]:
    """Compile ``[[series]]`` tables (``schemas.Series``) against a model's groups.

    ``slot_of(series)`` gives the history slot (incidence) or compartment index
    (prevalence); ``resolve(ref, where)`` the parameter column a name refers to
    (None for a number), raising the model's error otherwise. Returns the
    compiled series and the history length (days) the incidence series need.
    """
    out: list[_CompiledSeries] = []
    history_days = 0
    for s in series:
        mask = np.zeros(len(groups))
        for g in s.groups or groups:
            mask[groups.index(g)] = 1.0
        kernel = (
            delay_kernel(s.delay.dist, s.delay.mean, s.delay.sd, s.delay.max_days)
            if s.delay is not None
            else np.ones(1)
        )
        weights = np.convolve(kernel, np.ones(7)) if s.cadence == "weekly" else kernel
        if s.kind == "incidence":
            history_days = max(history_days, weights.size + window_days)
        rdelay = None
        if s.reporting_delay is not None:
            d = s.reporting_delay
            mean_p = resolve(d.mean, f"series {s.name!r} reporting_delay.mean")
            sd_p = resolve(d.sd, f"series {s.name!r} reporting_delay.sd")
            rdelay = (
                d.dist,
                (float(d.mean) if mean_p is None else 0.0, mean_p),
                (float(d.sd) if sd_p is None else 0.0, sd_p),
                d.max_days,
            )
        positivity = None
        if getattr(s, "positivity", None) is not None:
            bg, en = s.positivity.background, s.positivity.enrichment
            bg_p = resolve(bg, f"series {s.name!r} positivity.background")
            en_p = resolve(en, f"series {s.name!r} positivity.enrichment")
            positivity = ((float(bg) if bg_p is None else 0.0, bg_p), (float(en) if en_p is None else 0.0, en_p))
        shedding = None
        if getattr(s, "shedding", None) is not None:
            sh = s.shedding

            def ref(value: Any, where: str) -> tuple:
                col = resolve(value, f"series {s.name!r} {where}")
                return (float(value) if col is None else 0.0, col)

            shedding = _Shedding(
                dist=sh.dist,
                mean=ref(sh.mean, "shedding.mean"),
                sd=ref(sh.sd, "shedding.sd"),
                max_days=sh.max_days,
                scale=ref(s.scale, "scale"),
                catchment=1.0 if s.catchment is None else float(s.catchment),
                reference_flow=s.reference_flow,
                noise_sd=ref(s.noise.sd, "noise.sd"),
                df=s.noise.df,
            )
            if shedding.mean[1] is None and shedding.sd[1] is None:
                weights = delay_kernel(sh.dist, shedding.mean[0], shedding.sd[0], sh.max_days)
            else:  # estimated profile: one per particle (see ObservedSeries._shedding_weights)
                weights = np.full(sh.max_days + 1, np.nan)
            history_days = max(history_days, weights.size + window_days)
        rep_param = resolve(s.reporting, f"series {s.name!r} reporting")
        disp_param = resolve(s.noise.dispersion, f"series {s.name!r} dispersion")
        out.append(
            _CompiledSeries(
                name=s.name,
                kind=s.kind,
                slot=slot_of(s),
                group_mask=mask,
                weights=weights,
                reporting=s.reporting if rep_param is None else 0.0,  # type: ignore[arg-type]
                reporting_param=rep_param,
                noise=s.noise.dist,
                dispersion=float(s.noise.dispersion) if disp_param is None and s.noise.dispersion is not None else 0.0,
                dispersion_param=disp_param,
                weekly=s.cadence == "weekly",
                kernel=kernel,
                event_dated=s.dated_by == "event",
                rdelay=rdelay,
                positivity=positivity,
                shedding=shedding,
            )
        )
    return out, history_days


def mask_groups(series: Sequence[_CompiledSeries]) -> dict[str, np.ndarray | None]:
    """Groups of each series when its mask is 0/1 (always, as compiled); None otherwise."""
    out: dict[str, np.ndarray | None] = {}
    for s in series:
        groups = np.flatnonzero(s.group_mask)
        out[s.name] = groups if np.all(s.group_mask[groups] == 1.0) else None
    return out


class ObservedSeries:
    """The observation layer over ``history`` (see the module docstring)."""

    series: list[_CompiledSeries]
    window_days: int
    default_window_days: int
    spec: Any
    _series_by_name: dict[str, _CompiledSeries]
    _mask_groups: dict[str, np.ndarray | None]
    _cdf_tables: dict[str, ReportingCdfTable]

    def fingerprint(self) -> str:
        """The spec's fingerprint; a window other than the spec's changes it (the
        particles' history then has another length)."""
        fp = self.spec.fingerprint()
        if self.window_days == self.default_window_days:
            return fp
        return hashlib.sha256(f"{fp}|window_days={self.window_days}".encode()).hexdigest()[:16]

    def check_observation(self, observation: Observation) -> None:
        for name, value in observation.values.items():
            if name not in self._series_by_name:
                raise ObservationError(
                    f"series {name!r} is not observed by model {self.spec.name!r}; "
                    f"allowed: {sorted(self._series_by_name)}"
                )
            if value is None:
                continue
            v = float(value)
            if self._series_by_name[name].kind == "concentration":
                flow = observation.flows.get(name)
                self._check_concentration(name, v, observation.limits.get(name), flow)
                if flow is not None and self._series_by_name[name].shedding.reference_flow is None:  # type: ignore[union-attr]
                    raise ObservationError(
                        f"series {name!r} is given a sample flow of {flow!r}, but its spec sets no reference_flow; "
                        "set reference_flow (the flow its scale refers to) to use the flow, or leave the flow out"
                    )
                continue
            if not math.isfinite(v) or v < 0 or v != math.floor(v) or v > MAX_COUNT:
                raise ObservationError(
                    f"series {name!r} has count {value!r}; counts must be whole numbers "
                    f"between 0 and {MAX_COUNT:.0e}"
                )
            if self._series_by_name[name].kind == "positivity":
                self._check_tests(name, v, observation.trials.get(name))
        for name, tests in observation.trials.items():
            s = self._series_by_name.get(name)
            if tests is not None and (s is None or s.kind != "positivity"):
                raise ObservationError(
                    f"tests are given for series {name!r}, which is not a positivity series; "
                    f"positivity series: {sorted(n for n, c in self._series_by_name.items() if c.kind == 'positivity')}"
                )

        for what, given in (("limit of detection", observation.limits), ("flow", observation.flows)):
            for name, extra in given.items():
                s = self._series_by_name.get(name)
                if extra is not None and (s is None or s.kind != "concentration"):
                    raise ObservationError(
                        f"a {what} is given for series {name!r}, which is not a concentration series; "
                        f"concentration series: {sorted(n for n, c in self._series_by_name.items() if c.kind == 'concentration')}"
                    )

    @staticmethod
    def _check_concentration(name: str, value: float, lod: float | None, flow: float | None) -> None:
        """A concentration is finite and >= 0; 0 (or any value below the limit) needs a positive limit."""
        if not math.isfinite(value) or value < 0:
            raise ObservationError(f"series {name!r} has concentration {value!r}; it must be finite and >= 0")
        if lod is not None and not (math.isfinite(lod) and lod > 0):
            raise ObservationError(f"series {name!r} has limit of detection {lod!r}; it must be finite and > 0")
        if flow is not None and not (math.isfinite(flow) and flow > 0):
            raise ObservationError(f"series {name!r} has flow {flow!r}; it must be finite and > 0")
        if value == 0 and lod is None:
            raise ObservationError(
                f"series {name!r} has concentration 0 without a limit of detection; a concentration is never "
                "read as zero: send the lab's limit, and the value counts as below it"
            )

    @staticmethod
    def _check_tests(name: str, positives: float, tests: float | None) -> None:
        """Positives of a positivity series need a whole, positive number of tests at least as large."""
        if tests is None:
            raise ObservationError(f"series {name!r} counts positives out of tests, but no number of tests is given")
        n = float(tests)
        if not math.isfinite(n) or n < 1 or n != math.floor(n) or n > MAX_COUNT:
            raise ObservationError(
                f"series {name!r} has {tests!r} tests; tests must be whole numbers between 1 and {MAX_COUNT:.0e} "
                "(the share positive of zero tests is undefined)"
            )
        if positives > n:
            raise ObservationError(f"series {name!r} has {positives:g} positives out of {n:g} tests; positives cannot exceed tests")

    def series_named(self, name: str) -> _CompiledSeries:
        """The compiled series ``name`` (its kind, cadence, dating); KeyError if unknown."""
        return self._series_by_name[name]

    def _column(self, params: np.ndarray, col: int | None, const: float) -> np.ndarray | float:
        return params[:, col] if col is not None else const

    def _guard_series(self, particles: ParticleSet, s: _CompiledSeries) -> None:
        """A reporting fraction taken from a parameter must lie in [0, 1], a dispersion be > 0
        and finite, for every particle (a prior that allows otherwise is a spec error)."""
        checks = []
        if s.reporting_param is not None:
            checks.append(("reporting fraction", s.reporting_param, True, 1.0, "in [0, 1]"))
        if s.noise in ("negbin", "betabinomial") and s.dispersion_param is not None:
            checks.append(("dispersion", s.dispersion_param, False, None, "finite and > 0"))
        if s.shedding is not None:
            sh = s.shedding
            for what, (_, col) in (("shedding mean", sh.mean), ("shedding sd", sh.sd), ("scale", sh.scale), ("noise sd", sh.noise_sd)):
                if col is not None:
                    checks.append((what, col, False, None, "finite and > 0"))
        if s.positivity is not None:
            (_, bg_p), (_, en_p) = s.positivity
            if bg_p is not None:
                checks.append(("positivity background", bg_p, True, 1.0, "in [0, 1]"))
            if en_p is not None:
                checks.append(("positivity enrichment", en_p, False, None, "finite and > 0"))
        for what, col, allow_zero, upper, allowed in checks:
            values = particles.params[:, col]
            where = first_bad(values, allow_zero=allow_zero, upper=upper)
            if where is not None:
                i = where[0]
                given = {name: float(particles.params[i, j]) for j, name in enumerate(self.param_names)}
                raise ModelGuardError(
                    f"model {self.spec.name!r}: series {s.name!r} has {what} {self.param_names[col]!r} = {float(values[i])!r} "
                    f"(particle {i}: {given}); it must be {allowed}"
                )

    def expected(self, particles: ParticleSet, series: str) -> np.ndarray:
        """Expected reported count (incidence) or true size (prevalence) per particle."""
        s = self._series_by_name[series]
        if s.kind == "positivity":
            return self._share_positive(particles, s)
        if s.kind == "concentration":
            return self._concentration_mean(particles, s)
        rho = self._column(particles.params, s.reporting_param, s.reporting)
        if s.kind == "prevalence":
            return rho * (particles.states[:, :, s.slot] @ s.group_mask)
        return rho * (self._daily(particles, s) @ s.weights)

    def _share_positive(self, particles: ParticleSet, s: _CompiledSeries) -> np.ndarray:
        """Probability that a test of a positivity series is positive, per particle, (n,).

        p = 1 - (1 - background) * exp(-enrichment * x), x the share of the
        series' groups in its compartment (``schemas.Positivity``).
        """
        (bg, bg_p), (en, en_p) = s.positivity  # type: ignore[misc]
        background = self._column(particles.params, bg_p, bg)
        enrichment = self._column(particles.params, en_p, en)
        mask = s.group_mask.astype(np.int64)
        infected = particles.states[:, :, s.slot] @ mask
        population = particles.states.sum(axis=2) @ mask
        share = infected / np.maximum(population, 1)
        return 1.0 - (1.0 - background) * np.exp(-enrichment * share)

    def _shedding_weights(self, particles: ParticleSet, s: _CompiledSeries) -> np.ndarray:
        """Shedding profile over days 0..max_days since infection: (K,) fixed, or (n, K) when
        its mean or sd is a parameter (discretised as ``delay_kernel``, per particle)."""
        sh = s.shedding
        assert sh is not None
        if sh.mean[1] is None and sh.sd[1] is None:
            return s.weights
        mean = self._column(particles.params, sh.mean[1], sh.mean[0])
        sd = self._column(particles.params, sh.sd[1], sh.sd[0])
        return np.diff(reporting_cdf(sh.dist, mean, sd, sh.max_days), axis=1, prepend=0.0)

    def _concentration_mean(self, particles: ParticleSet, s: _CompiledSeries, lag: int = 0, flow: float | None = None) -> np.ndarray:
        """Expected (median) concentration per particle, (n,): scale * catchment * sum_d w_d I(t - d),
        I the series' daily new infections (days since infection d = 0..max_days), diluted by
        reference_flow / flow when the sample's flow is given and the series has a reference flow."""
        sh = s.shedding
        assert sh is not None
        w = self._shedding_weights(particles, s)
        daily = self._daily(particles, s, lag, w.shape[-1])
        load = daily @ w if w.ndim == 1 else np.einsum("nk,nk->n", daily, w)
        mean = self._column(particles.params, sh.scale[1], sh.scale[0]) * sh.catchment * load
        if flow is not None and sh.reference_flow is not None:
            mean = mean * (sh.reference_flow / flow)
        return mean

    def _concentration_loglik(
        self, particles: ParticleSet, s: _CompiledSeries, y: float, lod: float | None, flow: float | None, lag: int = 0
    ) -> np.ndarray:
        sh = s.shedding
        assert sh is not None
        mean = self._concentration_mean(particles, s, lag, flow)
        sd = self._column(particles.params, sh.noise_sd[1], sh.noise_sd[0])
        return log_concentration_loglik(y, mean, sd, lod, sh.df)

    def _positives_loglik(self, particles: ParticleSet, s: _CompiledSeries, y: float, tests: float) -> np.ndarray:
        p = self._share_positive(particles, s)
        if s.noise == "binomial":
            return binomial_loglik(y, tests, p)
        return betabinomial_loglik(y, tests, p, self._column(particles.params, s.dispersion_param, s.dispersion))

    def _daily(self, particles: ParticleSet, s: _CompiledSeries, lag: int = 0, length: int | None = None) -> np.ndarray:
        """Daily counts of the series' flow over its groups, (n, L) float, newest first.

        Equal to ``history[:, :L, slot, :] @ group_mask`` (the mask is 0/1 and the
        counts are whole numbers, so the sum is exact in any order), without the
        per-row overhead of a stacked matrix product.
        """
        block = particles.history[:, lag : lag + (s.weights.size if length is None else length), s.slot, :]
        groups = self._mask_groups[s.name]
        if groups is None or block.dtype.kind not in "iu":
            return block @ s.group_mask
        if groups.size == 0:
            return np.zeros(block.shape[:2])
        total = block[:, :, groups[0]]
        for g in groups[1:]:
            total = total + block[:, :, g]
        return np.array(total, dtype=float, order="C")

    def _trials(self, particles: ParticleSet, s: _CompiledSeries, lag: int = 0) -> np.ndarray:
        if s.kind == "prevalence":
            return particles.states[:, :, s.slot] @ s.group_mask.astype(np.int64)
        return particles.history[:, lag : lag + s.weights.size, s.slot, :] @ s.group_mask.astype(np.int64) @ np.ones(
            s.weights.size, dtype=np.int64
        )

    def log_likelihood(self, particles: ParticleSet, observation: Observation) -> np.ndarray:
        self.check_observation(observation)
        total = np.zeros(particles.size)
        size_terms: dict = {}  # negative-binomial size terms, shared by series with one size
        for name, y in observation.present().items():
            s = self._series_by_name[name]
            self._guard_series(particles, s)
            y = float(y)
            if s.kind == "positivity":
                total += self._positives_loglik(particles, s, y, float(observation.trials[name]))  # type: ignore[arg-type]
                continue
            if s.kind == "concentration":
                total += self._concentration_loglik(particles, s, y, observation.limits.get(name), observation.flows.get(name))
                continue
            if s.noise == "binomial":
                rho = self._column(particles.params, s.reporting_param, s.reporting)
                total += binomial_loglik(y, self._trials(particles, s), rho)
                continue
            mu = self.expected(particles, name)
            if s.noise == "poisson":
                total += poisson_loglik(y, mu)
            else:
                key = ("param", s.dispersion_param) if s.dispersion_param is not None else ("value", s.dispersion)
                if key not in size_terms:
                    k = self._column(particles.params, s.dispersion_param, s.dispersion)
                    size_terms[key] = _negbin_size_terms(k)
                total += _negbin_loglik(y, mu, size_terms[key])
        return total

    # ----------------------------------------------------- late and revised
    def check_report(self, report: Report, now: int) -> None:
        """Raise ObservationError if ``report`` cannot be assimilated by a cloud standing at day ``now``."""
        trials = {report.series: report.trials} if report.trials is not None else {}
        limits = {report.series: report.lod} if report.lod is not None else {}
        flows = {report.series: report.flow} if report.flow is not None else {}
        self.check_observation(Observation(report.time, {report.series: report.value}, trials, limits, flows))
        s = self._series_by_name[report.series]
        lag = now - report.time
        if lag < 0:
            raise ObservationError(f"series {s.name!r}: day {report.time} is ahead of the cloud's day {now}; move the cloud first")
        if lag > self.window_days:
            raise ObservationError(
                f"series {s.name!r}: day {report.time} is {lag} days before the cloud's day {now}; "
                f"the assimilation window keeps {self.window_days} days"
            )
        if s.kind in ("prevalence", "positivity") and lag > 0:
            raise ObservationError(f"series {s.name!r} is a {s.kind} snapshot: only the cloud's current day can be assimilated")
        if not s.event_dated and (report.previous or report.as_of is not None):
            raise ObservationError(f"series {s.name!r} is dated by report: its counts are final on arrival and are not revised")
        if report.increment < 0:
            raise ObservationError(f"series {s.name!r}: total {report.value} is below the {report.previous} already assimilated")

    def _event_means(self, particles: ParticleSet, s: _CompiledSeries, lag: int) -> np.ndarray:
        """Eventual expected count of each event day of the period, (n, days), newest day first."""
        rho = self._column(particles.params, s.reporting_param, s.reporting)
        days = 7 if s.weekly else 1
        k = s.kernel.size
        out = np.empty((particles.size, days))
        for i in range(days):
            out[:, i] = self._daily(particles, s, lag + i, k) @ s.kernel
        return out * np.reshape(rho, (-1, 1))

    def _reported_share(self, particles: ParticleSet, s: _CompiledSeries, time: int, as_of: int | None) -> np.ndarray:
        """F(as_of - j) for each event day j of the period ending on ``time``: (n or 1, days)."""
        days = 7 if s.weekly else 1
        if as_of is None:
            return np.ones((1, days))
        dist, (mean, mean_p), (sd, sd_p), max_days = s.rdelay  # type: ignore[misc]
        elapsed = as_of - (time - np.arange(days))  # days since each event day
        columns = np.clip(elapsed, 0, max_days)
        if (mean_p is None) != (sd_p is None):  # one of them varies by particle: interpolate a table
            table = self._cdf_tables.get(s.name)
            if table is None:
                table = self._cdf_tables[s.name] = ReportingCdfTable(
                    dist, None if mean_p is not None else mean, None if sd_p is not None else sd, max_days
                )
            share = table(particles.params[:, mean_p if mean_p is not None else sd_p], columns)
        else:
            cdf = reporting_cdf(
                dist,
                particles.params[:, mean_p] if mean_p is not None else mean,
                particles.params[:, sd_p] if sd_p is not None else sd,
                max_days,
            )
            share = cdf[:, columns]
        share[:, elapsed < 0] = 0.0
        return share

    def report_mean(self, particles: ParticleSet, report: Report, now: int) -> np.ndarray:
        """Expected value of the report's increment per particle (what it adds to what was known)."""
        s = self._series_by_name[report.series]
        lag = now - report.time
        if s.kind in ("prevalence", "positivity"):
            return self.expected(particles, s.name)
        if s.kind == "concentration":
            return self._concentration_mean(particles, s, lag, report.flow)
        if not s.event_dated:
            rho = self._column(particles.params, s.reporting_param, s.reporting)
            return rho * (self._daily(particles, s, lag) @ s.weights)
        means = self._event_means(particles, s, lag)
        share = self._reported_share(particles, s, report.time, report.as_of)
        if report.previous_as_of is not None or report.previous:
            share = share - self._reported_share(particles, s, report.time, report.previous_as_of)
        return (means * share).sum(axis=1)

    def report_log_likelihood(self, particles: ParticleSet, report: Report, now: int) -> np.ndarray:
        """Per-particle log-likelihood of a report's increment, the cloud standing at day ``now``.

        The value of a past period is judged against each particle's own
        retained path (``history``), so nothing is re-simulated.
        """
        self.check_report(report, now)
        s = self._series_by_name[report.series]
        self._guard_series(particles, s)
        y = report.increment
        if s.kind == "positivity":
            return self._positives_loglik(particles, s, y, float(report.trials))  # type: ignore[arg-type]
        if s.kind == "concentration":
            return self._concentration_loglik(particles, s, y, report.lod, report.flow, now - report.time)
        if s.noise == "binomial":
            rho = self._column(particles.params, s.reporting_param, s.reporting)
            return binomial_loglik(y, self._trials(particles, s, now - report.time), rho)
        mu = self.report_mean(particles, report, now)
        if s.noise == "poisson":
            return poisson_loglik(y, mu)
        k = self._column(particles.params, s.dispersion_param, s.dispersion)
        return _negbin_loglik(y, mu, _negbin_size_terms(k))

    def report_law(self, particles: ParticleSet, report: Report, now: int) -> PredictiveLaw:
        """Each particle's law of the total a report carries (the law its
        :meth:`report_log_likelihood` weighs the increment by, shifted by the total
        already known), for the one-step predictive (:func:`filters.one_step_predictive`).
        A concentration's law is of the measured level at the sample's flow, uncensored."""
        s = self._series_by_name[report.series]
        self._guard_series(particles, s)
        column = self._column
        if s.kind == "positivity":
            p = self._share_positive(particles, s)
            if s.noise == "binomial":
                return PredictiveLaw("binomial", {"trials": float(report.trials), "p": p})  # type: ignore[arg-type]
            phi = column(particles.params, s.dispersion_param, s.dispersion)
            return PredictiveLaw("betabinomial", {"trials": float(report.trials), "p": p, "phi": phi})  # type: ignore[arg-type]
        if s.kind == "concentration":
            sh = s.shedding
            assert sh is not None
            median = self._concentration_mean(particles, s, now - report.time, report.flow)
            sd = column(particles.params, sh.noise_sd[1], sh.noise_sd[0])
            if sh.df is None:
                return PredictiveLaw("lognormal", {"median": median, "sd": sd})
            return PredictiveLaw("studentt", {"median": median, "sd": sd, "df": sh.df})
        if s.noise == "binomial":
            rho = column(particles.params, s.reporting_param, s.reporting)
            return PredictiveLaw("binomial", {"trials": self._trials(particles, s, now - report.time), "p": rho})
        mu = self.report_mean(particles, report, now)
        if s.noise == "poisson":
            return PredictiveLaw("poisson", {"mean": mu}, offset=float(report.previous))
        k = column(particles.params, s.dispersion_param, s.dispersion)
        return PredictiveLaw("negbin", {"mean": mu, "size": k}, offset=float(report.previous))

    def sample_increment(
        self, particles: ParticleSet, report: Report, now: int, rng: np.random.Generator, mean: np.ndarray | None = None
    ) -> np.ndarray:
        """Draw the increment a report would carry, per particle (for nowcasts: the reports still to come);
        ``mean``: :meth:`report_mean` of the same report, when the caller has it already."""
        s = self._series_by_name[report.series]
        mu = self.report_mean(particles, report, now) if mean is None else mean
        if s.noise == "negbin":
            k = np.broadcast_to(self._column(particles.params, s.dispersion_param, s.dispersion), mu.shape)
            return rng.poisson(rng.gamma(k, np.where(mu > 0, mu, 0.0) / k))
        return rng.poisson(np.where(mu > 0, mu, 0.0))

    def sample_positives(
        self, particles: ParticleSet, series: str, tests: np.ndarray | int, rng: np.random.Generator
    ) -> np.ndarray:
        """Draw positives out of ``tests`` per particle for a positivity series (binomial or beta-binomial)."""
        s = self._series_by_name[series]
        if s.kind != "positivity":
            raise ObservationError(f"series {series!r} is a {s.kind} series, not a positivity series")
        self._guard_series(particles, s)
        p = self._share_positive(particles, s)
        if s.noise == "betabinomial":
            phi = self._column(particles.params, s.dispersion_param, s.dispersion)
            inner = (p > 0) & (p < 1)  # p of exactly 0 or 1 is a point mass, drawn as itself
            p = np.where(inner, rng.beta(np.where(inner, p * phi, 1.0), np.where(inner, (1.0 - p) * phi, 1.0)), p)
        return rng.binomial(tests, p)

    def sample_concentration(self, particles: ParticleSet, series: str, rng: np.random.Generator) -> np.ndarray:
        """Draw a measured concentration per particle (at the reference flow, uncensored): the
        expected value times exp(sd * e), e standard normal or Student-t."""
        s = self._series_by_name[series]
        sh = s.shedding
        if sh is None:
            raise ObservationError(f"series {series!r} is a {s.kind} series, not a concentration series")
        self._guard_series(particles, s)
        mean = self._concentration_mean(particles, s)
        sd = self._column(particles.params, sh.noise_sd[1], sh.noise_sd[0])
        e = rng.standard_normal(particles.size) if sh.df is None else rng.standard_t(sh.df, particles.size)
        return mean * np.exp(sd * e)

    def sample_observation(self, particles: ParticleSet, rng: np.random.Generator) -> dict[str, np.ndarray]:
        """Draw one set of reported counts per particle from the observation model.

        A positivity series gives its share positive (the probability a test is
        positive) without test-count noise: how many tests the future holds is not
        known; :meth:`sample_positives` draws positives out of a given number.
        """
        out = {}
        for s in self.series:
            self._guard_series(particles, s)
            if s.kind == "positivity":
                out[s.name] = self._share_positive(particles, s)
                continue
            if s.kind == "concentration":
                out[s.name] = self.sample_concentration(particles, s.name, rng)
                continue
            rho = self._column(particles.params, s.reporting_param, s.reporting)
            if s.noise == "binomial":
                out[s.name] = rng.binomial(self._trials(particles, s), rho)
                continue
            mu = self.expected(particles, s.name)
            if s.noise == "poisson":
                out[s.name] = rng.poisson(mu)
            else:
                k = np.broadcast_to(self._column(particles.params, s.dispersion_param, s.dispersion), mu.shape)
                # Gamma-Poisson mixture: mean mu, variance mu + mu^2 / k.
                out[s.name] = rng.poisson(rng.gamma(k, np.where(mu > 0, mu, 0.0) / k))
        return out
