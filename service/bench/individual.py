"""Section ``individual``: one daily step of the individual-based model against its floor.

Workload: the shipped ``pellingwold_flu`` model (the invented town of 20,000
people: households, schools, workplaces, community) with 1,000 particles
(``town_particles``; the command's ``--particles`` is for the compartmental
sections and does not apply). ``seed_particles`` towns are run through
``warmup_days`` days of the epidemic from the prior and copied (resampled) up
to the workload size, so the timed day is one near the epidemic's peak (about
4 % of people latent or infectious). The saved cloud is restored before every
timed repeat, so every repeat does the same work. Timed: ``model.advance`` by
one day (the whole step a stream's update makes before weighting), median of
``repeats``.

The floor
---------
What any daily step of this model must do at least, with numpy alone:

* **locate**: one pass over the state that finds the people who are latent or
  infectious (``np.flatnonzero(states < 253)`` over the particles x people
  bytes). Every day each of them moves one day on, and no step can know who
  they are without reading every person's byte once;
* **draws**: the very random variates the step drew, replayed as bare numpy
  calls on the recorded arguments (the parameters' drift, one Poisson per
  infectious person, two uniforms per contact, the imports, the new cases'
  latent periods, the new infectious periods).

The floor ratio is step / (locate + draws): the price of everything else (the
grouped gathers of rates and places, de-duplicating contacts, the counts per
band and place). Target: at most 1.5.

The model's law could also be sampled person by person: one Bernoulli per
susceptible person a day. The *dense draw floor* is the bare draws of that
formulation, one uniform per particle-person (``Generator.random``, float64;
the float32 figure is given too); the step is not bound by it (it draws per
contact, so early in an epidemic it is far below it), but the ratio says what
the individual-based step costs next to the least a direct simulation would
pay. Target: at most 1.5 as well. Both targets are reported; neither gates.

The step includes keeping the running contacts and exposure of the model's
learned transmission rates (``learned_rates``); the bench runs in a process
whose allocator :mod:`service.allocator` has set (``allocator``: ``tuned``
when run as ``casecloud bench``), as the service does, and the floor is timed
in the same process.

Memory: ``state_bytes_per_particle_person`` is the particle set (the one-byte
state, the history of daily counts, parameters, weights) over particles x
people; target at most 4. ``peak_bytes_per_particle_person`` is the tracemalloc
peak of one step above what was traced before it (numpy reports its buffers to
tracemalloc), over particles x people: the step's temporary memory on top of
the state.
"""

from __future__ import annotations

import tracemalloc
from collections.abc import Callable
from typing import Any

import numpy as np

from filters import IndividualModel, ParticleSet
from schemas import example_individual_path, load_spec

from ..allocator import allocator_setting
from .common import SectionResult, Target, Timer, median

__all__ = ["INDIVIDUAL_MODEL", "FLOOR_RATIO_MAX", "STATE_BYTES_MAX", "bench_individual", "prepare_individual_workload"]

INDIVIDUAL_MODEL = "pellingwold_flu"
FLOOR_RATIO_MAX = 1.5
STATE_BYTES_MAX = 4.0


class _RecordingDraws:
    """Delegates to a Generator and keeps every ``poisson``, ``random`` and ``standard_normal``
    (parameter drift) call's arguments."""

    def __init__(self, rng: np.random.Generator) -> None:
        self._rng = rng
        self.calls: list[tuple[str, Any]] = []

    def poisson(self, lam: Any = 1.0, size: Any = None) -> Any:
        self.calls.append(("poisson", np.array(lam, dtype=float)))
        return self._rng.poisson(lam, size)

    def random(self, size: Any = None, dtype: Any = np.float64, out: Any = None) -> Any:
        self.calls.append(("random", size))
        return self._rng.random(size, dtype=dtype, out=out)

    def standard_normal(self, size: Any = None) -> Any:
        self.calls.append(("standard_normal", size))
        return self._rng.standard_normal(size)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._rng, name)


def _replay(calls: list[tuple[str, Any]], rng: np.random.Generator) -> None:
    for kind, arg in calls:
        if kind == "poisson":
            rng.poisson(arg)
        elif kind == "standard_normal":
            rng.standard_normal(arg)
        else:
            rng.random(arg)


def prepare_individual_workload(
    town_particles: int = 1000, seed_particles: int = 50, warmup_days: int = 42, seed: int = 20412
) -> tuple[IndividualModel, ParticleSet, int]:
    """The model, a cloud of ``town_particles`` towns at day ``warmup_days``, and that day."""
    model = IndividualModel(load_spec(example_individual_path(INDIVIDUAL_MODEL)))  # type: ignore[arg-type]
    rng = np.random.Generator(np.random.PCG64(seed))
    seeds = model.initial(min(seed_particles, town_particles), rng)
    model.advance(seeds, 0, warmup_days, rng)
    cloud = seeds.take(np.arange(town_particles) % seeds.size)
    return model, cloud, warmup_days


