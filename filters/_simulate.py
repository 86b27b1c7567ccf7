"""Simulate a "true" epidemic and its reported values from a model.

Every kind of series is simulated from the model's own observation layer: counts
(incidence, prevalence) as the filter would see them; a positivity series'
positives out of the tests given for each day (binomial or beta-binomial,
``ObservedSeries.sample_positives``); a concentration series' samples
(``ObservedSeries.sample_concentration``, log-normal or Student-t on the log
scale), diluted by ``reference_flow / flow`` when a sample flow is given, and
censored below the limit of detection given: such a sample is reported as 0.0
with its limit (only "below the limit" is known), as a message's ``nd`` is.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from ._compartmental import CompartmentalModel
from ._observation import Observation

__all__ = ["SimulatedSeason", "simulate_season"]

PerDay = float | int | Sequence[float | int | None] | np.ndarray


@dataclass
class SimulatedSeason:
    """A simulated truth.

    states : ndarray of shape (days + 1, n_groups, n_compartments), day 0 first.
    params : ndarray of shape (days + 1, n_params).
    observations : one Observation per day 1..days (positivity series with their tests in
        ``trials``, concentration series with their limits and flows).
    incidence : flow name -> ndarray of shape (days,): the true daily count of each flow a
        series observes (all groups, before reporting or noise), days 1..days; e.g. the new
        infections of a series on an infection flow.
    """

    states: np.ndarray
    params: np.ndarray
    observations: list[Observation]
    incidence: dict[str, np.ndarray] = field(default_factory=dict)


def _per_day(given: Mapping[str, PerDay] | None, what: str, days: int, names: set[str], kind: str) -> dict[str, np.ndarray]:
    """``given`` (series -> a constant or one value per day 1..days; None or nan: none that day) as
    float arrays of length ``days``; ValueError for a series of another kind or a wrong length."""
    out: dict[str, np.ndarray] = {}
    for name, value in (given or {}).items():
        if name not in names:
            raise ValueError(f"{what} given for series {name!r}, which is not a {kind} series of the model; {kind} series: {sorted(names)}")
        if np.ndim(value) == 0:
            arr = np.full(days, np.nan if value is None else float(value))  # type: ignore[arg-type]
        else:
            arr = np.array([np.nan if v is None else float(v) for v in value], dtype=float)  # type: ignore[union-attr]
            if arr.shape != (days,):
                raise ValueError(f"{what} of series {name!r}: {arr.size} values given; allowed: one per day 1..{days}, or one number")
        out[name] = arr
    return out


def simulate_season(
    model: CompartmentalModel,
    days: int,
    rng: np.random.Generator,
    params: dict[str, float] | None = None,
    *,
    tests: Mapping[str, PerDay] | None = None,
    limits: Mapping[str, PerDay] | None = None,
    flows: Mapping[str, PerDay] | None = None,
) -> SimulatedSeason:
    """One trajectory from the model's prior (or with ``params`` fixed).

    Weekly series get a value on days that are multiples of 7 only.

    tests : positivity series -> the number of tests each day (a whole number, or one per day
        1..days; 0, None or nan: the series is not reported that day). Every positivity series
        needs it.
    limits : concentration series -> the lab's limit of detection (> 0; a number or one per
        day): samples below it are censored (value 0.0, with the limit). Without one, samples
        are reported as drawn.
    flows : concentration series with a ``reference_flow`` -> the sample's flow (> 0; a
        number or one per day), which dilutes the expected level by reference_flow / flow.
    """
    kinds = {s.name: getattr(s, "kind", "incidence") for s in model.series}
    positivity = {n for n, k in kinds.items() if k == "positivity"}
    concentration = {n for n, k in kinds.items() if k == "concentration"}
    n_tests = _per_day(tests, "tests", days, positivity, "positivity")
    lods = _per_day(limits, "a limit of detection", days, concentration, "concentration")
    sample_flows = _per_day(flows, "a sample flow", days, concentration, "concentration")
    missing = sorted(positivity - set(n_tests))
    if missing:
        raise ValueError(f"positivity series {missing} need their number of tests per day (tests={{name: number or one per day}})")
    for name, arr in n_tests.items():
        ok = np.isnan(arr) | ((arr >= 0) & (arr == np.floor(arr)))
        if not ok.all():
            raise ValueError(f"tests of series {name!r}: {arr[~ok][0]!r}; allowed: whole numbers >= 0 (0 or None: not reported)")
    for what, given in (("limit of detection", lods), ("sample flow", sample_flows)):
        for name, arr in given.items():
            if np.any(~np.isnan(arr) & ~(np.isfinite(arr) & (arr > 0))):
                raise ValueError(f"{what} of series {name!r}: allowed: finite numbers > 0 (None: none that day)")
    for name in sample_flows:
        if model.series_named(name).shedding.reference_flow is None:  # type: ignore[union-attr]
            raise ValueError(f"a sample flow is given for series {name!r}, whose spec sets no reference_flow")
    ps = model.initial(1, rng)
    for name, value in (params or {}).items():
        if name not in model.param_names:
            raise ValueError(f"parameter {name!r} not in model; allowed: {model.param_names}")
        ps.params[:, model.param_names.index(name)] = value
    states, pars, obs = [ps.states[0].copy()], [ps.params[0].copy()], []
    weekly = {s.name for s in model.series if s.weekly}
    slots = {s.name: s.slot for s in model.series if kinds[s.name] in ("incidence", "concentration")}
    flow_of = {s.name: s.flow for s in getattr(model.spec, "series", []) if s.name in slots}
    incidence: dict[str, list[int]] = {flow_of[n]: [] for n in slots if flow_of.get(n) is not None}
    for day in range(1, days + 1):
        model.advance(ps, day - 1, day, rng)
        drawn = model.sample_observation(ps, rng)
        values: dict[str, float | None] = {}
        trials: dict[str, float] = {}
        below: dict[str, float] = {}
        at_flow: dict[str, float] = {}
        for name in drawn:
            if name in weekly and day % 7:
                continue
            if name in positivity:
                n = n_tests[name][day - 1]
                if np.isnan(n) or n == 0:
                    values[name] = None
                    continue
                # Positives out of the day's tests (extra draws only for models with positivity series).
                values[name] = float(model.sample_positives(ps, name, int(n), rng)[0])
                trials[name] = float(n)
                continue
            value = float(drawn[name][0])
            if name in concentration:
                f = sample_flows.get(name, np.full(days, np.nan))[day - 1]
                if not np.isnan(f):
                    value *= model.series_named(name).shedding.reference_flow / f  # type: ignore[union-attr]
                    at_flow[name] = float(f)
                lod = lods.get(name, np.full(days, np.nan))[day - 1]
                if not np.isnan(lod):
                    below[name] = float(lod)
                    if value < lod:
                        value = 0.0  # censored: only "below the limit" is known
            values[name] = value
        obs.append(Observation(time=day, values=values, trials=trials, limits=below, flows=at_flow))
        for name, slot in slots.items():
            if flow_of.get(name) is not None and len(incidence[flow_of[name]]) < day:
                incidence[flow_of[name]].append(int(ps.history[0, 0, slot, :].sum()))
        states.append(ps.states[0].copy())
        pars.append(ps.params[0].copy())
    return SimulatedSeason(
        np.array(states), np.array(pars), obs, {k: np.array(v, dtype=np.int64) for k, v in incidence.items()}
    )
