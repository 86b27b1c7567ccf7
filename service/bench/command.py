"""``casecloud bench``: the section registry, the report and the command.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
from collections.abc import Callable
from typing import Any

import numpy as np
import orjson

from ..console import Progress
from .common import SectionResult
from .feeds import bench_feeds
from .fleet import bench_fleet
from .forecast import bench_forecast
from .individual import bench_individual
from .update import bench_update

BENCH_FORMAT = 1
# Further workloads register here.
def _bench_service(**kwargs: Any) -> SectionResult:
    from .end_to_end import bench_service

    return bench_service(**kwargs)


def _bench_service_feeds(**kwargs: Any) -> SectionResult:
    from .end_to_end import bench_service

    return bench_service(feeds=3, **kwargs)


SECTIONS: dict[str, Callable[..., SectionResult]] = {
    "update": bench_update,
    "service": _bench_service,
    "forecast": bench_forecast,
    "feeds": bench_feeds,
    "service_feeds": _bench_service_feeds,
    "individual": bench_individual,
    "fleet": bench_fleet,  # not in the default set: minutes, a broker and two serve processes
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
    shown: Progress | None = None,
) -> dict[str, Any]:
    """Run the named sections and return one JSON-able report.

    ``options`` maps a section name to extra keyword arguments of its function
    (e.g. ``{"update": {"naive_particles": 50, "warmup_days": 5}}``).
    ``progress(message)`` receives the sections' messages; ``shown``, if given,
    counts finished sections, with the section and its latest message as the note.
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
    for done, name in enumerate(sections):
        extra = (options or {}).get(name, {})
        say = progress
        if shown is not None:
            shown.update(done, len(sections), note=name)

            def say(message: str, name: str = name, done: int = done) -> None:
                shown.update(done, note=message if message.startswith(f"{name}:") else f"{name}: {message}")
                if progress is not None:
                    progress(message)

        try:
            result = SECTIONS[name](particles=particles, repeats=repeats, progress=say, **extra)
        except Exception as exc:  # a section that cannot run is reported, not hidden
            report[name] = {"error": f"{type(exc).__name__}: {exc}"}
            targets[f"{name}.ran"] = {"value": 0.0, "min": 1.0, "pass": False, "note": "section failed to run"}
            continue
        finally:
            if shown is not None:
                shown.update(done + 1, note=f"{name} finished")
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
    sections = tuple(x for x in getattr(args, "sections", "update").split(",") if x)
    options: dict[str, dict[str, Any]] = {}
    if getattr(args, "kafka_bootstrap", None):
        options["service"] = {"bootstrap": args.kafka_bootstrap}
        options["service_feeds"] = {"bootstrap": args.kafka_bootstrap}
        options["fleet"] = {"bootstrap": args.kafka_bootstrap}
    fleet = {key: getattr(args, f"fleet_{name}") for name, key in (("streams", "streams"), ("particles", "stream_particles"),
             ("rounds", "rounds")) if getattr(args, f"fleet_{name}", None) is not None}
    if fleet:
        options.setdefault("fleet", {}).update(fleet)
    try:
        with Progress("bench", len(sections), "sections") as shown:
            report = run_bench(particles=particles, repeats=repeats, sections=sections, options=options, shown=shown)
    except ValueError as exc:
        print(f"casecloud bench: {exc}", file=sys.stderr)
        return 2
    if as_json:
        print(orjson.dumps(report, option=orjson.OPT_INDENT_2 | orjson.OPT_SERIALIZE_NUMPY).decode())
    else:
        print(format_report(report))
    return 1 if any(isinstance(report.get(n), dict) and "error" in report[n] for n in sections) else 0


def add_bench_parser(sub) -> None:
    bench = sub.add_parser("bench", help="measure update speed and memory against in-process baselines")
    bench.add_argument("--json", action="store_true", help="print the figures as JSON")
    bench.add_argument("--particles", type=int, default=10_000, help="particles in the reference workload")
    bench.add_argument("--repeats", type=int, default=5, help="timed repetitions per figure (median reported)")
    bench.add_argument(
        "--sections",
        default="update,service,forecast,feeds",
        help="comma-separated workloads: update (filter step vs floor and naive loop), "
        "service (end to end through Kafka vs the engine alone), forecast (3 intervention scenarios "
        "with common random numbers vs their binomial floor), feeds (a late value and a revision vs "
        "a daily step), service_feeds (the service section with three feeds per stream), individual (one "
        "daily step of 1,000 towns of 20,000 people vs its floors), fleet (a daily "
        "round of many streams through two serve processes over Kafka; takes minutes, not in the default); "
        "default: update,service,forecast,feeds",
    )
    bench.add_argument("--kafka-bootstrap", help="service, service_feeds and fleet sections: use this broker instead of starting a local one")
    bench.add_argument("--fleet-streams", type=int, default=None, help="fleet section: streams (default 3000)")
    bench.add_argument("--fleet-particles", type=int, default=None, help="fleet section: particles per stream (default 2000)")
    bench.add_argument("--fleet-rounds", type=int, default=None, help="fleet section: daily rounds, the last one timed (default 2)")
    bench.set_defaults(handler=run_bench_command)