def bench_individual(
    particles: int = 1000,
    repeats: int = 5,
    progress: Callable[[str], None] | None = None,
    town_particles: int = 1000,
    seed_particles: int = 50,
    warmup_days: int = 42,
    seed: int = 20412,
) -> SectionResult:
    """Time one daily step of ``pellingwold_flu`` and its floor (see the module docstring)."""
    say = progress or (lambda msg: None)
    say(f"preparing {INDIVIDUAL_MODEL}: {seed_particles} towns over {warmup_days} days, copied to {town_particles}")
    model, cloud, day = prepare_individual_workload(town_particles, seed_particles, warmup_days, seed)
    n, people = cloud.size, model.people
    cells = n * people

    def fresh() -> ParticleSet:
        return cloud.take(np.arange(n))

    steps, cpus, recorded = [], [], []
    for r in range(repeats):
        say(f"step {r + 1}/{repeats}")
        work = fresh()
        rng = np.random.Generator(np.random.PCG64([seed, r]))
        with Timer() as t:
            model.advance(work, day, day + 1, rng)
        steps.append(t.wall)
        cpus.append(t.cpu)
    # The draws of one step, recorded, then replayed bare.
    recorder = _RecordingDraws(np.random.Generator(np.random.PCG64([seed, 0])))
    model.advance(fresh(), day, day + 1, recorder)  # type: ignore[arg-type]
    recorded = recorder.calls
    locate_w, locate_c, draws_w, draws_c, dense_w, dense_c, dense32 = [], [], [], [], [], [], []
    flat = cloud.states.reshape(-1)
    for r in range(repeats):
        say(f"floor {r + 1}/{repeats}")
        with Timer() as t:
            np.flatnonzero(flat < 253)
        locate_w.append(t.wall)
        locate_c.append(t.cpu)
        rng = np.random.Generator(np.random.PCG64([seed, r]))
        with Timer() as t:
            _replay(recorded, rng)
        draws_w.append(t.wall)
        draws_c.append(t.cpu)
        with Timer() as t:
            rng.random(cells)
        dense_w.append(t.wall)
        dense_c.append(t.cpu)
        with Timer() as t:
            rng.random(cells, dtype=np.float32)
        dense32.append(t.wall)
    step, step_cpu = median(steps), median(cpus)
    floor = median(locate_w) + median(draws_w)
    floor_cpu = median(locate_c) + median(draws_c)
    dense, dense_cpu = median(dense_w), median(dense_c)
    # Memory.
    work = fresh()
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        model.advance(work, day, day + 1, np.random.Generator(np.random.PCG64([seed, 99])))
        peak = tracemalloc.get_traced_memory()[1] - before
    finally:
        tracemalloc.stop()
    state_bytes = sum(a.nbytes for a in cloud.arrays().values())
    counts = model.stage_counts(cloud).sum(axis=2)
    figures: dict[str, Any] = {
        "workload": {
            "model": INDIVIDUAL_MODEL,
            "particles": n,
            "people": people,
            "particle_people": cells,
            "day": day,
            "repeats": repeats,
            "latent_per_particle": float(counts[:, 1].mean()),
            "infectious_per_particle": float(counts[:, 2].mean()),
            "recovered_per_particle": float(counts[:, 3].mean()),
            "recorded_draw_calls": len(recorded),
            "recorded_variates": int(sum(np.size(a) if k == "poisson" else int(np.prod(a)) for k, a in recorded)),
            "learned_rates": [model.param_names[j] for j in model.learned_parameters],
            "allocator": allocator_setting(),
        },
        "step_seconds": step,
        "step_ns_per_particle_person": step / cells * 1e9,
        "locate_seconds": median(locate_w),
        "draws_seconds": median(draws_w),
        "floor_seconds": floor,
        "floor_ratio": step / floor,
        "dense_draw_floor_seconds": dense,
        "dense_draw_floor_ratio": step / dense,
        "dense_draw_floor_float32_seconds": median(dense32),
        "dense_draw_floor_float32_ratio": step / median(dense32),
        "cpu": {
            "step_seconds": step_cpu,
            "step_ns_per_particle_person": step_cpu / cells * 1e9,
            "floor_seconds": floor_cpu,
            "floor_ratio": step_cpu / floor_cpu,
            "dense_draw_floor_ratio": step_cpu / dense_cpu,
        },
        "state_bytes_per_particle_person": state_bytes / cells,
        "state_bytes_of_people_per_particle_person": cloud.states.nbytes / cells,
        "peak_bytes_per_particle_person": peak / cells,
    }
    targets = [
        Target(
            "floor_ratio",
            step / floor,
            FLOOR_RATIO_MAX,
            "max",
            "one daily step over (locating the latent and infectious + the step's own draws, bare numpy)",
            cpu_value=step_cpu / floor_cpu,
        ),
        Target(
            "dense_draw_floor_ratio",
            step / dense,
            FLOOR_RATIO_MAX,
            "max",
            "one daily step over one float64 uniform per particle-person (a person-by-person step's bare draws)",
            cpu_value=step_cpu / dense_cpu,
        ),
        Target("state_bytes_per_particle_person", state_bytes / cells, STATE_BYTES_MAX, "max", "the particle set over particles x people"),
    ]
    return SectionResult(figures, targets)
