"""Forecasts from the current cloud: simulate trajectories ahead, with
observation noise, and read off quantiles, peaks, growth and exceedance.

How a forecast is drawn
-----------------------
``n_trajectories`` particles are chosen by weight (systematic resampling) and
each is simulated ``horizon`` days ahead with the model's own dynamics (drifting
parameters keep drifting: the model's ``advance`` does it) and then passed
through the observation model (``sample_observation``), so reported counts carry
both process and observation noise. Every trajectory is one equally weighted
draw from the predictive distribution.

Randomness
----------
Either a Generator ``rng`` is given (used for everything, in order: the
selection, then day 1's dynamics and observation noise, then day 2's, ...), or
an integer ``seed``: then the selection uses a Generator seeded from
``SeedSequence([seed, 0])`` and day ``h`` ahead (h = 1..horizon) uses a fresh one
from ``SeedSequence([seed, 1, h])``. Runs with one seed therefore share their
random numbers day by day (common random numbers): two scenarios that differ
only in an intervention differ by the intervention, not by noise, a scenario
with no change reproduces the baseline bit for bit, and a shorter horizon is a
prefix of a longer one.

Latent quantities (per trajectory and day)
------------------------------------------
``infections``
    New infections that day: the moves along every flow marked
    ``infection = true``, summed over flows and groups, counted exactly inside
    the simulation (the model's incidence tracking is extended with a slot per
    infection flow that no series observes; the extra slots draw no random
    numbers, so the trajectories are the ones an untracked run gives). Only if
    a model does not expose that tracking is the daily incidence of its first
    observed incidence flow (unthinned, all groups) used instead;
    ``Forecast.infections_source`` says which definition applies.
``susceptibles``
    Occupants of the infection flows' source compartments, summed over groups,
    at the end of the day.
``R_eff``
    ``model.reproduction_number`` at the end of the day (next-generation
    matrix at the current susceptibles; for ``seir_two_band`` about 0.5 ms
    per day for 2000 trajectories, some 5% of a forecast's time, so it is
    taken every day).

A model without infection flows that counts these itself (a method
``latent_quantities(particles) -> {"infections", "susceptibles", "R_eff": (n,)}``,
as the individual-based family does, with ``latent_source`` saying how) supplies
them directly, read at the end of each day.

Names: reported series are addressed by their series name; latent quantities
as ``"latent.infections"``, ``"latent.susceptibles"`` and ``"latent.R_eff"``
(series names are identifiers without dots, so the two never collide).
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np

from ._compartmental import CompartmentalModel
from ._particles import ParticleSet
from ._resampling import resample

__all__ = ["FORECAST_LEVELS", "FirstExceedance", "Forecast", "forecast"]

# The 23 quantile levels of common epidemic forecasting practice: 0.01, 0.025,
# 0.05, then 0.10 to 0.90 by 0.05, then 0.95, 0.975, 0.99.
FORECAST_LEVELS: tuple[float, ...] = (
    0.01, 0.025, 0.05, 0.10, 0.15, 0.20, 0.25, 0.30, 0.35, 0.40, 0.45, 0.50,
    0.55, 0.60, 0.65, 0.70, 0.75, 0.80, 0.85, 0.90, 0.95, 0.975, 0.99,
)  # fmt: skip

# Levels of the peak-day and peak-size summaries in the message block.
PEAK_LEVELS: tuple[float, ...] = (0.05, 0.25, 0.5, 0.75, 0.95)

LATENT = ("infections", "susceptibles", "R_eff")
_PREFIX = "latent."

# Decimals kept in the message block, per kind of number.
_DECIMALS = {"count": 1, "susceptibles": 0, "R_eff": 3, "day": 1, "probability": 4}


class FirstExceedance(NamedTuple):
    """``probability``: P(the series exceeds the threshold on some day 1..within);
    ``mean_day``: the expected first such day (1 = the day after the forecast
    start) among the trajectories that exceed, or None if none does."""

    probability: float
    mean_day: float | None


def _read_only(a: np.ndarray) -> np.ndarray:
    a.flags.writeable = False
    return a


@dataclass(frozen=True, eq=False)
class Forecast:
    """Simulated futures: every row is one equally weighted trajectory.

    start : the model day the forecast starts from (day 1 ahead is start + 1).
    reported : dict series -> int ndarray of shape (n_trajectories, horizon)
        Reported counts drawn from the observation model, days 1..horizon ahead.
        For a weekly-cadence series the model's value on any day is the total of
        the 7 days ending that day, so day h holds the weekly total that would
        be reported if a week ended on start + h.
    expected : dict series -> ndarray of shape (n_trajectories, horizon)
        Expected reported counts (before observation noise).
    latent : dict name -> ndarray of shape (n_trajectories, horizon)
        ``infections``, ``susceptibles`` and ``R_eff`` (see the module docstring);
        empty for models without infection flows.
    weekly_series : names of the weekly-cadence series.
    ancestors : int ndarray of shape (n_trajectories,)
        The particle each trajectory started from (index into the cloud given).
    infections_source : how ``latent["infections"]`` was counted.
    measures : dict series -> "share" (a positivity series: the share of tests positive)
        or "level" (a concentration series: a measured level, float draws); series
        not named are counts.
    """

    start: int
    reported: dict[str, np.ndarray] = field(repr=False)
    expected: dict[str, np.ndarray] = field(repr=False)
    latent: dict[str, np.ndarray] = field(default_factory=dict, repr=False)
    weekly_series: frozenset[str] = frozenset()
    ancestors: np.ndarray | None = field(default=None, repr=False)
    infections_source: str = ""
    measures: dict[str, str] = field(default_factory=dict, repr=False)

    # ------------------------------------------------------------------ shape
    @property
    def horizon(self) -> int:
        return int(next(iter(self.reported.values())).shape[1]) if self.reported else 0

    @property
    def n_trajectories(self) -> int:
        return int(next(iter(self.reported.values())).shape[0]) if self.reported else 0

    @property
    def names(self) -> list[str]:
        """Every quantity: the reported series, then ``latent.*``."""
        return list(self.reported) + [_PREFIX + k for k in self.latent]

    def draws(self, name: str) -> np.ndarray:
        """(n_trajectories, horizon) draws of a reported series or ``latent.*`` quantity."""
        if name in self.reported:
            return self.reported[name]
        if name.startswith(_PREFIX) and name[len(_PREFIX) :] in self.latent:
            return self.latent[name[len(_PREFIX) :]]
        raise ValueError(f"forecast has no quantity {name!r}; allowed: {self.names}")

    def _within(self, within: int) -> int:
        if isinstance(within, bool) or not isinstance(within, (int, np.integer)) or not 1 <= within <= self.horizon:
            raise ValueError(
                f"within must be a whole number of days in [1, {self.horizon}] (the horizon), got {within!r}"
            )
        return int(within)

    # -------------------------------------------------------------- summaries
    def quantiles(self, levels: tuple[float, ...] | np.ndarray = FORECAST_LEVELS) -> dict[str, np.ndarray]:
        """Per quantity, ndarray of shape (len(levels), horizon): quantiles across
        trajectories (numpy's default, linear interpolation between order statistics)."""
        probs = _levels(levels)
        return {name: np.quantile(self.draws(name), probs, axis=0) for name in self.names}

    def mean(self) -> dict[str, np.ndarray]:
        """Per quantity, ndarray of shape (horizon,): the mean across trajectories."""
        return {name: self.draws(name).mean(axis=0) for name in self.names}

    def weekly(self, series: str) -> np.ndarray:
        """Totals over consecutive 7-day blocks: ndarray (n_trajectories, horizon // 7).

        Block k (k = 1, 2, ...) covers days start + 7(k-1) + 1 .. start + 7k; a
        trailing partial block is left out. For a daily series (and
        ``latent.infections``) a block's value is the sum of its daily draws; for
        a weekly-cadence series it is the draw on the block's last day, which is
        already the model's 7-day total. Susceptibles and R_eff are not counts
        of events and have no weekly total.
        """
        draws = self.draws(series)
        if series in (_PREFIX + "susceptibles", _PREFIX + "R_eff"):
            raise ValueError(
                f"{series!r} is a state, not a count of events; weekly totals exist for {self._countable()}"
            )
        blocks = self.horizon // 7
        if blocks == 0:
            raise ValueError(f"weekly totals need a horizon of at least 7 days, this forecast has {self.horizon}")
        if series in self.weekly_series:
            return draws[:, 6 : 7 * blocks : 7].copy()
        return draws[:, : 7 * blocks].reshape(draws.shape[0], blocks, 7).sum(axis=2)

    def weekly_ends(self) -> np.ndarray:
        """Model day on which each weekly block ends: start + 7, start + 14, ..."""
        return self.start + 7 * np.arange(1, self.horizon // 7 + 1)

    def _countable(self) -> list[str]:
        return list(self.reported) + ([_PREFIX + "infections"] if "infections" in self.latent else [])

    def peak(self, levels: tuple[float, ...] | np.ndarray = PEAK_LEVELS) -> dict[str, dict[str, Any]]:
        """Distribution of the peak within the horizon, per reported series and
        ``latent.infections``.

        Per trajectory the peak day is the first day (1..horizon ahead) with the
        largest value and the peak size that value; for reported series the
        draws include observation noise (the peak as it would be reported).
        Returns name -> {"day": {"mean", "quantiles"}, "size": {"mean", "quantiles"},
        "p_at_horizon"}, where quantiles are at ``levels`` and ``p_at_horizon``
        is the share of trajectories whose peak is on the last day (a peak
        still to come beyond the horizon, or a plateau ending there).
        """
        probs = _levels(levels)
        out: dict[str, dict[str, Any]] = {}
        for name in self._countable():
            draws = self.draws(name)
            day = np.argmax(draws, axis=1) + 1
            size = draws.max(axis=1)
            out[name] = {
                "day": {"mean": float(day.mean()), "quantiles": np.quantile(day, probs)},
                "size": {"mean": float(size.mean()), "quantiles": np.quantile(size, probs)},
                "p_at_horizon": float(np.mean(day == self.horizon)),
            }
        return out

    # ----------------------------------------------------------- probabilities
    def _exceeds(self, series: str, threshold: float, within: int) -> np.ndarray:
        return self.draws(series)[:, : self._within(within)] > threshold

    def exceedance(self, series: str, threshold: float, within: int) -> float:
        """P(reported count > threshold on at least one of the next ``within`` days).

        The share of trajectories that exceed (strictly) on some day 1..within.
        For a weekly-cadence series every day's value is the 7-day total ending
        that day (see ``reported``); ``latent.*`` names are accepted too."""
        return float(np.mean(np.any(self._exceeds(series, threshold, within), axis=1)))

    def first_exceedance(self, series: str, threshold: float, within: int) -> FirstExceedance:
        """The probability of exceeding within ``within`` days and, among the
        trajectories that do, the expected first day of exceedance (1-based)."""
        above = self._exceeds(series, threshold, within)
        hit = above.any(axis=1)
        probability = float(hit.mean())
        if not hit.any():
            return FirstExceedance(probability, None)
        first = np.argmax(above[hit], axis=1) + 1
        return FirstExceedance(probability, float(first.mean()))

    def growth_probability(self, days: int = 7) -> float:
        """P(latent incidence is growing): the share of trajectories whose new
        infections over days ``days + 1 .. 2 days`` ahead are strictly more than
        over days ``1 .. days`` ahead (ties, e.g. both zero, are not growth).
        Needs a horizon of at least ``2 * days``."""
        if "infections" not in self.latent:
            raise ValueError("this forecast has no latent infections (the model has no infection flow)")
        if isinstance(days, bool) or not isinstance(days, (int, np.integer)) or days < 1 or 2 * days > self.horizon:
            raise ValueError(f"days must be a whole number in [1, {self.horizon // 2}] (half the horizon), got {days!r}")
        inf = self.latent["infections"]
        first = inf[:, :days].sum(axis=1)
        second = inf[:, days : 2 * days].sum(axis=1)
        return float(np.mean(second > first))

    # ---------------------------------------------------------------- message
    def to_message_block(self, levels: tuple[float, ...] | np.ndarray = FORECAST_LEVELS) -> dict[str, Any]:
        """A compact JSON-able summary for the estimate message.

        ``{"start", "horizon", "n_trajectories", "levels", "peak_levels",
        "series": {name: {"mean": [H], "quantiles": [[H] per level],
        "weekly": {...} (weekly-cadence series only), "peak": {...}}},
        "latent": {"infections" | "susceptibles" | "R_eff": {"mean", "quantiles"
        (, "peak" for infections)}}, "growth_probability"}``.
        ``weekly`` holds ``ends`` (model days), ``mean`` and ``quantiles`` of the
        block totals (see :meth:`weekly`). Numbers are rounded (counts to 0.1,
        susceptibles to 1, R_eff to 0.001, days to 0.1, probabilities to 1e-4);
        a non-finite value (never produced by a compartmental model) becomes
        null. Size: for ``seir_two_band`` (2 series, 28 days, 23 levels, plus
        the three latent quantities, peaks and growth) about 22 kB as orjson
        bytes (21,979 and 22,738 bytes measured for two clouds, 2000
        trajectories; tests/filters/test_forecast.py prints it). About 92% of
        it is the 23 x 28 quantile tables: five of them, 3,220 numbers.
        """
        probs = _levels(levels)
        peaks = self.peak()
        block: dict[str, Any] = {
            "start": int(self.start),
            "horizon": self.horizon,
            "n_trajectories": self.n_trajectories,
            "levels": [float(p) for p in probs],
            "peak_levels": list(PEAK_LEVELS),
            "series": {},
            "latent": {},
        }
        for name in self.reported:
            kind = {"share": "probability", "level": "level"}.get(self.measures.get(name, ""), "count")
            entry = _summary_block(self.reported[name], probs, kind)
            if name in self.weekly_series and self.horizon >= 7:
                ends = [int(d) for d in self.weekly_ends()]
                entry["weekly"] = {"ends": ends, **_summary_block(self.weekly(name), probs, "count")}
            entry["peak"] = _peak_block(peaks[name], kind)
            block["series"][name] = entry
        for key, draws in self.latent.items():
            entry = _summary_block(draws, probs, key if key in _DECIMALS else "count")
            if key == "infections":
                entry["peak"] = _peak_block(peaks[_PREFIX + key])
            block["latent"][key] = entry
        if "infections" in self.latent and self.horizon >= 14:
            block["growth_probability"] = _rounded(np.array(self.growth_probability(7)), "probability")
        return block


def _levels(levels: tuple[float, ...] | np.ndarray) -> np.ndarray:
    probs = np.asarray(levels, dtype=float)
    if probs.ndim != 1 or probs.size == 0 or not np.all((probs > 0) & (probs < 1)):
        raise ValueError(f"levels must be a non-empty list of probabilities in (0, 1), got {levels!r}")
    return probs


def _rounded(values: Any, kind: str) -> Any:
    """Round to the kind's decimals (a float or nested lists); non-finite values become None.
    A "level" (a concentration, any magnitude) keeps 6 significant digits."""
    if kind == "level":
        x = np.asarray(values, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            magnitude = np.floor(np.log10(np.abs(x)))
            scale = np.where(np.isfinite(magnitude), 10.0 ** (5 - np.where(np.isfinite(magnitude), magnitude, 0.0)), 1.0)
            out = np.where(np.isfinite(magnitude), np.round(x * scale) / scale, x)
        return out.tolist() if np.all(np.isfinite(out)) else _nulls(out.tolist())
    out = np.round(np.asarray(values, dtype=float), _DECIMALS[kind])
    return out.tolist() if np.all(np.isfinite(out)) else _nulls(out.tolist())


def _nulls(values: Any) -> Any:
    if isinstance(values, list):
        return [_nulls(v) for v in values]
    return values if math.isfinite(values) else None


def _summary_block(draws: np.ndarray, probs: np.ndarray, kind: str) -> dict[str, Any]:
    return {
        "mean": _rounded(draws.mean(axis=0), kind),
        "quantiles": _rounded(np.quantile(draws, probs, axis=0), kind),
    }


def _peak_block(peak: dict[str, Any], kind: str = "count") -> dict[str, Any]:
    return {
        "day": {"mean": _rounded(peak["day"]["mean"], "day"), "quantiles": _rounded(peak["day"]["quantiles"], "day")},
        "size": {
            "mean": _rounded(peak["size"]["mean"], kind),
            "quantiles": _rounded(peak["size"]["quantiles"], kind),
        },
        "p_at_horizon": _rounded(peak["p_at_horizon"], "probability"),
    }


# ----------------------------------------------------------------- simulation
def _sum_into(out: np.ndarray, parts: list[np.ndarray]) -> None:
    """``out[:] = sum(parts)`` for integer (n,) arrays, one add per part: the same
    totals as a reduction over the stacked parts (integer sums are exact), without
    a reduction loop over a short inner axis for every row."""
    if not parts:
        out[...] = 0
        return
    total = parts[0].astype(np.int64)  # as numpy sums integers (int64 accumulator)
    for part in parts[1:]:
        total += part
    out[...] = total


def _remembering_expected(stepper: Any) -> tuple[Any, dict]:
    """A shallow copy of ``stepper`` whose ``expected(particles, series)`` keeps its
    answers in the returned dict until the caller clears it.

    ``sample_observation`` computes each count series' expected values to draw
    around them, and the forecast stores the same expected values right after, for
    the same particles: the second call is answered from the first (expected values
    are a deterministic function of the particles, which nothing changes in between;
    tests/filters/test_forecast.py checks them against ``model.expected`` day by day).
    """
    compute = getattr(type(stepper), "expected", None)
    if not callable(compute):
        return stepper, {}
    remembering = copy.copy(stepper)
    bound = compute.__get__(remembering)
    found: dict[tuple[int, str], np.ndarray] = {}

    def expected(particles: ParticleSet, series: str) -> np.ndarray:
        key = (id(particles), series)
        value = found.get(key)
        if value is None:
            value = found[key] = bound(particles, series)
        return value

    remembering.expected = expected
    return remembering, found


def _seeded(*words: int) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(list(words))))


def _whole(value: Any, name: str, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise ValueError(f"{name} must be a whole number >= {low}, got {value!r}")
    return int(value)


def _checked_weights(weights: Any, n: int) -> np.ndarray:
    w = np.asarray(weights, dtype=float)
    if w.shape != (n,):
        raise ValueError(f"weights must have shape ({n},) (one per particle), got {w.shape}")
    if not np.all(np.isfinite(w)) or np.any(w < 0) or not w.sum() > 0:
        raise ValueError("weights must be finite, non-negative and not all zero")
    total = w.sum()
    return w if abs(total - 1.0) <= 1e-9 else w / total


class _Tracking(NamedTuple):
    stepper: Any  # the model, or a copy whose incidence tracking includes the infection flows
    futures: ParticleSet
    slots: list[int]  # history slots holding the infections ([] if none)
    sources: list[int]  # infection flows' source compartments
    source: str  # how infections are counted


def _tracking(model: Any, futures: ParticleSet) -> _Tracking:
    """Arrange for the day's infection-flow moves to be recorded in ``futures.history``.

    The compartmental model records the daily moves of its observed flows in
    history slots (``_observed_flows``); a shallow copy of the model that also
    lists the unobserved infection flows records those too, in extra slots
    appended after the observed ones (so every series keeps its slot). Only
    the forecast's own copy of the particles gets the wider history.
    """
    spec = getattr(model, "spec", None)
    flows = getattr(spec, "flows", None)
    ends = getattr(model, "_flow_ends", None)
    if flows is None or ends is None:
        return _Tracking(model, futures, [], [], "")
    infection = [i for i, f in enumerate(flows) if getattr(f, "infection", False)]
    if not infection:
        return _Tracking(model, futures, [], [], "")
    sources = sorted({ends[i][0] for i in infection})
    observed = getattr(model, "_observed_flows", None)
    history = futures.history
    if observed is None or history.ndim != 4:
        # No access to the model's tracking: fall back to history slot 0.
        if history.ndim == 4 and history.shape[1] and history.shape[2]:
            fallback = "fallback: daily incidence of the first observed incidence flow (all groups, unthinned)"
            return _Tracking(model, futures, [0], sources, fallback)
        return _Tracking(model, futures, [], sources, "")
    observed = list(observed)
    extra = [f for f in infection if f not in observed]
    slots = [observed.index(f) if f in observed else len(observed) + extra.index(f) for f in infection]
    names = ", ".join(repr(flows[f].name) for f in infection)
    source = f"infection flows {names} (all groups)"
    if not extra and history.shape[1] >= 1:
        return _Tracking(model, futures, slots, sources, source)
    stepper = copy.copy(model)
    stepper._observed_flows = observed + extra
    n, days, k, groups = history.shape
    wider = np.zeros((n, max(days, 1), k + len(extra), groups), dtype=history.dtype)
    wider[:, :days, :k] = history
    futures = ParticleSet(states=futures.states, params=futures.params, history=wider, log_weights=futures.log_weights)
    return _Tracking(stepper, futures, slots, sources, source)


def forecast(
    model: CompartmentalModel,
    particles: ParticleSet,
    weights: np.ndarray,
    start: int,
    horizon: int = 28,
    n_trajectories: int = 2000,
    rng: np.random.Generator | None = None,
    *,
    seed: int | None = None,
    effects: Any = None,
) -> Forecast:
    """Draw ``n_trajectories`` particles by weight and simulate ``horizon`` days ahead.

    Parameters
    ----------
    model : the cloud's model (a :class:`CompartmentalModel`).
    particles : the cloud at day ``start``; it is not modified.
    weights : ndarray of shape (n_particles,), non-negative (normalised here if needed).
    start : the cloud's model day.
    horizon : days ahead (>= 1).
    n_trajectories : number of simulated futures (>= 1).
    rng : a Generator used for everything; or give ``seed`` instead (exactly one).
    seed : a non-negative int: common random numbers, see the module docstring.
    effects : passed to ``model.advance(..., effects=effects)`` when not None
        (interventions); with None, ``advance`` is called without it.
    """
    if (rng is None) == (seed is None):
        raise ValueError(
            "forecast needs exactly one source of randomness: rng= (a numpy Generator) "
            f"or seed= (a non-negative int); got rng={'set' if rng is not None else None}, seed={seed!r}"
        )
    if rng is not None and not isinstance(rng, np.random.Generator):
        raise ValueError(f"rng must be a numpy.random.Generator, got {type(rng).__name__}")
    horizon = _whole(horizon, "horizon", 1)
    n = _whole(n_trajectories, "n_trajectories", 1)
    w = _checked_weights(weights, particles.size)
    if seed is not None:
        seed = _whole(seed, "seed", 0)
    select = rng if rng is not None else _seeded(seed, 0)  # type: ignore[arg-type]
    index = resample(w, select, "systematic", n=n)
    track = _tracking(model, particles.take(index))
    stepper, futures = track.stepper, track.futures
    stepper, day_expected = _remembering_expected(stepper)
    names = [s.name for s in model.series]
    # Positivity series forecast their share positive, concentration series a level: floats.
    measures = {s.name: {"positivity": "share", "concentration": "level"}[getattr(s, "kind", "")]
                for s in model.series if getattr(s, "kind", "") in ("positivity", "concentration")}
    reported = {name: np.empty((n, horizon), dtype=float if name in measures else np.int64) for name in names}
    expected = {name: np.empty((n, horizon)) for name in names}
    latent: dict[str, np.ndarray] = {}
    # A model without infection flows may count the latent quantities itself.
    own = getattr(stepper, "latent_quantities", None) if not track.sources else None
    if own is not None:
        latent = {"infections": np.empty((n, horizon), dtype=np.int64), "susceptibles": np.empty((n, horizon), dtype=np.int64)}
        latent["R_eff"] = np.empty((n, horizon))
    if track.sources:
        if track.slots:
            latent["infections"] = np.empty((n, horizon), dtype=np.int64)
        latent["susceptibles"] = np.empty((n, horizon), dtype=np.int64)
        latent["R_eff"] = np.empty((n, horizon))
    for h in range(1, horizon + 1):
        day_rng = rng if rng is not None else _seeded(seed, 1, h)  # type: ignore[arg-type]
        t0, t1 = start + h - 1, start + h
        day_expected.clear()  # the futures move on: yesterday's expected counts are stale
        if effects is None:
            stepper.advance(futures, t0, t1, day_rng)
        else:
            stepper.advance(futures, t0, t1, day_rng, effects=effects)
        drawn = stepper.sample_observation(futures, day_rng)
        for name in names:
            reported[name][:, h - 1] = drawn[name]
            expected[name][:, h - 1] = stepper.expected(futures, name)
        if own is not None:
            for key, values in own(futures).items():
                latent[key][:, h - 1] = values
        if "infections" in latent and own is None:
            today_moves = futures.history[:, 0]
            _sum_into(latent["infections"][:, h - 1], [today_moves[:, k, g] for k in track.slots for g in range(today_moves.shape[2])])
        if track.sources:
            states = futures.states
            _sum_into(latent["susceptibles"][:, h - 1], [states[:, g, c] for g in range(states.shape[1]) for c in track.sources])
            # R_eff at the end of day h, under the interventions in force on the day that follows.
            today = None if effects is None else effects.on_day(t1)
            latent["R_eff"][:, h - 1] = stepper.reproduction_number(futures, t1, today)
    if "R_eff" in latent and not np.any(np.isfinite(latent["R_eff"])):
        del latent["R_eff"]  # no infected classes: nothing to report
    for arrays in (reported, expected, latent):
        for a in arrays.values():
            _read_only(a)
    return Forecast(
        start=int(start),
        reported=reported,
        expected=expected,
        latent=latent,
        weekly_series=frozenset(s.name for s in model.series if getattr(s, "weekly", False)),
        ancestors=_read_only(index),
        infections_source=(track.source if own is None else str(getattr(stepper, "latent_source", ""))) if "infections" in latent else "",
        measures=measures,
    )
