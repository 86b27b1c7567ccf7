"""Interventions on settings for the individual-based family, and scenario runs.

:func:`compile_setting_interventions` turns one scenario's interventions
(``schemas.SettingScenario``) into a :class:`SettingEffects` that
``IndividualModel.advance(..., effects=...)`` consults each day:

- closures, attendance caps and community changes are factors on the places'
  transmission rates (a closed school: 0; attendance ``a``: ``a ** 2``);
- a household quarantine keeps, per particle and household, the day its
  members may go out again. A detected symptomatic case (probability
  ``detected``, drawn on its onset day) sends its household home from the next
  day for ``days`` days: its members make and receive no contacts outside the
  household, imports included.

The quarantine's detection draws come from the effects' own generator (seeded
from the scenario run's seed), never from the model's: the model's stream of
random numbers is the one the baseline draws as far as the changed epidemic
allows, which keeps scenario differences paired (common random numbers, see
:mod:`filters._forecast`). The quarantine state belongs to one run: it is tied
to the particle array it first sees and starts afresh with another one.

:func:`run_setting_scenarios` forecasts the baseline and every scenario with
one seed and summarises infections over the horizon, by band and by place,
and the reported series, with the paired differences to the baseline.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from schemas import Attendance, CloseSetting, CommunityChange, HouseholdQuarantine, SettingScenarioFile

from ._forecast import forecast
from ._particles import ParticleSet

__all__ = ["SettingEffects", "compile_setting_interventions", "SettingScenarioResult", "run_setting_scenarios"]


class _Quarantine:
    """Release days per (particle, household), for one particle array."""

    def __init__(self, n: int, households: int, detected: float, days: int, start: int, end: int | None, seed: int) -> None:
        self.release = np.zeros((n, households), dtype=np.int32)
        self.detected, self.days, self.start, self.end = detected, days, start, end
        self.rng = np.random.Generator(np.random.PCG64([seed, 20260412]))

    def home(self, particle: np.ndarray, household: np.ndarray, day: int) -> np.ndarray:
        """Whether each (particle, household) stays at home on ``day``."""
        return self.release[particle, household] > day

    def onsets(self, particle: np.ndarray, household: np.ndarray, day: int) -> None:
        """Symptomatic onsets of ``day``: detected ones send their households home from the next day."""
        if particle.size == 0 or day < self.start or (self.end is not None and day >= self.end):
            return
        caught = self.rng.random(particle.size) < self.detected
        p, h = particle[caught], household[caught]
        np.maximum.at(self.release, (p, h), day + 1 + self.days)


class SettingEffects:
    """One scenario's interventions on one IndividualModel, from forecast origin ``origin``."""

    def __init__(self, model: Any, scenario: Any, origin: int, seed: int = 0) -> None:
        self.places = list(model.places)
        self.households = model.population.households.count
        self.name = scenario.name
        self._windows: list[tuple[int, int | None, int, float]] = []
        self._quarantine: tuple[float, int, int, int | None] | None = None
        self._seed = int(seed)
        self._state: tuple[int, _Quarantine] | None = None
        community = len(self.places) - 1
        labels: list[str] = []
        for item in scenario.interventions:
            start = origin + item.start_day
            end = None if item.end_day is None else origin + item.end_day
            days = f"days {item.start_day}-{item.end_day - 1}" if item.end_day is not None else f"from day {item.start_day}"
            if isinstance(item, CloseSetting):
                self._windows.append((start, end, self._column(item.setting), 0.0))
                labels.append(f"{item.setting} closed ({days})")
            elif isinstance(item, Attendance):
                self._windows.append((start, end, self._column(item.setting), item.share**2))
                labels.append(f"{item.setting} attendance {item.share:g}, contacts x{item.share**2:g} ({days})")
            elif isinstance(item, CommunityChange):
                self._windows.append((start, end, community, item.factor))
                labels.append(f"community contacts x{item.factor:g} ({days})")
            elif isinstance(item, HouseholdQuarantine):
                self._quarantine = (item.detected, item.days, start, end)
                labels.append(f"households of detected cases ({item.detected:g} of onsets) home {item.days} days ({days})")
            else:  # pragma: no cover - the schema admits no other kind
                raise TypeError(f"intervention {item!r} not known")
        self.labels = tuple(labels)

    def _column(self, setting: str) -> int:
        if setting not in self.places[1:-1]:
            raise ValueError(f"scenario {self.name!r}: {setting!r} is not a setting of the model; allowed: {self.places[1:-1]}")
        return self.places.index(setting)

    def factors(self, day: int, n: int) -> np.ndarray | None:
        """(n, places + 1) factors on the places' rates and importation (last column) on ``day``; None: no change."""
        f = np.ones(len(self.places) + 1)
        changed = False
        for start, end, column, factor in self._windows:
            if start <= day and (end is None or day < end):
                f[column] *= factor
                changed = True
        return np.broadcast_to(f, (n, f.size)) if changed else None

    def quarantine(self, states: np.ndarray) -> _Quarantine | None:
        """The quarantine state of the run over ``states`` (None: no quarantine in this scenario)."""
        if self._quarantine is None:
            return None
        if self._state is None or self._state[0] != id(states) or self._state[1].release.shape[0] != states.shape[0]:
            detected, days, start, end = self._quarantine
            self._state = (id(states), _Quarantine(states.shape[0], self.households, detected, days, start, end, self._seed))
        return self._state[1]


