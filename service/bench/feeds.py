"""Section ``feeds``: what a late value and a revision cost next to a daily step.

Workload: the shipped ``seir_two_band_lab`` spec (daily ED visits per band,
dated by report; weekly lab positives by specimen date, revised as reports
arrive; a 21-day assimilation window) with the requested particles, warmed up
over ``warmup_days`` days of a simulated season fed as three feeds. The saved
cloud is restored before every timed repeat, so every repeat does the same
work. Timed, without summaries, median of ``repeats``:

* **daily step**: ``assimilate`` of the next day's two ED counts (propagation
  by one day plus weighting);
* **late value**: ``assimilate`` of one ED count for a day 5 days back (no
  propagation: weighting on each particle's retained path, maybe resampling);
* **revision**: ``assimilate`` of a higher lab total for the latest complete
  week, as of today, over what was known three days ago.

Targets: late / daily and revision / daily at most 0.2 (one likelihood
evaluation over the cloud, no propagation). :func:`feed_messages` also serves
the service section's three-feed variant.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from typing import Any

import numpy as np
import orjson

from filters import (
    CompartmentalModel,
    FilterConfig,
    ParticleFilter,
    Report,
    reporting_cdf,
    simulate_season,
)
from schemas import example_model_path, load_model_spec

from .common import SectionResult, Target, Timer, median

__all__ = ["FEEDS_SPEC", "LATE_RATIO_MAX", "bench_feeds", "feed_messages", "feed_reports"]

FEEDS_SPEC = "seir_two_band_lab"
LATE_RATIO_MAX = 0.2
LAB_DELAY = (6.4, 3.0)  # mean and sd (days) the simulated lab reports follow


def feed_reports(days: int, seed: int) -> tuple[CompartmentalModel, list[list[Report]]]:
    """A simulated season as the three feeds deliver it: per day, the reports that arrive.

    Day t brings ED child and adult counts for day t (two reports) and, for every
    week that ended in the last 21 days, the lab total known as of day t when it
    changed (a first report or a revision). Lab totals are the week's eventual
    count split over report days by the discretised delay (multinomial).
    """
    model = CompartmentalModel(load_model_spec(example_model_path(FEEDS_SPEC)))
    season = simulate_season(model, days, np.random.default_rng(seed))
    rng = np.random.default_rng(seed + 1)
    q = np.diff(np.concatenate([[0.0], reporting_cdf("gamma", LAB_DELAY[0], LAB_DELAY[1], 21)[0]]))
    lab_by_report_day: dict[int, dict[int, int]] = {}  # week end -> report day -> reports
    out: list[list[Report]] = []
    known: dict[int, tuple[float, int]] = {}
    for obs in season.observations:
        t = obs.time
        reports = [Report(name, t, float(obs.values[name])) for name in ("ed_child", "ed_adult")]
        if "lab_confirmed" in obs.values:
            split = rng.multinomial(int(obs.values["lab_confirmed"]), q)
            lab_by_report_day[t] = {t + d: int(c) for d, c in enumerate(split)}
        for end, arrivals in sorted(lab_by_report_day.items()):
            if t - end > model.window_days:
                continue
            total = float(sum(c for day, c in arrivals.items() if day <= t))
            before = known.get(end)
            if before is None:
                reports.append(Report("lab_confirmed", end, total, as_of=t))
            elif total != before[0]:
                reports.append(Report("lab_confirmed", end, total, t, before[0], before[1]))
            else:
                continue
            known[end] = (total, t)
        out.append(reports)
    return model, out


def feed_messages(stream: str, start: dt.date, days: int, seed: int) -> list[bytes]:
    """:func:`feed_reports` as observation messages: one message per feed and day."""
    _, per_day = feed_reports(days, seed)
    messages = []
    for reports in per_day:
        for r in reports:
            end = start + dt.timedelta(days=r.time)
            if r.series == "lab_confirmed":
                year, week, _ = end.isocalendar()
                body: dict[str, Any] = {"stream": stream, "period": f"{year}-W{week:02d}", "counts": {r.series: int(r.value)}}
                body["as_of"] = (start + dt.timedelta(days=r.as_of)).isoformat()  # type: ignore[operator]
            else:
                body = {"stream": stream, "period": end.isoformat(), "counts": {r.series: int(r.value)}}
            messages.append(orjson.dumps(body))
    return messages


def bench_feeds(
    particles: int = 10_000,
    repeats: int = 5,
    warmup_days: int = 35,
    seed: int = 31,
    progress: Callable[[str], None] | None = None,
) -> SectionResult:
    """Time a late value and a revision against a daily step on the same saved cloud."""
    say = progress or (lambda msg: None)
    say(f"preparing {FEEDS_SPEC} with {particles} particles, {warmup_days} warm-up days of three feeds")
    model, per_day = feed_reports(warmup_days + 1, seed)
    config = FilterConfig(n_particles=particles)
    pf = ParticleFilter(model, config, np.random.default_rng(seed + 2))
    for t, reports in enumerate(per_day[:warmup_days], start=1):
        pf.assimilate(t, reports, with_summary=False)
    header, arrays = pf.state()
    now = warmup_days
    daily = [r for r in per_day[warmup_days] if r.series != "lab_confirmed"]
    late = [Report("ed_child", now - 5, float(per_day[now - 6][0].value) + 1.0)]
    week_end = now - (now % 7) if now % 7 else now - 7
    lab = [r for reports in per_day[:warmup_days] for r in reports if r.series == "lab_confirmed" and r.time == week_end]
    base = lab[-1] if lab else Report("lab_confirmed", week_end, 0.0, as_of=now - 3)
    revision = [Report("lab_confirmed", week_end, base.value + 3.0, now, base.value, base.as_of)]

    def timed(time: int, reports: list[Report]) -> Timer:
        cloud = ParticleFilter.from_state(model, header, {k: v.copy() for k, v in arrays.items()})
        with Timer() as timer:
            cloud.assimilate(time, reports, with_summary=False)
        return timer

    work = {"daily": (now + 1, daily), "late": (now, late), "revision": (now, revision)}
    for time, reports in work.values():  # untimed round: first-call costs are not an update's
        timed(time, reports)
    timers: dict[str, list[Timer]] = {name: [] for name in work}
    for r in range(repeats):
        say(f"timing repeat {r + 1}/{repeats}")
        for name, (time, reports) in work.items():
            timers[name].append(timed(time, reports))
    wall = {name: median([t.wall for t in ts]) for name, ts in timers.items()}
    cpu = {name: median([t.cpu for t in ts]) for name, ts in timers.items()}
    figures: dict[str, Any] = {
        "workload": {"spec": FEEDS_SPEC, "particles": particles, "warmup_days": warmup_days, "window_days": model.window_days,
                     "history_days": model.history_days},
        "daily_step_seconds": wall["daily"],
        "late_value_seconds": wall["late"],
        "revision_seconds": wall["revision"],
        "late_ratio": wall["late"] / wall["daily"],
        "revision_ratio": wall["revision"] / wall["daily"],
        "state_bytes_per_particle": sum(a.nbytes for a in arrays.values()) / particles,
        "cpu": {f"{k}_seconds": v for k, v in cpu.items()},
    }
    targets = [
        Target("late_ratio", figures["late_ratio"], LATE_RATIO_MAX, "max", "late value / daily step", cpu["late"] / cpu["daily"]),
        Target("revision_ratio", figures["revision_ratio"], LATE_RATIO_MAX, "max", "revision / daily step", cpu["revision"] / cpu["daily"]),
    ]
    return SectionResult(figures, targets)
