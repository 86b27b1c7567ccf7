"""``casecloud bench``: how fast one daily update is, against in-process baselines.

The command is a list of *sections*; each section prepares a workload, times it
and returns plain figures plus the performance targets it checks: ``update``
(the reference workload, below), ``service`` (end to end through Kafka, see
``service/bench_service.py``) and ``forecast`` (intervention scenarios with
common random numbers against their binomial floor, see :func:`bench_forecast`),
each registered in :data:`SECTIONS`. The JSON output keeps the reference section's figures at the top level
(``update_seconds``, ``floor_ratio``, ...); further sections go under their own
key, and ``targets`` gathers every section's pass/fail checks.

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

Times are wall-clock (``time.perf_counter``) and the targets are judged on
them; the thread CPU time of the same runs is reported beside them (``cpu``,
and ``cpu_value`` / ``cpu_pass`` in each target) because on a shared, busy
machine wall-clock medians of a few repeats mostly measure the other
processes. Raise ``--repeats`` there, or run on a quiet machine.

The command exits 0 whether or not targets pass: it reports, it does not gate.
"""

from __future__ import annotations

import argparse
import copy
import math
import os
import platform
import statistics
import sys
import time
import tracemalloc
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import orjson

from filters import (
    CompartmentalModel,
    FilterConfig,
    Observation,
    ParticleFilter,
    compile_expression,
    delay_kernel,
    simulate_season,
)
from schemas import example_model_path, load_model_spec

__all__ = [
    "BENCH_FORMAT",
    "SECTIONS",
    "NaiveModel",
    "Target",
    "UpdateWorkload",
    "bench_forecast",
    "bench_update",
    "format_report",
    "prepare_update_workload",
    "run_bench",
    "run_bench_command",
]

BENCH_FORMAT = 1
REFERENCE_SPEC = "seir_two_band"
FLOOR_RATIO_MAX = 1.3
NAIVE_SPEEDUP_MIN = 20.0


@dataclass(frozen=True)
class Target:
    """A performance target checked by the benchmark (never by a unit test).

    ``value`` is the wall-clock figure the target is judged on; ``cpu_value``,
    when given, is the same figure from thread CPU time, reported beside it
    because it is less disturbed by other processes on a busy machine.
    """

    name: str
    value: float
    limit: float
    kind: str  # "max": value <= limit passes; "min": value >= limit passes
    note: str = ""
    cpu_value: float | None = None

    def _ok(self, value: float) -> bool:
        return bool(value <= self.limit if self.kind == "max" else value >= self.limit)

    @property
    def passed(self) -> bool:
        return self._ok(self.value)

    def as_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"value": self.value, self.kind: self.limit, "pass": self.passed, "note": self.note}
        if self.cpu_value is not None:
            out["cpu_value"] = self.cpu_value
            out["cpu_pass"] = self._ok(self.cpu_value)
        return out


@dataclass
class SectionResult:
    figures: dict[str, Any]
    targets: list[Target] = field(default_factory=list)


# --------------------------------------------------------------------- timing
class _Timer:
    """Wall-clock and thread CPU time of a block."""

    def __enter__(self) -> "_Timer":
        self.wall0, self.cpu0 = time.perf_counter(), time.thread_time()
        return self

    def __exit__(self, *exc: object) -> None:
        self.wall = time.perf_counter() - self.wall0
        self.cpu = time.thread_time() - self.cpu0


def _median(values: list[float]) -> float:
    return float(statistics.median(values))


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


# ---------------------------------------------------------------------- floor
class _RecordingGenerator:
    """Delegates to a Generator and keeps a copy of every ``binomial`` call's arguments."""

    def __init__(self, rng: np.random.Generator) -> None:
        self._rng = rng
        self.binomial_calls: list[tuple[np.ndarray, np.ndarray]] = []

    def binomial(self, n: Any, p: Any, size: Any = None) -> Any:
        nn, pp = np.broadcast_arrays(np.asarray(n), np.asarray(p))
        self.binomial_calls.append((np.array(nn, dtype=np.int64), np.array(pp, dtype=float)))
        return self._rng.binomial(n, p, size)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._rng, name)


def record_binomial_calls(workload: UpdateWorkload) -> list[tuple[np.ndarray, np.ndarray]]:
    """The (n, p) arrays of every binomial draw one update makes."""
    pf = workload.filter()
    recorder = _RecordingGenerator(pf.rng)
    pf.rng = recorder  # type: ignore[assignment]
    pf.step(workload.observation, with_summary=False)
    return recorder.binomial_calls


