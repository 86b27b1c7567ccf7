"""``casecloud scenario``: "what if we intervene", from where a stream's epidemic really is.

Reads the stream's newest intact checkpoint from the deployment's checkpoint
store (read-only: nothing is written, renamed or pruned), runs the baseline and
every scenario of a scenario file with common random numbers
(:func:`filters.run_scenarios`), prints one table row per scenario and, with
``--out``, writes:

``scenarios.json``
    everything: the run (stream, checkpoint, origin, horizon, seed, ...) and
    every scenario's outcomes (``filters.ScenarioReport.as_dict``).
``scenarios.csv``
    the same outcomes in long format: scenario, metric, mean, low, median, high.
``scenarios_daily.csv``
    per scenario, day ahead and quantity (each reported series and
    ``latent.infections``): mean and quantiles across trajectories.

Exit status: 0 done; 2 unusable arguments, config or scenario file; 1 the
stream has no usable checkpoint.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import sys
from pathlib import Path
from typing import Any

import orjson

__all__ = ["format_scenario_table", "run_scenario_command", "write_scenario_outputs"]

DEFAULT_HORIZON = 28


def _fail(message: str, code: int) -> int:
    print(f"casecloud scenario: {message}", file=sys.stderr)
    return code


def _count(x: float) -> str:
    return f"{x:.0f}"


def _cell(interval: Any, fmt=_count) -> str:
    if interval is None:
        return "-"
    return f"{fmt(interval.median)} [{fmt(interval.low)}, {fmt(interval.high)}]"


def _prob(p: Any) -> str:
    return f"{p.p:.2f} [{p.low:.2f}, {p.high:.2f}]"


def format_scenario_table(report: Any, meta: dict[str, Any]) -> str:
    """The human-readable table: one row per scenario, then notes and the cautions."""
    pct = round((report.levels[2] - report.levels[0]) * 100)
    cases = " + ".join(report.cases_series) if report.cases_series else "(none)"
    unit = "week" if report.cases_cadence == "weekly" else "day"
    lines = [
        f"casecloud scenario: stream {meta['stream']!r} (model {meta['model']}), checkpoint step {meta['checkpoint_step']} "
        f"({meta['checkpoint']})",
        f"  forecast origin: model day {report.start}"
        + (f" ({meta['origin_date']})" if meta.get("origin_date") else "")
        + f"; horizon {report.horizon} days; {report.n_trajectories} trajectories per scenario; seed {report.seed}",
        f"  cases = reported {cases}, summed over the horizon; infections = new infections (latent), all groups",
        f"  each cell: median [{pct}% interval] across trajectories; averted = baseline minus scenario, paired "
        f"per trajectory (common random numbers); P(...) = exceedance probability [{pct}% Monte Carlo interval]",
        "",
    ]
    header = ["scenario", "infections", "cases", f"peak cases/{unit}", "peak day", *[f"P({c.key})" for c in report.thresholds], "cases averted"]
    rows = [header]
    for o in report.outcomes:
        rows.append(
            [
                o.name,
                _cell(o.infections),
                _cell(o.cases),
                _cell(o.peak),
                _cell(o.peak_day),
                *[_prob(o.exceedance[c.key]) for c in report.thresholds],
                _cell(o.averted_cases),
            ]
        )
    widths = [max(len(r[i]) for r in rows) for i in range(len(header))]
    for k, r in enumerate(rows):
        lines.append("  " + "  ".join(v.ljust(w) if i == 0 else v.rjust(w) for i, (v, w) in enumerate(zip(r, widths))).rstrip())
        if k == 0:
            lines.append("  " + "  ".join("-" * w for w in widths))
    lines.append("")
    for o in report.outcomes[1:]:
        what = "; ".join(o.interventions) if o.interventions else "no change"
        lines.append(f"  {o.name}: {what}")
    for note in report.notes:
        lines.append(f"  note: {note}")
    lines.append(f"  Caution: {_caution()}")
    return "\n".join(lines)


def _caution() -> str:
    from filters import CAUTION

    return CAUTION


def write_scenario_outputs(report: Any, meta: dict[str, Any], out: Path) -> list[Path]:
    """scenarios.json, scenarios.csv and scenarios_daily.csv under ``out`` (created if needed)."""
    out.mkdir(parents=True, exist_ok=True)
    document = {"run": meta, **report.as_dict()}
    paths = [out / "scenarios.json", out / "scenarios.csv", out / "scenarios_daily.csv"]
    paths[0].write_bytes(orjson.dumps(document, option=orjson.OPT_INDENT_2) + b"\n")
    for path, rows, columns in (
        (paths[1], report.rows(), ["scenario", "metric", "mean", "low", "median", "high"]),
        (paths[2], report.daily(), ["scenario", "day_ahead", "model_day", "quantity", "mean", "low", "median", "high"]),
    ):
        with path.open("w", newline="", encoding="utf-8") as handle:
            writer = csv.DictWriter(handle, fieldnames=columns, lineterminator="\n")
            writer.writeheader()
            for row in rows:
                writer.writerow({k: ("" if row[k] is None else row[k]) for k in columns})
    return paths


def _checkpoint_store(config: Any, local: Any) -> tuple[Any, str]:
    """The store the deployment's checkpoints live in, and a description of where.

    A local directory is read with ``LocalCheckpointStore`` (``load_latest``
    only reads). A deployment whose ``[service] checkpoint_store`` selects
    another store uses the service's own factory for it.
    """
    settings = config.service
    kind = getattr(settings, "checkpoint_store", "local")
    if kind != "local":
        from ..state import build_checkpoint_store

        return build_checkpoint_store(config), f"checkpoint store {kind!r} ({getattr(settings, 'checkpoint_topic', '')})"
    return local(settings.checkpoint_dir, keep=settings.keep_checkpoints), str(settings.checkpoint_dir)


def run_scenario_command(args: argparse.Namespace) -> int:
    """Entry point of ``casecloud scenario``."""
    from filters import ParticleFilter, build_model, run_scenarios
    from schemas import IndividualModelSpec, SpecError, load_deployment_config, load_scenario_file, load_setting_scenarios

    from ..runtime.streams import load_stream_model
    from ..state import CheckpointError, LocalCheckpointStore

    if args.trajectories < 1:
        return _fail(f"--trajectories must be >= 1, got {args.trajectories}", 2)
    if args.horizon is not None and not 1 <= args.horizon <= 365:
        return _fail(f"--horizon must be between 1 and 365 days, got {args.horizon}", 2)
    if args.seed is not None and args.seed < 0:
        return _fail(f"--seed must be >= 0, got {args.seed}", 2)
    try:
        config = load_deployment_config(args.config)
    except SpecError as exc:
        return _fail(str(exc), 2)
    streams = {s.id: s for s in config.streams}
    stream = streams.get(args.stream)
    if stream is None:
        return _fail(f"stream {args.stream!r} is not in {args.config}; allowed: {sorted(streams)}", 2)
    try:
        spec = load_stream_model(stream)
    except (SpecError, ValueError) as exc:
        return _fail(f"stream {stream.id!r}: model {stream.model!r} is unusable: {exc}", 2)
    individual = False
    try:
        model = build_model(spec, window_days=stream.assimilation_window_days)
        individual = isinstance(spec, IndividualModelSpec)
        if individual:  # interventions act on the town's settings
            scenario_file = load_setting_scenarios(args.scenarios, spec)
        else:
            scenario_file = load_scenario_file(args.scenarios, spec)
    except SpecError as exc:
        if individual:
            return _fail(f"stream {stream.id!r} is individual-based: its scenario file takes interventions on settings "
                         f"(close, attendance, community, household_quarantine; see schemas/POPULATION.md)\n{exc}", 2)
        return _fail(str(exc), 2)
    except ValueError as exc:
        return _fail(f"stream {stream.id!r}: model {stream.model!r} is unusable: {exc}", 2)

    store, root = _checkpoint_store(config, LocalCheckpointStore)
    try:
        loaded = store.load_latest(stream.id, expected_fingerprint=model.fingerprint())
    except CheckpointError as exc:
        return _fail(str(exc), 1)
    finally:
        close = getattr(store, "close", None)
        if close is not None:
            close()
    if loaded is None:
        where = f" (looked in {store.stream_dir(stream.id)})" if isinstance(store, LocalCheckpointStore) else ""
        return _fail(
            f"stream {stream.id!r} has no checkpoint under {root}{where}; "
            "run the service or `casecloud replay` on its observations first",
            1,
        )
    for path, reason in loaded.skipped:
        print(f"casecloud scenario: warning: skipped corrupt checkpoint {path}: {reason}", file=sys.stderr)
    checkpoint = loaded.checkpoint
    try:
        pf = ParticleFilter.from_state(model, checkpoint.header["filter"], dict(checkpoint.arrays))
    except (KeyError, TypeError, ValueError) as exc:
        return _fail(f"checkpoint {loaded.path} cannot be read as stream {stream.id!r}'s cloud: {exc}", 1)

    horizon = args.horizon or scenario_file.horizon_days or getattr(stream, "forecast_horizon_days", DEFAULT_HORIZON)
    seed = config.service.seed if args.seed is None else args.seed
    thresholds = [(r.series, r.threshold, min(r.horizon_days, horizon)) for r in stream.alerts]
    try:
        report = run_scenarios(
            model, pf.particles, pf.weights(), pf.time, scenario_file, horizon, args.trajectories, seed, thresholds
        )
    except ValueError as exc:  # e.g. an alert rule of the stream watching a series the model lacks
        return _fail(f"cannot run the scenarios of {args.scenarios} for stream {stream.id!r}: {exc}", 2)

    meta = {
        "stream": stream.id,
        "model": model.spec.name,
        "model_fingerprint": model.fingerprint(),
        "checkpoint": str(loaded.path),
        "checkpoint_step": checkpoint.step,
        "last_period": checkpoint.header.get("last_period"),
        "origin_date": (stream.start + dt.timedelta(days=pf.time)).isoformat(),
        "scenario_file": str(args.scenarios),
        "thresholds_from_alert_rules": [r.name for r in stream.alerts],
    }
    print(format_scenario_table(report, meta))
    if args.out:
        for path in write_scenario_outputs(report, meta, Path(args.out)):
            print(f"  wrote {path}")
    return 0


def add_scenario_parser(sub: Any) -> None:
    """Register ``casecloud scenario`` on the CLI's sub-parsers."""
    p = sub.add_parser(
        "scenario",
        help="compare intervention scenarios from a stream's newest checkpoint (read-only)",
        description="Forecast a stream from its newest checkpoint under the baseline (no change) and every "
        "scenario of a scenario file, with common random numbers, and compare them.",
    )
    p.add_argument("--config", required=True, help="deployment config TOML (its checkpoint_dir and streams)")
    p.add_argument("--stream", required=True, help="stream id")
    p.add_argument(
        "--scenarios",
        required=True,
        help="scenario TOML file (see schemas/scenarios/); for an individual-based stream, a file of interventions "
        "on settings (see schemas/POPULATION.md)",
    )
    p.add_argument("--trajectories", type=int, default=2000, help="simulated futures per scenario (default 2000)")
    p.add_argument(
        "--horizon", type=int, help="days ahead (default: the file's horizon_days, else the stream's forecast_horizon_days)"
    )
    p.add_argument("--seed", type=int, help="seed of the common random numbers (default: the deployment seed)")
    p.add_argument("--out", help="directory for scenarios.json, scenarios.csv and scenarios_daily.csv")
    p.set_defaults(handler=run_scenario_command)
