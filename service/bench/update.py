"""Section ``update``: one daily filter step against the binomial floor and a naive loop.

Reference workload (``update``)
-------------------------------
The shipped spec ``seir_two_band`` (two age bands, SEIR, 4 sub-steps a day, two
negative-binomial ED series with a 7-weight reporting-delay kernel) with 10,000
particles. A season is simulated with :func:`filters.simulate_season`; a
:class:`filters.ParticleFilter` assimilates its first ``warmup_days`` days, and
its full state (particles, weights, RNG state) is saved. Every timed repeat
rebuilds the filter from that saved state and times one
``ParticleFilter.step(observation)`` for the next day, so every repeat does
exactly the same work (same draws, same resampling decision); the median is
reported. The step is timed without and with its summary
(``with_summary=True`` is what the service publishes).

Baselines, measured in the same process, interleaved with the update (a floor
run right before every timed step, so the floor median is over twice as many
runs) so that machine load hits both alike:

* **floor**: the binomial variates of one day of the Euler-multinomial scheme
  drawn with numpy alone. The ``rng.binomial`` calls made by one real step are
  recorded (same number of calls, shapes and n/p arrays; for this spec, per
  sub-step one leave-draw for each of S, E, I over (particles, groups)) and
  replayed against a fresh Generator. ``floor_ratio`` = update / floor: how
  much the step costs beyond the random numbers it cannot avoid.
* **naive**: the same model written as a per-particle Python loop with scalar
  draws (:class:`NaiveModel`: same dynamics, drift and likelihood; weighting
  and resampling left out, so the naive figure is a lower bound). It is timed
  on a subset of particles and scaled linearly to the full count;
  ``naive_speedup`` = naive / update.

Memory: ``peak_bytes_per_particle`` is the tracemalloc peak of one step with
summary (numpy reports its buffers to tracemalloc) above the memory traced
before the step, divided by the number of particles; ``state_bytes_per_particle``
is ``nbytes`` of the particle arrays per particle.
"""

from __future__ import annotations

import tracemalloc
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from filters import (
    CompartmentalModel,
    FilterConfig,
    Observation,
    ParticleFilter,
    simulate_season,
)
from schemas import example_model_path, load_model_spec

from .common import (
    RecordingGenerator,
    SectionResult,
    Target,
    Timer,
    floor_draws,
    median,
)
from .naive import NaiveModel

REFERENCE_SPEC = "seir_two_band"
FLOOR_RATIO_MAX = 1.3
NAIVE_SPEEDUP_MIN = 20.0
# ------------------------------------------------------------------- workload
@dataclass
class UpdateWorkload:
    """A warmed-up filter, frozen as its saved state, and the next observation."""

    model: CompartmentalModel
    config: FilterConfig
    header: dict[str, Any]
    arrays: dict[str, np.ndarray]
    observation: Observation
    warmup_days: int
    seed: int

    @property
    def particles(self) -> int:
        return self.config.n_particles

    def filter(self, rng: Any | None = None) -> ParticleFilter:
        """A filter exactly as saved (optionally drawing through ``rng`` instead)."""
        pf = ParticleFilter.from_state(self.model, self.header, self.arrays)
        if rng is not None:
            pf.rng = rng
        return pf


def prepare_update_workload(particles: int = 10_000, warmup_days: int = 30, seed: int = 20240) -> UpdateWorkload:
    """Simulate a season of the reference spec and assimilate ``warmup_days`` days of it."""
    model = CompartmentalModel(load_model_spec(example_model_path(REFERENCE_SPEC)))
    season = simulate_season(model, warmup_days + 1, np.random.default_rng(seed))
    config = FilterConfig(n_particles=particles)
    pf = ParticleFilter(model, config, np.random.default_rng(seed + 1))
    for obs in season.observations[:warmup_days]:
        pf.step(obs, with_summary=False)
    header, arrays = pf.state()
    return UpdateWorkload(model, config, header, arrays, season.observations[warmup_days], warmup_days, seed)


def record_binomial_calls(workload: UpdateWorkload) -> list[tuple[np.ndarray, np.ndarray]]:
    """The (n, p) arrays of every binomial draw one update makes."""
    pf = workload.filter()
    recorder = RecordingGenerator(pf.rng)
    pf.rng = recorder  # type: ignore[assignment]
    pf.step(workload.observation, with_summary=False)
    return recorder.binomial_calls


# --------------------------------------------------------------------- memory
def _peak_step_bytes(work: UpdateWorkload, with_summary: bool) -> int:
    """Peak traced memory of one step above the memory traced just before it."""
    pf = work.filter()
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        pf.step(work.observation, with_summary=with_summary)
        return tracemalloc.get_traced_memory()[1] - before
    finally:
        tracemalloc.stop()