def floor_draws(calls: list[tuple[np.ndarray, np.ndarray]], rng: np.random.Generator) -> None:
    """Draw the same binomial variates as the recorded day, with numpy alone."""
    for n, p in calls:
        rng.binomial(n, p)


# ---------------------------------------------------------------------- naive
def _to_unconstrained(x: float, transform: str, bounds: tuple[float, float]) -> float:
    if transform == "log":
        return math.log(max(x, 1e-300))
    if transform == "logit":
        lo, hi = bounds
        u = min(max((x - lo) / (hi - lo), 1e-12), 1 - 1e-12)
        return math.log(u) - math.log1p(-u)
    return x


def _from_unconstrained(y: float, transform: str, bounds: tuple[float, float]) -> float:
    if transform == "log":
        return math.exp(y)
    if transform == "logit":
        lo, hi = bounds
        return lo + (hi - lo) / (1.0 + math.exp(-y))
    return y


class NaiveModel:
    """The reference model written the slow way: one particle at a time, scalar draws.

    Built from the public model spec (not from the vectorised engine's internals),
    so it is also an independent re-implementation of the same dynamics: the
    Euler-multinomial scheme with sequential binomials, the random-walk drift of
    drifting parameters, the contact-matrix force of infection and importation,
    and the Poisson / negative-binomial likelihood of daily incidence series with
    reporting-delay kernels. Other spec features (weekly series, prevalence and
    binomial series) are outside what the benchmark needs and are refused.
    """

    def __init__(self, model: CompartmentalModel) -> None:
        spec = model.spec
        for s in spec.series:
            if s.kind != "incidence" or s.cadence != "daily" or s.noise.dist == "binomial":
                raise NotImplementedError(f"naive baseline covers daily incidence series only, not {s.name!r}")
        self.spec = spec
        self.compartments = list(spec.compartments)
        self.cidx = {c: i for i, c in enumerate(self.compartments)}
        self.groups = [g.name for g in spec.groups]
        self.population = [int(g.population) for g in spec.groups]
        self.total_population = sum(self.population)
        self.group_values = [dict(g.values) for g in spec.groups]
        self.substeps = spec.substeps_per_day
        self.dt = 1.0 / spec.substeps_per_day
        self.param_names = list(spec.parameters)
        self.drifting = [
            (j, p.volatility, p.transform, p.bounds)
            for j, p in enumerate(spec.parameters.values())
            if p.kind == "drifting"
        ]
        contact = spec.transmission.contact
        self.contact = [list(map(float, row)) for row in (contact if contact is not None else [[1.0]])]
        self.infectious = [(self.cidx[c], float(w)) for c, w in spec.transmission.infectious.items()]
        scalars = set(self.param_names) | {"t"}
        self.derived = []
        for name, source in spec.derived.items():
            self.derived.append((name, compile_expression(source, scalars)))
            scalars.add(name)
        self.importation = (
            compile_expression(spec.transmission.importation, scalars) if spec.transmission.importation else None
        )
        rate_names = scalars | set(self.compartments) | set(self.group_values[0]) | {"N", "foi", "imported"}
        self.flows = [
            (self.cidx[f.source], self.cidx[f.target], compile_expression(f.rate, rate_names)) for f in spec.flows
        ]
        # Flows out of each compartment, in spec order (the order of the sequential binomials).
        self.outflows = [
            (c, [f for f, (src, _, _) in enumerate(self.flows) if src == c])
            for c in range(len(self.compartments))
            if any(src == c for src, _, _ in self.flows)
        ]
        flow_names = [f.name for f in spec.flows]
        observed = list(dict.fromkeys(s.flow for s in spec.series))
        self.observed = [flow_names.index(f) for f in observed]
        self.series = []
        for s in spec.series:
            kernel = [1.0] if s.delay is None else list(
                delay_kernel(s.delay.dist, s.delay.mean, s.delay.sd, s.delay.max_days)
            )
            groups = [self.groups.index(g) for g in (s.groups or self.groups)]
            reporting = s.reporting if isinstance(s.reporting, str) else float(s.reporting)
            dispersion = s.noise.dispersion
            self.series.append((s.name, observed.index(s.flow), groups, kernel, reporting, s.noise.dist, dispersion))

    def _value(self, ref: float | str | None, params: list[float]) -> float:
        return params[self.param_names.index(ref)] if isinstance(ref, str) else float(ref)  # type: ignore[arg-type]

    def advance_particle(
        self, state: list[list[int]], params: list[float], history: list[list[list[int]]], t0: int, t1: int,
        rng: np.random.Generator,
    ) -> None:
        """Move one particle from day t0 to t1 in place (state[g][c], history[day][slot][g])."""
        G = len(self.groups)
        for day in range(t0, t1):
            for j, vol, transform, bounds in self.drifting:
                y = _to_unconstrained(params[j], transform, bounds) + vol * float(rng.standard_normal())
                params[j] = _from_unconstrained(y, transform, bounds)
            env: dict[str, Any] = dict(zip(self.param_names, params))
            env["t"] = float(day)
            for name, expr in self.derived:
                env[name] = float(expr(env))
            if history:
                history.insert(0, [[0] * G for _ in self.observed])
                history.pop()
            for sub in range(self.substeps):
                env["t"] = day + sub * self.dt
                imported = float(self.importation(env)) / self.total_population if self.importation else 0.0
                prevalence = [
                    sum(w * state[j][c] for c, w in self.infectious) / self.population[j] for j in range(G)
                ]
                moves = []  # per group: moved count per flow
                for g in range(G):
                    genv = dict(env)
                    genv.update(self.group_values[g])
                    genv["N"] = float(self.population[g])
                    genv["imported"] = imported
                    genv["foi"] = sum(self.contact[g][j] * prevalence[j] for j in range(G))
                    for c, name in enumerate(self.compartments):
                        genv[name] = float(state[g][c])
                    rates = []
                    for _, _, expr in self.flows:
                        r = float(expr(genv))
                        rates.append(r if r > 0 else 0.0)
                    moved = [0] * len(self.flows)
                    for c, out in self.outflows:
                        total = sum(rates[f] for f in out)
                        remaining = int(rng.binomial(state[g][c], -math.expm1(-total * self.dt)))
                        left = total
                        for f in out[:-1]:
                            share = rates[f] / left if left > 0 else 0.0
                            moved[f] = int(rng.binomial(remaining, min(max(share, 0.0), 1.0)))
                            remaining -= moved[f]
                            left -= rates[f]
                        moved[out[-1]] = remaining
                    moves.append(moved)
                for g in range(G):
                    for f, (src, dst, _) in enumerate(self.flows):
                        state[g][src] -= moves[g][f]
                        state[g][dst] += moves[g][f]
                    if history:
                        for k, f in enumerate(self.observed):
                            history[0][k][g] += moves[g][f]

    def log_likelihood_particle(self, params: list[float], history: list[list[list[int]]], values: dict) -> float:
        """log p(observation | particle) for one particle."""
        total = 0.0
        for name, slot, groups, kernel, reporting, noise, dispersion in self.series:
            y = values.get(name)
            if y is None:
                continue
            y = float(y)
            daily = [sum(history[d][slot][g] for g in groups) for d in range(len(kernel))]
            mu = self._value(reporting, params) * sum(w * x for w, x in zip(kernel, daily))
            if noise == "poisson":
                if y == 0:
                    total += -mu
                elif mu <= 0:
                    return -math.inf
                else:
                    total += y * math.log(mu) - mu - math.lgamma(y + 1.0)
            else:
                k = self._value(dispersion, params)
                if mu <= 0 and y > 0:
                    return -math.inf
                log_p_zero = k * (math.log(k) - math.log(k + mu))
                if y == 0:
                    total += log_p_zero
                else:
                    total += (
                        math.lgamma(y + k) - math.lgamma(k) - math.lgamma(y + 1.0)
                        + log_p_zero + y * (math.log(mu) - math.log(k + mu))
                    )
        return total

    def step(self, arrays: dict[str, np.ndarray], t0: int, observation: Observation, rng: np.random.Generator,
             index: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Propagate the chosen particles one at a time and weight them.

        Returns (states, history, loglik) for those particles.
        """
        states = arrays["states"][index].tolist()
        params = arrays["params"][index].tolist()
        history = arrays["history"][index].tolist()
        loglik = np.empty(len(index))
        present = observation.present()
        for i in range(len(index)):
            self.advance_particle(states[i], params[i], history[i], t0, observation.time, rng)
            loglik[i] = self.log_likelihood_particle(params[i], history[i], present)
        return np.array(states, dtype=np.int64), np.array(history, dtype=np.int64), loglik


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

    def run_step(with_summary: bool) -> tuple[_Timer, Any]:
        pf = work.filter()
        with _Timer() as timer:
            result = pf.step(obs, with_summary=with_summary)
        return timer, result

    def run_floor(r: int) -> _Timer:
        rng = np.random.default_rng(seed + 1000 + r)
        with _Timer() as timer:
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

    def med(timers: list[_Timer], attr: str) -> float:
        return _median([getattr(t, attr) for t in timers])

    update_s, summary_s, floor_s = med(step_t, "wall"), med(summ_t, "wall"), med(floor_t, "wall")

    # Naive loop on a subset, scaled linearly to every particle.
    subset = min(particles, max(1, naive_particles))
    naive = NaiveModel(work.model)
    index = np.arange(subset)
    naive_t = []
    for r in range(max(1, min(repeats, 3))):
        say(f"naive loop over {subset} particles, run {r + 1}")
        rng = np.random.default_rng(seed + 2000 + r)
        with _Timer() as timer:
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


# ------------------------------------------------------------ forecast section
class _RecordingDraws(_RecordingGenerator):
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

    def run_floor(r: int) -> _Timer:
        rng = np.random.default_rng(seed + 3000 + r)
        with _Timer() as timer:
            floor_draws(binomial_calls, rng)
        return timer

    def run_noise(r: int) -> _Timer:
        rng = np.random.default_rng(seed + 4000 + r)
        with _Timer() as timer:
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
        with _Timer() as timer:
            report = run(model)
        scen_t.append(timer)
        floor_t.append(run_floor(2 * r + 1))
        noise_t.append(run_noise(r))

    def med(timers: list[_Timer], attr: str) -> float:
        return _median([getattr(t, attr) for t in timers])

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


# Further workloads register here.
def _bench_service(**kwargs: Any) -> SectionResult:
    from .bench_service import bench_service

    return bench_service(**kwargs)


SECTIONS: dict[str, Callable[..., SectionResult]] = {
    "update": bench_update,
    "service": _bench_service,
    "forecast": bench_forecast,
}
PRIMARY_SECTION = "update"


def _environment() -> dict[str, Any]:
    try:
        load = list(os.getloadavg())
    except OSError:  # pragma: no cover - not every platform has it
        load = None
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "machine": platform.machine(),
        "cpu_count": os.cpu_count(),
        "load_average": load,
        "OPENBLAS_CORETYPE": os.environ.get("OPENBLAS_CORETYPE"),
    }


def run_bench(
    particles: int = 10_000,
    repeats: int = 5,
    sections: tuple[str, ...] = ("update",),
    progress: Callable[[str], None] | None = None,
    options: dict[str, dict[str, Any]] | None = None,
) -> dict[str, Any]:
    """Run the named sections and return one JSON-able report.

    ``options`` maps a section name to extra keyword arguments of its function
    (e.g. ``{"update": {"naive_particles": 50, "warmup_days": 5}}``).
    """
    if particles < 1:
        raise ValueError(f"particles must be at least 1, got {particles}")
    if repeats < 1:
        raise ValueError(f"repeats must be at least 1, got {repeats}")
    unknown = [s for s in sections if s not in SECTIONS]
    if unknown:
        raise ValueError(f"unknown bench section(s) {unknown}; allowed: {sorted(SECTIONS)}")
    report: dict[str, Any] = {"bench_format": BENCH_FORMAT, "environment": _environment(), "sections": list(sections)}
    targets: dict[str, Any] = {}
    for name in sections:
        extra = (options or {}).get(name, {})
        try:
            result = SECTIONS[name](particles=particles, repeats=repeats, progress=progress, **extra)
        except Exception as exc:  # a section that cannot run is reported, not hidden
            report[name] = {"error": f"{type(exc).__name__}: {exc}"}
            targets[f"{name}.ran"] = {"value": 0.0, "min": 1.0, "pass": False, "note": "section failed to run"}
            continue
        if name == PRIMARY_SECTION:
            report.update(result.figures)
        else:
            report[name] = result.figures
        for t in result.targets:
            targets[t.name if name == PRIMARY_SECTION else f"{name}.{t.name}"] = t.as_dict()
    report["targets"] = targets
    report["environment"]["load_average_after"] = _environment()["load_average"]
    return report


def _fmt_seconds(s: float) -> str:
    return f"{s * 1e3:10.2f} ms" if s < 10 else f"{s:10.2f} s "


def format_report(report: dict[str, Any]) -> str:
    """The human-readable table."""
    if PRIMARY_SECTION not in report["sections"]:
        return _format_other_sections(report)
    w = report.get("workload", {})
    env = report["environment"]
    lines = [
        f"casecloud bench: workload '{w.get('name')}' = spec {w.get('spec')}, {w.get('particles')} particles, "
        f"{w.get('groups')} groups x {w.get('compartments')} compartments, {w.get('substeps_per_day')} sub-steps/day,",
        f"  series {', '.join(w.get('series', []))} (delay kernel {w.get('delay_kernel_weights')} weights); "
        f"one daily step after {w.get('warmup_days')} warm-up days, median of {w.get('repeats')} repeats "
        f"(state restored before each; resampled: {w.get('resampled_in_timed_step')})",
        f"  python {env['python']}, numpy {env['numpy']}, {env['cpu_count']} CPUs, load average before/after "
        f"{env['load_average'][0] if env['load_average'] else '?'} / "
        f"{env['load_average_after'][0] if env.get('load_average_after') else '?'}",
        "",
        f"  {'figure':<40}{'wall':>13}{'thread CPU':>16}",
    ]
    cpu = report.get("cpu", {})
    rows = [
        ("update step (no summary)", "update_seconds"),
        ("update step with summary", "update_with_summary_seconds"),
        (f"floor: {report.get('floor_binomial_calls')} numpy binomial calls", "floor_seconds"),
        (f"naive loop (scaled from {report.get('naive_particles_timed')})", "naive_seconds"),
    ]
    for label, key in rows:
        c = cpu.get(key)
        lines.append(f"  {label:<40}{_fmt_seconds(report[key])}{_fmt_seconds(c) if c is not None else '':>16}")
    lines += [
        f"  {'floor ratio (no summary)':<40}{report['floor_ratio']:13.3f}{cpu.get('floor_ratio', float('nan')):16.3f}",
        f"  {'floor ratio with summary':<40}{report['floor_ratio_with_summary']:13.3f}"
        f"{cpu.get('floor_ratio_with_summary', float('nan')):16.3f}",
        f"  {'naive speed-up (no summary)':<40}{report['naive_speedup']:13.1f}",
        f"  {'peak memory per particle (step+summary)':<40}{report['peak_bytes_per_particle']:11.0f} B",
        f"  {'peak memory per particle (step only)':<40}{report['peak_bytes_per_particle_without_summary']:11.0f} B",
        f"  {'particle state per particle':<40}{report['state_bytes_per_particle']:11.0f} B",
        "",
        "  targets (judged on wall-clock medians):",
    ]
    for name, t in report["targets"].items():
        bound = f"<= {t['max']}" if "max" in t else f">= {t['min']}"
        cpu_note = ""
        if "cpu_value" in t:
            cpu_note = f"   (thread CPU: {t['cpu_value']:.3f} {'PASS' if t['cpu_pass'] else 'FAIL'})"
        lines.append(f"    {name:<38}{t['value']:10.3f}  {bound:<8} {'PASS' if t['pass'] else 'FAIL'}{cpu_note}")
    return "\n".join(lines) + _format_other_sections(report)


def _format_other_sections(report: dict[str, Any]) -> str:
    lines = []
    for name in report["sections"]:
        if name == PRIMARY_SECTION:
            continue
        lines += ["", f"section {name}:"]
        for key, value in report[name].items():
            if isinstance(value, float):
                value = f"{value:.4g}"
            lines.append(f"  {key:<38}{value}")
        for tname, t in report["targets"].items():
            if tname.startswith(f"{name}."):
                bound = f"<= {t['max']}" if "max" in t else f">= {t['min']}"
                lines.append(f"  target {tname:<31}{t['value']:10.3f}  {bound:<8} {'PASS' if t['pass'] else 'FAIL'}")
    return "\n".join(lines)




def run_bench_command(args: argparse.Namespace) -> int:
    """Entry point of ``casecloud bench``."""
    particles = getattr(args, "particles", 10_000)
    repeats = getattr(args, "repeats", 5)
    as_json = getattr(args, "json", False)
    if particles < 1 or repeats < 1:
        print(f"casecloud bench: --particles and --repeats must be >= 1 (given {particles}, {repeats})", file=sys.stderr)
        return 2
    progress = None if as_json else (lambda msg: print(f"  ... {msg}", file=sys.stderr, flush=True))
    sections = tuple(x for x in getattr(args, "sections", "update").split(",") if x)
    options: dict[str, dict[str, Any]] = {}
    if getattr(args, "kafka_bootstrap", None):
        options["service"] = {"bootstrap": args.kafka_bootstrap}
    try:
        report = run_bench(particles=particles, repeats=repeats, progress=progress, sections=sections, options=options)
    except ValueError as exc:
        print(f"casecloud bench: {exc}", file=sys.stderr)
        return 2
    if as_json:
        print(orjson.dumps(report, option=orjson.OPT_INDENT_2 | orjson.OPT_SERIALIZE_NUMPY).decode())
    else:
        print(format_report(report))
    return 1 if any(isinstance(report.get(n), dict) and "error" in report[n] for n in sections) else 0
