"""Intervention scenarios from the current cloud, compared with common random numbers.

:func:`run_scenarios` forecasts the implicit ``baseline`` (no change) and every
given scenario from the same cloud with the same ``seed``. With a seed,
:func:`filters.forecast` draws its selection of particles and each day's
dynamics and observation noise from generators seeded by (seed, day), so every
scenario starts from the same particles and meets the same random numbers day
by day (common random numbers): trajectory ``i`` of a scenario is the paired
counterpart of trajectory ``i`` of the baseline, and differences between
scenarios are the interventions' effects rather than simulation noise. A
scenario with no change reproduces the baseline's trajectories exactly.

Outcomes per scenario (each with mean and quantiles across trajectories;
``levels`` default 5%, 50%, 95%, so low-high is a 90% interval):

``infections``
    New infections over the horizon (latent: every move along a flow marked
    ``infection = true``, all groups; in an individual-based model, every
    person infected), per trajectory.
``cases``
    Reported cases over the horizon: the sum over ``cases_series`` (by
    default every daily incidence series of the model; if it has none, every
    weekly one). A weekly-cadence series counts its complete 7-day blocks
    (days 1-7, 8-14, ... ahead; see ``Forecast.weekly``).
``peak``, ``peak_day``
    Largest daily (weekly: block) value of the summed ``cases_series`` within
    the horizon and the first day ahead it occurs (for weekly series, the
    block's last day).
``averted_infections``, ``averted_cases``
    Baseline minus scenario, computed per trajectory (paired) and then
    summarised; positive means fewer with the intervention. None for the
    baseline itself.
``exceedance``
    P(``series`` > ``threshold`` on some day within ``within`` days), for
    each threshold, with a Wilson score interval at the same level for the
    Monte Carlo error of that estimate (treating the trajectories as
    independent draws; it does not include the cloud's own sampling error).
    ``exceedance_change`` is the difference from the baseline's probability.

Per-series figures (``per_series``: total, peak and peak day of each reported
series on its own; prevalence series have a peak but no total) are kept too.

These are model-based estimates with uncertainty, for decision support;
local public-health judgement and reporting rules prevail.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.stats import norm

from schemas import BASELINE, Scenario, ScenarioFile, ScenarioThreshold, SettingScenario, SettingScenarioFile

from ._compartmental import CompartmentalModel
from ._forecast import Forecast, forecast
from ._interventions import Effects, compile_interventions
from ._particles import ParticleSet
from ._setting_effects import compile_setting_interventions

__all__ = [
    "CAUTION",
    "SCENARIO_LEVELS",
    "Interval",
    "Probability",
    "ScenarioOutcome",
    "ScenarioReport",
    "ThresholdCheck",
    "run_scenarios",
]

SCENARIO_LEVELS: tuple[float, float, float] = (0.05, 0.5, 0.95)
CAUTION = (
    "Model-based estimates with uncertainty; decision support only; "
    "local public-health judgement and reporting rules prevail."
)
_LATENT_INFECTIONS = "latent.infections"


@dataclass(frozen=True)
class Interval:
    """Mean and quantiles (at the report's ``levels``: low, median, high) across trajectories."""

    mean: float
    low: float
    median: float
    high: float

    @classmethod
    def of(cls, values: np.ndarray, levels: tuple[float, float, float]) -> "Interval":
        low, median, high = np.quantile(np.asarray(values, dtype=float), levels)
        return cls(float(np.mean(values)), float(low), float(median), float(high))

    def as_dict(self) -> dict[str, float]:
        return {"mean": self.mean, "low": self.low, "median": self.median, "high": self.high}


@dataclass(frozen=True)
class Probability:
    """An estimated probability and a Wilson score interval for its Monte Carlo error."""

    p: float
    low: float
    high: float

    @classmethod
    def of(cls, hits: np.ndarray, level: float) -> "Probability":
        n = int(hits.size)
        p = float(np.mean(hits))
        z = float(norm.ppf(0.5 + level / 2))
        centre = (p + z * z / (2 * n)) / (1 + z * z / n)
        half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
        return cls(p, max(0.0, centre - half), min(1.0, centre + half))

    def as_dict(self) -> dict[str, float]:
        return {"p": self.p, "low": self.low, "high": self.high}


@dataclass(frozen=True)
class ThresholdCheck:
    """P(``series`` > ``threshold`` on some day 1..``within`` ahead)."""

    series: str
    threshold: float
    within: int

    @property
    def key(self) -> str:
        return f"{self.series}>{self.threshold:g} within {self.within}d"

    def as_dict(self) -> dict[str, Any]:
        return {"key": self.key, "series": self.series, "threshold": self.threshold, "within_days": self.within}


@dataclass(frozen=True)
class ScenarioOutcome:
    """One scenario's outcomes (see the module docstring)."""

    name: str
    description: str
    interventions: tuple[str, ...]
    infections: Interval | None
    cases: Interval | None
    peak: Interval | None
    peak_day: Interval | None
    averted_infections: Interval | None
    averted_cases: Interval | None
    exceedance: dict[str, Probability]
    exceedance_change: dict[str, float | None]
    per_series: dict[str, dict[str, Interval]]

    def as_dict(self) -> dict[str, Any]:
        def iv(x: Interval | None) -> dict[str, float] | None:
            return None if x is None else x.as_dict()

        return {
            "name": self.name,
            "description": self.description,
            "interventions": list(self.interventions),
            "infections": iv(self.infections),
            "cases": iv(self.cases),
            "peak": iv(self.peak),
            "peak_day": iv(self.peak_day),
            "averted_infections": iv(self.averted_infections),
            "averted_cases": iv(self.averted_cases),
            "exceedance": {k: v.as_dict() for k, v in self.exceedance.items()},
            "exceedance_change": dict(self.exceedance_change),
            "per_series": {s: {k: v.as_dict() for k, v in d.items()} for s, d in self.per_series.items()},
        }


@dataclass(frozen=True)
class ScenarioReport:
    """Every scenario's outcomes (baseline first) and the forecasts behind them."""

    start: int
    horizon: int
    n_trajectories: int
    seed: int
    levels: tuple[float, float, float]
    cases_series: tuple[str, ...]
    cases_cadence: str  # "daily", "weekly" or "" (no cases series)
    thresholds: tuple[ThresholdCheck, ...]
    outcomes: tuple[ScenarioOutcome, ...]
    forecasts: dict[str, Forecast] = field(repr=False)
    notes: tuple[str, ...] = ()

    @property
    def names(self) -> list[str]:
        return [o.name for o in self.outcomes]

    def outcome(self, name: str) -> ScenarioOutcome:
        for o in self.outcomes:
            if o.name == name:
                return o
        raise KeyError(f"no scenario {name!r}; allowed: {self.names}")

    def as_dict(self) -> dict[str, Any]:
        """A JSON-able summary (no per-trajectory arrays)."""
        return {
            "start": self.start,
            "horizon": self.horizon,
            "n_trajectories": self.n_trajectories,
            "seed": self.seed,
            "levels": list(self.levels),
            "cases_series": list(self.cases_series),
            "cases_cadence": self.cases_cadence,
            "thresholds": [t.as_dict() for t in self.thresholds],
            "scenarios": [o.as_dict() for o in self.outcomes],
            "notes": list(self.notes),
            "caution": CAUTION,
        }

    def rows(self) -> list[dict[str, Any]]:
        """Long-format rows (scenario, metric, mean, low, median, high) for a CSV.

        Exceedance rows carry the probability as ``mean`` and its Monte Carlo
        interval as ``low``/``high`` (``median`` empty); rows that do not apply
        (e.g. cases averted for the baseline) are left out.
        """
        out: list[dict[str, Any]] = []

        def add(scenario: str, metric: str, x: Interval | None) -> None:
            if x is not None:
                out.append({"scenario": scenario, "metric": metric, **x.as_dict()})

        for o in self.outcomes:
            for metric in ("infections", "cases", "peak", "peak_day", "averted_infections", "averted_cases"):
                add(o.name, metric, getattr(o, metric))
            for key, prob in o.exceedance.items():
                out.append({"scenario": o.name, "metric": f"exceedance:{key}", "mean": prob.p, "low": prob.low, "median": None, "high": prob.high})
            for series, figures in o.per_series.items():
                for metric, x in figures.items():
                    add(o.name, f"{series}.{metric}", x)
        return out

    def daily(self) -> list[dict[str, Any]]:
        """Per scenario, day ahead and quantity: mean and quantiles across trajectories.

        Quantities: every reported series and ``latent.infections``.
        """
        out: list[dict[str, Any]] = []
        for name, fc in self.forecasts.items():
            quantities = list(fc.reported) + ([_LATENT_INFECTIONS] if "infections" in fc.latent else [])
            for q in quantities:
                draws = fc.draws(q)
                low, median, high = np.quantile(draws, self.levels, axis=0)
                mean = draws.mean(axis=0)
                for h in range(fc.horizon):
                    out.append(
                        {
                            "scenario": name,
                            "day_ahead": h + 1,
                            "model_day": fc.start + h + 1,
                            "quantity": q,
                            "mean": float(mean[h]),
                            "low": float(low[h]),
                            "median": float(median[h]),
                            "high": float(high[h]),
                        }
                    )
        return out


# ------------------------------------------------------------------ helpers
def _thresholds(
    given: Sequence[Any] | None, model: CompartmentalModel, horizon: int, notes: list[str]
) -> tuple[ThresholdCheck, ...]:
    # Individual-based models count every infection person by person; compartmental ones need an infection flow.
    latent = getattr(model, "_infection_flows", True)
    allowed = [s.name for s in model.series] + ([_LATENT_INFECTIONS] if latent else [])
    out: list[ThresholdCheck] = []
    for i, item in enumerate(given or ()):
        if isinstance(item, ThresholdCheck):
            series, value, within = item.series, item.threshold, item.within
        elif isinstance(item, ScenarioThreshold):
            series, value, within = item.series, item.threshold, item.within_days
        elif isinstance(item, Sequence) and not isinstance(item, str) and len(item) in (2, 3):
            series, value, within = item[0], item[1], item[2] if len(item) == 3 else None
        else:
            raise ValueError(f"thresholds[{i}] must be (series, threshold) or (series, threshold, within_days), got {item!r}")
        if series not in allowed:
            raise ValueError(f"thresholds[{i}]: series {series!r} is not in the forecast; allowed: {allowed}")
        value = float(value)
        if not math.isfinite(value) or value < 0:
            raise ValueError(f"thresholds[{i}]: threshold must be a finite number >= 0, got {value!r}")
        if within is None:
            within = horizon
        elif isinstance(within, bool) or not isinstance(within, (int, np.integer)) or within < 1:
            raise ValueError(f"thresholds[{i}]: within_days must be a whole number >= 1, got {within!r}")
        elif within > horizon:
            notes.append(f"threshold {series}>{value:g}: within {within} days is beyond the horizon; using {horizon} days")
            within = horizon
        check = ThresholdCheck(series, value, int(within))
        if check not in out:
            out.append(check)
    return tuple(out)


def _cases_series(model: CompartmentalModel, given: Sequence[str] | None) -> tuple[tuple[str, ...], str]:
    incidence = [s for s in model.series if s.kind == "incidence"]
    if given is None:
        daily = tuple(s.name for s in incidence if not s.weekly)
        if daily:
            return daily, "daily"
        weekly = tuple(s.name for s in incidence if s.weekly)
        return weekly, ("weekly" if weekly else "")
    by_name = {s.name: s for s in model.series}
    chosen = tuple(dict.fromkeys(given))
    for name in chosen:
        if name not in by_name or by_name[name].kind != "incidence":
            raise ValueError(
                f"cases_series: {name!r} is not an incidence series of model {model.spec.name!r}; "
                f"allowed: {[s.name for s in incidence]}"
            )
    cadences = {by_name[n].weekly for n in chosen}
    if len(cadences) > 1:
        raise ValueError(f"cases_series {list(chosen)} mix daily and weekly series; choose series of one cadence")
    if not chosen:
        return (), ""
    return chosen, ("weekly" if cadences.pop() else "daily")


def _scenarios(scenarios: Any) -> tuple[list[Any], list[ScenarioThreshold]]:
    if isinstance(scenarios, ScenarioFile):
        return scenarios.all_scenarios(), list(scenarios.thresholds)
    if isinstance(scenarios, SettingScenarioFile):
        return list(scenarios.scenarios), []
    if isinstance(scenarios, (Scenario, SettingScenario)):
        return [scenarios], []
    out = list(scenarios)
    for i, s in enumerate(out):
        if not isinstance(s, (Scenario, SettingScenario)):
            raise ValueError(f"scenarios[{i}] must be a schemas.Scenario or SettingScenario, got {type(s).__name__}")
    names = [s.name for s in out]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise ValueError(f"scenario names must be unique, repeated: {repeated}")
    return out, []


class _PerTrajectory:
    """Totals and peaks per trajectory of one forecast."""

    def __init__(self, fc: Forecast, model: CompartmentalModel, cases: tuple[str, ...], cadence: str) -> None:
        self.infections = fc.latent["infections"].sum(axis=1) if "infections" in fc.latent else None
        self.cases = self.peak = self.peak_day = None
        combined = self._combined(fc, cases, cadence)
        if combined is not None:
            self.cases = combined.sum(axis=1)
            self.peak = combined.max(axis=1)
            step = 7 if cadence == "weekly" else 1
            self.peak_day = (np.argmax(combined, axis=1) + 1) * step
        self.per_series: dict[str, dict[str, np.ndarray]] = {}
        for s in model.series:
            if s.kind == "prevalence":
                draws = fc.reported[s.name]
                self.per_series[s.name] = {"peak": draws.max(axis=1), "peak_day": np.argmax(draws, axis=1) + 1}
                continue
            values = self._combined(fc, (s.name,), "weekly" if s.weekly else "daily")
            if values is None:
                continue
            step = 7 if s.weekly else 1
            self.per_series[s.name] = {
                "total": values.sum(axis=1),
                "peak": values.max(axis=1),
                "peak_day": (np.argmax(values, axis=1) + 1) * step,
            }

    @staticmethod
    def _combined(fc: Forecast, series: tuple[str, ...], cadence: str) -> np.ndarray | None:
        if not series or (cadence == "weekly" and fc.horizon < 7):
            return None
        parts = [fc.weekly(s) if cadence == "weekly" else fc.reported[s] for s in series]
        total = np.array(parts[0], dtype=np.int64)
        for p in parts[1:]:
            total = total + p
        return total


def _interval(values: np.ndarray | None, levels: tuple[float, float, float]) -> Interval | None:
    return None if values is None else Interval.of(values, levels)


# ---------------------------------------------------------------------- run
def run_scenarios(
    model: CompartmentalModel,
    particles: ParticleSet,
    weights: np.ndarray,
    start: int,
    scenarios: ScenarioFile | Scenario | Sequence[Scenario],
    horizon: int = 28,
    n_trajectories: int = 2000,
    seed: int = 0,
    thresholds: Sequence[Any] | None = None,
    *,
    cases_series: Sequence[str] | None = None,
    levels: tuple[float, float, float] = SCENARIO_LEVELS,
) -> ScenarioReport:
    """Forecast the baseline and every scenario from one cloud with common random numbers.

    Parameters
    ----------
    model, particles, weights, start : the cloud and its model day (not modified).
    scenarios : a :class:`schemas.ScenarioFile` (its thresholds are used too),
        one :class:`schemas.Scenario` or a sequence of them; for an
        individual-based model, a :class:`schemas.SettingScenarioFile` or
        :class:`schemas.SettingScenario` (interventions on settings); the ``baseline``
        (no change) is always run first and must not be among them.
    horizon : days ahead; n_trajectories : simulated futures per scenario.
    seed : a non-negative int; the same seed gives the same report.
    thresholds : (series, threshold) or (series, threshold, within_days)
        pairs/triples, or :class:`schemas.ScenarioThreshold`; within_days
        defaults to the horizon. ``series`` is a reported series or
        ``latent.infections``.
    cases_series : the incidence series summed as "cases" (default: every
        daily incidence series; if none, every weekly one).
    levels : (low, median, high) quantile levels of every interval.
    """
    for value, what, low in ((horizon, "horizon", 1), (n_trajectories, "n_trajectories", 1), (seed, "seed", 0)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise ValueError(f"{what} must be a whole number >= {low}, got {value!r}")
    horizon = int(horizon)
    chosen, file_thresholds = _scenarios(scenarios)
    if len(levels) != 3 or not 0 < levels[0] < levels[1] < levels[2] < 1:
        raise ValueError(f"levels must be three increasing probabilities in (0, 1), got {levels!r}")
    levels = (float(levels[0]), float(levels[1]), float(levels[2]))
    notes: list[str] = []
    checks = _thresholds([*file_thresholds, *(thresholds or ())], model, horizon, notes)
    cases, cadence = _cases_series(model, cases_series)
    if cadence == "weekly" and horizon < 7:
        notes.append(f"cases series {list(cases)} are weekly and the horizon ({horizon} days) has no complete week")
    effects: dict[str, Effects | None] = {BASELINE: None}
    described: dict[str, tuple[str, tuple[str, ...]]] = {BASELINE: ("no change", ())}
    for s in chosen:
        # Interventions on settings (individual-based models) draw their quarantine detections from the run's seed.
        compiled = compile_setting_interventions(model, s, start, seed) if isinstance(s, SettingScenario) else compile_interventions(model, s, start)
        effects[s.name] = compiled
        described[s.name] = (s.description, compiled.labels)
        for j, item in enumerate(s.interventions):
            if item.start_day >= horizon:
                notes.append(
                    f"scenario {s.name!r}: intervention {j} ({item.kind}) starts on day {item.start_day}, "
                    f"at or after the horizon ({horizon} days): it has no effect in this run"
                )
    forecasts: dict[str, Forecast] = {}
    per: dict[str, _PerTrajectory] = {}
    for name, eff in effects.items():
        fc = forecast(model, particles, weights, start, horizon, n_trajectories, seed=seed, effects=eff)
        forecasts[name] = fc
        per[name] = _PerTrajectory(fc, model, cases, cadence)
    base_fc, base = forecasts[BASELINE], per[BASELINE]
    for name, fc in forecasts.items():
        if fc.ancestors is not None and base_fc.ancestors is not None and not np.array_equal(fc.ancestors, base_fc.ancestors):
            raise RuntimeError(f"scenario {name!r} did not start from the baseline's particles; pairing is impossible")
    base_hits = {c.key: np.any(base_fc.draws(c.series)[:, : c.within] > c.threshold, axis=1) for c in checks}
    outcomes = []
    for name, fc in forecasts.items():
        p = per[name]
        hits = {c.key: np.any(fc.draws(c.series)[:, : c.within] > c.threshold, axis=1) for c in checks}
        is_base = name == BASELINE
        outcomes.append(
            ScenarioOutcome(
                name=name,
                description=described[name][0],
                interventions=described[name][1],
                infections=_interval(p.infections, levels),
                cases=_interval(p.cases, levels),
                peak=_interval(p.peak, levels),
                peak_day=_interval(p.peak_day, levels),
                averted_infections=None if is_base or p.infections is None else Interval.of(base.infections - p.infections, levels),
                averted_cases=None if is_base or p.cases is None else Interval.of(base.cases - p.cases, levels),
                exceedance={k: Probability.of(h, levels[2] - levels[0]) for k, h in hits.items()},
                exceedance_change={k: None if is_base else float(np.mean(h) - np.mean(base_hits[k])) for k, h in hits.items()},
                per_series={s: {k: Interval.of(v, levels) for k, v in d.items()} for s, d in p.per_series.items()},
            )
        )
    return ScenarioReport(
        start=int(start),
        horizon=base_fc.horizon,
        n_trajectories=base_fc.n_trajectories,
        seed=int(seed),
        levels=levels,
        cases_series=cases,
        cases_cadence=cadence,
        thresholds=checks,
        outcomes=tuple(outcomes),
        forecasts=forecasts,
        notes=tuple(notes),
    )