# --------------------------------------------------------------- the section
def bench_update(
    particles: int = 10_000,
    repeats: int = 5,
    naive_particles: int = 200,
    warmup_days: int = 30,
    seed: int = 20240,
    progress: Callable[[str], None] | None = None,
) -> SectionResult:
    """Time one daily update of the reference workload against the floor and the naive loop."""
    say = progress or (lambda msg: None)
    say(f"preparing {REFERENCE_SPEC} with {particles} particles, {warmup_days} warm-up days")
    work = prepare_update_workload(particles, warmup_days, seed)
    obs = work.observation
    calls = record_binomial_calls(work)

    def run_step(with_summary: bool) -> tuple[Timer, Any]:
        pf = work.filter()
        with Timer() as timer:
            result = pf.step(obs, with_summary=with_summary)
        return timer, result

    def run_floor(r: int) -> Timer:
        rng = np.random.default_rng(seed + 1000 + r)
        with Timer() as timer:
            floor_draws(calls, rng)
        return timer

    # One untimed round first: first-call costs (imports, caches) are not an update's.
    run_step(True)
    run_floor(-1)
    step_t, summ_t, floor_t = [], [], []
    result = None
    for r in range(repeats):
        # Each update is timed right after a floor run, so load changes hit both alike.
        say(f"timing repeat {r + 1}/{repeats}")
        floor_t.append(run_floor(2 * r))
        t, result = run_step(False)
        step_t.append(t)
        floor_t.append(run_floor(2 * r + 1))
        t, _ = run_step(True)
        summ_t.append(t)

    def med(timers: list[Timer], attr: str) -> float:
        return median([getattr(t, attr) for t in timers])

    update_s, summary_s, floor_s = med(step_t, "wall"), med(summ_t, "wall"), med(floor_t, "wall")

    # Naive loop on a subset, scaled linearly to every particle.
    subset = min(particles, max(1, naive_particles))
    naive = NaiveModel(work.model)
    index = np.arange(subset)
    naive_t = []
    for r in range(max(1, min(repeats, 3))):
        say(f"naive loop over {subset} particles, run {r + 1}")
        rng = np.random.default_rng(seed + 2000 + r)
        with Timer() as timer:
            naive.step(work.arrays, int(work.header["time"]), obs, rng, index)
        naive_t.append(timer)
    scale = particles / subset
    naive_s = med(naive_t, "wall") * scale

    # Memory: tracemalloc peak during one step, above what was traced before it.
    state_bytes = sum(a.nbytes for a in work.filter().particles.arrays().values())
    peak = _peak_step_bytes(work, with_summary=True)
    peak_no_summary = _peak_step_bytes(work, with_summary=False)

    ratio = update_s / floor_s
    ratio_summary = summary_s / floor_s
    speedup = naive_s / update_s
    shapes = sorted({tuple(n.shape) for n, _ in calls})
    figures: dict[str, Any] = {
        "workload": {
            "name": "update",
            "spec": REFERENCE_SPEC,
            "particles": particles,
            "groups": work.model.n_groups,
            "compartments": work.model.n_compartments,
            "substeps_per_day": work.model.spec.substeps_per_day,
            "series": [s.name for s in work.model.series],
            "delay_kernel_weights": int(work.model.series[0].weights.size),
            "warmup_days": warmup_days,
            "timed_day": obs.time,
            "seed": seed,
            "repeats": repeats,
            "resampled_in_timed_step": bool(result.resampled) if result is not None else None,
            "ess_in_timed_step": float(result.ess) if result is not None else None,
            "method": "filter state (particles, weights, RNG) restored before every repeat; median of repeats",
        },
        "update_seconds": update_s,
        "update_with_summary_seconds": summary_s,
        "summary_seconds": summary_s - update_s,
        "floor_seconds": floor_s,
        "floor_binomial_calls": len(calls),
        "floor_binomial_shapes": [list(s) for s in shapes],
        "floor_ratio": ratio,
        "floor_ratio_with_summary": ratio_summary,
        "naive_seconds": naive_s,
        "naive_particles_timed": subset,
        "naive_speedup": speedup,
        "naive_speedup_with_summary": naive_s / summary_s,
        "peak_bytes_per_particle": peak / particles,
        "peak_bytes_per_particle_without_summary": peak_no_summary / particles,
        "state_bytes_per_particle": state_bytes / particles,
        "cpu": {
            "update_seconds": med(step_t, "cpu"),
            "update_with_summary_seconds": med(summ_t, "cpu"),
            "floor_seconds": med(floor_t, "cpu"),
            "floor_ratio": med(step_t, "cpu") / med(floor_t, "cpu"),
            "floor_ratio_with_summary": med(summ_t, "cpu") / med(floor_t, "cpu"),
            "naive_seconds": med(naive_t, "cpu") * scale,
        },
        "samples": {
            "update_seconds": [t.wall for t in step_t],
            "update_with_summary_seconds": [t.wall for t in summ_t],
            "floor_seconds": [t.wall for t in floor_t],
            "naive_seconds_subset": [t.wall for t in naive_t],
        },
    }
    cpu = figures["cpu"]
    targets = [
        Target(
            "floor_ratio", ratio, FLOOR_RATIO_MAX, "max", "daily update without summary / binomial floor",
            cpu["floor_ratio"],
        ),
        Target(
            "floor_ratio_with_summary", ratio_summary, FLOOR_RATIO_MAX, "max",
            "daily update with summary (service path) / binomial floor", cpu["floor_ratio_with_summary"],
        ),
        Target(
            "naive_speedup", speedup, NAIVE_SPEEDUP_MIN, "min", "naive per-particle loop / daily update",
            cpu["naive_seconds"] / cpu["update_seconds"],
        ),
    ]
    return SectionResult(figures, targets)