def compile_setting_interventions(model: Any, scenario: Any, origin: int, seed: int = 0) -> SettingEffects:
    """``scenario``'s interventions for ``model``, days counted from the forecast origin ``origin``."""
    return SettingEffects(model, scenario, origin, seed)


@dataclass(frozen=True)
class SettingScenarioResult:
    """Totals over the horizon per trajectory (paired across scenarios by the shared seed).

    infections : (n_trajectories,) all infections in the horizon.
    by_band : band -> (n_trajectories,) infections.
    reported : series -> (n_trajectories,) reported counts summed over the horizon.
    peak_infections : (n_trajectories,) the largest daily number of infections.
    averted : (n_trajectories,) baseline infections minus this scenario's (0 for the baseline).
    """

    name: str
    infections: np.ndarray
    by_band: dict[str, np.ndarray]
    reported: dict[str, np.ndarray]
    peak_infections: np.ndarray
    averted: np.ndarray

    def summary(self, probs: tuple[float, ...] = (0.05, 0.5, 0.95)) -> dict[str, Any]:
        def q(a: np.ndarray) -> dict[str, float]:
            return {"mean": float(np.mean(a)), **{f"{p:g}": float(v) for p, v in zip(probs, np.quantile(a, probs))}}

        return {
            "infections": q(self.infections),
            "averted": q(self.averted),
            "peak_infections": q(self.peak_infections),
            **{f"infections[{b}]": q(v) for b, v in self.by_band.items()},
            **{f"reported.{s}": q(v) for s, v in self.reported.items()},
        }


def run_setting_scenarios(
    model: Any,
    particles: ParticleSet,
    weights: np.ndarray,
    start: int,
    scenarios: SettingScenarioFile,
    horizon: int | None = None,
    n_trajectories: int = 200,
    seed: int = 0,
) -> list[SettingScenarioResult]:
    """The baseline and each scenario of the file, forecast ``horizon`` days from the cloud at day ``start``."""
    horizon = int(horizon or scenarios.horizon_days or 28)
    runs: list[tuple[str, SettingEffects | None]] = [("baseline", None)]
    runs += [(s.name, compile_setting_interventions(model, s, start, seed)) for s in scenarios.scenarios]
    out: list[SettingScenarioResult] = []
    base: np.ndarray | None = None
    infection = model.slots.index("infection")
    for name, effects in runs:
        kept: list[np.ndarray] = []

        class _Keeper:
            """Reads each simulated day's infections by band off the forecast's trajectories."""

            def __init__(self, inner: Any) -> None:
                self.inner = inner

            def __getattr__(self, attr: str) -> Any:
                return getattr(self.inner, attr)

            def advance(self, ps: ParticleSet, t0: int, t1: int, rng: np.random.Generator, effects: Any = None) -> None:
                self.inner.advance(ps, t0, t1, rng, effects=effects)
                kept.append(ps.history[:, 0, infection, :].copy())

        fc = forecast(_Keeper(model), particles, weights, start, horizon, n_trajectories, seed=seed, effects=effects)
        daily = np.stack(kept, axis=1)  # (n, horizon, bands)
        infections = daily.sum(axis=(1, 2))
        if base is None:
            base = infections
        out.append(
            SettingScenarioResult(
                name=name,
                infections=infections,
                by_band={b: daily[:, :, g].sum(axis=1) for g, b in enumerate(model.groups)},
                reported={s: fc.reported[s].sum(axis=1) for s in fc.reported},
                peak_infections=daily.sum(axis=2).max(axis=1),
                averted=base - infections,
            )
        )
    return out
