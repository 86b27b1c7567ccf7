"""Section ``forecast``: a scenario comparison with common random numbers against its binomial floor.
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from typing import Any

import numpy as np

from filters import (
    CompartmentalModel,
)

from .common import (
    RecordingGenerator,
    SectionResult,
    Target,
    Timer,
    floor_draws,
    median,
)
from .update import FLOOR_RATIO_MAX, REFERENCE_SPEC, prepare_update_workload


# ------------------------------------------------------------ forecast section
class _RecordingDraws(RecordingGenerator):
    """Also keeps the observation-noise draws (gamma, poisson, binomial) of a forecast."""

    def __init__(self, rng: np.random.Generator, binomial_calls: list, other_calls: list) -> None:
        super().__init__(rng)
        self.binomial_calls = binomial_calls
        self.other_calls = other_calls

    def gamma(self, shape: Any, scale: Any = 1.0, size: Any = None) -> Any:
        a, b = np.broadcast_arrays(np.asarray(shape, dtype=float), np.asarray(scale, dtype=float))
        self.other_calls.append(("gamma", np.array(a), np.array(b)))
        return self._rng.gamma(shape, scale, size)

    def poisson(self, lam: Any = 1.0, size: Any = None) -> Any:
        self.other_calls.append(("poisson", np.array(lam, dtype=float), None))
        return self._rng.poisson(lam, size)


class _RecordingModel(CompartmentalModel):
    """A compartmental model whose ``advance`` and ``sample_observation`` record their draws.

    Made from a compiled model by :func:`_recording_model` (a shallow copy with
    this class), so the forecast's own shallow copy records into the same lists.
    """

    _binomial_calls: list
    _other_calls: list

    def advance(self, particles: Any, t0: int, t1: int, rng: Any, effects: Any = None) -> None:
        recorder = _RecordingDraws(rng, self._binomial_calls, [])
        super().advance(particles, t0, t1, recorder, effects=effects)  # type: ignore[arg-type]

    def sample_observation(self, particles: Any, rng: Any) -> dict[str, np.ndarray]:
        recorder = _RecordingDraws(rng, [], self._other_calls)
        return super().sample_observation(particles, recorder)  # type: ignore[arg-type]


def _recording_model(model: CompartmentalModel, binomial_calls: list, other_calls: list) -> CompartmentalModel:
    clone = copy.copy(model)
    clone.__class__ = _RecordingModel
    clone._binomial_calls = binomial_calls  # type: ignore[attr-defined]
    clone._other_calls = other_calls  # type: ignore[attr-defined]
    return clone


def _replay_other(calls: list, rng: np.random.Generator) -> None:
    for kind, a, b in calls:
        if kind == "gamma":
            rng.gamma(a, b)
        else:
            rng.poisson(a)


def forecast_scenarios() -> list[Any]:
    """The two interventions of the forecast section (besides the baseline)."""
    from schemas import ContactChange, RateChange, Scenario, Vaccination

    return [
        Scenario(
            name="school-closure",
            interventions=[ContactChange(kind="contact", factors=[[0.4, 1.0], [1.0, 1.0]], start_day=7, end_day=21)],
        ),
        Scenario(
            name="distancing-and-vaccination",
            interventions=[
                RateChange(kind="rate", flow="infection", factor=0.8, start_day=0, end_day=14),
                Vaccination(
                    kind="vaccination", source="S", target="R", rate_per_day=0.01, efficacy=0.6, groups=["adult"]
                ),
            ],
        ),
    ]


def bench_forecast(
    particles: int = 10_000,
    repeats: int = 5,
    trajectories: int = 2000,
    horizon: int = 28,
    warmup_days: int = 14,
    seed: int = 20240,
    progress: Callable[[str], None] | None = None,
) -> SectionResult:
    """Time a scenario comparison (baseline + 2 interventions) against its binomial floor.

    The cloud is the reference spec filtered over ``warmup_days`` days with
    ``particles`` particles (:func:`prepare_update_workload`). The timed work
    is :func:`filters.run_scenarios`: ``trajectories`` futures x ``horizon``
    days x 3 scenarios with common random numbers (selection, dynamics with the
    interventions, observation noise, R_eff every day, latent infections) and
    the summaries of every outcome. The floor replays, with numpy alone, the
    ``rng.binomial`` calls the three simulations make (recorded in an untimed
    run through a recording copy of the model: same calls, shapes and n/p
    arrays). ``floor_ratio`` = scenarios / floor (the target, <= 1.3);
    ``floor_ratio_all_draws`` = scenarios / (floor + the observation-noise
    draws, gamma and Poisson, recorded and replayed the same way), i.e. how
    much the run costs beyond every random number it draws.
    """
    from filters import run_scenarios

    say = progress or (lambda msg: None)
    say(f"forecast: filtering {REFERENCE_SPEC} with {particles} particles over {warmup_days} warm-up days")
    work = prepare_update_workload(particles, warmup_days, seed)
    pf = work.filter()
    weights = pf.weights()
    scenarios = forecast_scenarios()
    model = work.model

    def run(m: CompartmentalModel) -> Any:
        return run_scenarios(m, pf.particles, weights, pf.time, scenarios, horizon, trajectories, seed)

    binomial_calls: list = []
    other_calls: list = []
    recorded = run(_recording_model(model, binomial_calls, other_calls))

    def run_floor(r: int) -> Timer:
        rng = np.random.default_rng(seed + 3000 + r)
        with Timer() as timer:
            floor_draws(binomial_calls, rng)
        return timer

    def run_noise(r: int) -> Timer:
        rng = np.random.default_rng(seed + 4000 + r)
        with Timer() as timer:
            _replay_other(other_calls, rng)
        return timer

    run(model)  # untimed: first-call costs
    run_floor(-1)
    run_noise(-1)
    scen_t, floor_t, noise_t = [], [], []
    report = None
    for r in range(repeats):
        # Each scenario run sits between two floor runs, so load changes hit both alike.
        say(f"forecast: timing repeat {r + 1}/{repeats}")
        floor_t.append(run_floor(2 * r))
        with Timer() as timer:
            report = run(model)
        scen_t.append(timer)
        floor_t.append(run_floor(2 * r + 1))
        noise_t.append(run_noise(r))

    def med(timers: list[Timer], attr: str) -> float:
        return median([getattr(t, attr) for t in timers])

    scen_s, floor_s, noise_s = med(scen_t, "wall"), med(floor_t, "wall"), med(noise_t, "wall")
    same = report is not None and all(
        np.array_equal(report.forecasts[k].reported[s], recorded.forecasts[k].reported[s])
        for k in report.forecasts
        for s in report.forecasts[k].reported
    )
    averted = {o.name: o.averted_cases.mean for o in report.outcomes[1:] if o.averted_cases is not None} if report else {}
    figures: dict[str, Any] = {
        "workload": {
            "name": "forecast",
            "spec": REFERENCE_SPEC,
            "cloud_particles": particles,
            "warmup_days": warmup_days,
            "origin_day": pf.time,
            "trajectories": trajectories,
            "horizon_days": horizon,
            "scenarios": ["baseline", *[s.name for s in scenarios]],
            "seed": seed,
            "repeats": repeats,
            "method": "run_scenarios (3 forecasts with common random numbers + summaries), median of repeats; "
            "floor = recorded binomial calls replayed with numpy alone, interleaved",
        },
        "scenarios_seconds": scen_s,
        "seconds_per_scenario": scen_s / 3,
        "floor_seconds": floor_s,
        "floor_binomial_calls": len(binomial_calls),
        "floor_ratio": scen_s / floor_s,
        "observation_draws_seconds": noise_s,
        "observation_draw_calls": len(other_calls),
        "floor_ratio_all_draws": scen_s / (floor_s + noise_s),
        "recorded_run_identical": bool(same),
        "mean_cases_averted": averted,
        "cpu": {
            "scenarios_seconds": med(scen_t, "cpu"),
            "floor_seconds": med(floor_t, "cpu"),
            "floor_ratio": med(scen_t, "cpu") / med(floor_t, "cpu"),
            "observation_draws_seconds": med(noise_t, "cpu"),
        },
        "samples": {
            "scenarios_seconds": [t.wall for t in scen_t],
            "floor_seconds": [t.wall for t in floor_t],
            "observation_draws_seconds": [t.wall for t in noise_t],
        },
    }
    targets = [
        Target(
            "floor_ratio", scen_s / floor_s, FLOOR_RATIO_MAX, "max",
            "3 scenarios x trajectories x horizon (with summaries) / binomial floor", figures["cpu"]["floor_ratio"],
        )
    ]
    return SectionResult(figures, targets)

