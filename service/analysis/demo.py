"""``casecloud demo``: a made-up season in the fictional Brackenford district.

A hidden "true" epidemic is simulated from the two-band SEIR example; its
daily emergency-department visit counts (children, adults) are written as an
NDJSON feed and streamed day by day through the same service code the Kafka
deployment uses, over the file transport. The service is stopped part-way and
restarted, resuming from its checkpoints without replaying history. The demo
ends with a short comparison of the estimates against the hidden truth.

Beside the service's outputs it leaves what the other commands need:
``deployment.toml`` (the deployment config it ran with; relative paths, read
from the file's own directory, so it works from any working directory),
``history.csv`` (the clean feed in the history CSV format) and a copy of the
example scenario file. Its closing lines are the next commands (report,
checkpoint show, scenario, backtest, calibrate), each runnable as printed from
the directory the demo ran in.
"""

from __future__ import annotations

import asyncio
import datetime as dt
import shlex
import sys
from pathlib import Path

import numpy as np
import orjson

from filters import CompartmentalModel, simulate_season
from schemas import DeploymentConfig, example_model_path, load_model_spec

from ..runtime.app import Service
from ..runtime.processor import Outcome
from ..transports import FileTransport

__all__ = ["run_demo", "DEMO_STREAM", "CAUTION"]

DEMO_STREAM = "brackenford-ed-ili"
DEMO_START = dt.date(2025, 9, 1)
CAUTION = (
    "Cautions: these are model-based estimates with stated uncertainty, for decision support only. "
    "Local public-health judgement and reporting rules prevail. casecloud handles aggregated counts only, "
    "never personal identifiers. The demo district, feed and epidemic are invented."
)
# Known truth for the demo (the filter is not told these).
TRUE_PARAMS = {"beta": 0.20, "rho": 0.12, "k": 25.0}


CONFIG_NAME = "deployment.toml"
HISTORY_NAME = "history.csv"
SCENARIO_EXAMPLE = "brackenford_schools"
# The calibrate command the demo prints: a short trial (about half a minute on
# the default 120 days); the command's own defaults run far longer.
CALIBRATE_TRIAL = ("--particles", "200", "--iterations", "60", "--chains", "2", "--noise-repeats", "5")


def demo_config_toml(particles: int) -> str:
    """The deployment config the demo runs with, as the TOML file it writes beside its outputs.

    Paths are relative, and the loader reads relative paths from the config
    file's own directory: the file works from any working directory and keeps
    working when the whole demo directory is moved or copied.
    """
    return f"""\
# casecloud deployment config, written by `casecloud demo` for the fictional Brackenford district.
# The demo ran with exactly this file. Edit it and give its path to any command that takes --config
# (serve, replay, scenario, checkpoint, backtest). `casecloud serve --config <this file> --exit-at-end`,
# run from the directory the demo ran in, picks the feed up after the last record the cloud has seen
# (append days to observations.ndjson first): the file transport keys its position by the input path
# as the command sees it.
# Relative paths below are read from this file's directory, not from where a command runs.
transport = "file"                  # "kafka" reads and publishes through a broker ([kafka] table)

[service]
seed = 7                            # each stream's random numbers derive from (seed, stream id)
checkpoint_dir = "checkpoints"      # one sub-directory per stream; the last keep_checkpoints kept
keep_checkpoints = 3

[metrics]
enabled = false                     # true: Prometheus /metrics, /healthz and /readyz on 127.0.0.1:9464

[file]
input = "observations.ndjson"       # the feed: one observation message per line
output_dir = "."                    # estimates.ndjson, alerts.ndjson, dead_letters.ndjson, committed.json

[[streams]]
id = "{DEMO_STREAM}"
model = "seir_two_band"             # a shipped example model, or the path of a model spec TOML
start = "{DEMO_START.isoformat()}"                # calendar date of model day 0
particles = {int(particles)}
forecast_trajectories = 400

[[streams.alerts]]                  # P(ed_child > 40 on some day of the next 7) with hysteresis
name = "child_ed_surge"
series = "ed_child"
threshold = 40
horizon_days = 7
raise_level = 0.7
clear_level = 0.4
persistence = 2
"""


def _history_csv(model, observations, days: int) -> str:
    """The clean feed as a history CSV (``schemas.load_history``): period, then one column per series."""
    series = [s.name for s in model.series]
    rows = ["period," + ",".join(series)]
    for obs in observations[:days]:
        period = (DEMO_START + dt.timedelta(days=obs.time)).isoformat()
        rows.append(period + "," + ",".join("" if obs.values.get(name) is None else str(int(obs.values[name])) for name in series))
    return "\n".join(rows) + "\n"


def _feed_lines(observations, days: int) -> list[bytes]:
    lines = []
    for obs in observations[:days]:
        period = (DEMO_START + dt.timedelta(days=obs.time)).isoformat()
        counts = {k: int(v) for k, v in obs.values.items()}
        lines.append(orjson.dumps({"stream": DEMO_STREAM, "period": period, "counts": counts, "metadata": {"feed": "brackenford-ed-daily"}}))
    return lines


def _with_mistakes(lines: list[bytes]) -> list[bytes]:
    """A real feed is not clean: one truncated line, one negative count, one re-sent day."""
    out = list(lines)
    # Short feeds (``--days`` below 46) get the mistakes that fit.
    if len(lines) >= 20:
        out.insert(20, lines[19][: len(lines[19]) // 2])
    if len(lines) >= 31:
        bad = orjson.loads(lines[30])
        bad["counts"]["ed_child"] = -3
        out.insert(31, orjson.dumps(bad))
    resent = min(46, len(out))
    if resent:
        out.insert(resent, out[resent - 1])
    return out


async def _run_service(config: DeploymentConfig, progress) -> dict[str, int]:
    transport = FileTransport(config.file.input, config.file.output_dir)
    service = Service(config, transport, today=lambda: DEMO_START + dt.timedelta(days=400), on_outcome=progress)
    return await service.run(until_exhausted=True)


def _start_afresh(out: Path) -> None:
    """Remove what an earlier demo (or the commands it suggested) left in ``out`` that this run would contradict."""
    for name in ("observations.ndjson", "estimates.ndjson", "alerts.ndjson", "dead_letters.ndjson", "committed.json"):
        (out / name).unlink(missing_ok=True)
    ckpt = out / "checkpoints"
    if ckpt.exists():
        for f in sorted(ckpt.rglob("*"), reverse=True):
            f.unlink() if f.is_file() else f.rmdir()
    # The suggested calibrate run resumes from its saved chains; chains of another feed
    # (a different --days or --seed) would be refused, so they go with the old feed.
    calibration = out / "calibration"
    if calibration.is_dir():
        for f in [calibration / "pmmh_state.json", *calibration.glob("pmmh_*.npy")]:
            f.unlink(missing_ok=True)


def run_demo(out: Path, days: int = 120, particles: int = 2000, seed: int = 7, quiet: bool = False) -> str:
    """Run the demo into ``out``; returns the readable summary (also written to summary.txt).

    Besides the service's outputs, ``out`` receives the deployment config the
    demo ran with (``deployment.toml``), the feed as a history CSV
    (``history.csv``) and a copy of the example scenario file, so that every
    command listed at the end runs as printed on these files.
    """
    from schemas import example_scenario_path, load_deployment_config

    out.mkdir(parents=True, exist_ok=True)
    _start_afresh(out)
    model = CompartmentalModel(load_model_spec(example_model_path("seir_two_band")))
    truth = simulate_season(model, days, np.random.default_rng(seed), params=TRUE_PARAMS)
    lines = _with_mistakes(_feed_lines(truth.observations, days))
    (out / CONFIG_NAME).write_text(demo_config_toml(particles), encoding="utf-8")
    (out / HISTORY_NAME).write_text(_history_csv(model, truth.observations, days), encoding="utf-8")
    scenario = example_scenario_path(SCENARIO_EXAMPLE)
    (out / scenario.name).write_bytes(scenario.read_bytes())
    # The demo runs with the file it wrote; environment overrides (e.g.
    # CASECLOUD_CHECKPOINT_DIR) are not applied, so it stays inside ``out``.
    config = load_deployment_config(out / CONFIG_NAME, environ={})
    first = len(lines) * 3 // 5
    seen = {"n": 0}

    def progress(outcome: Outcome) -> None:
        seen["n"] += 1
        if not quiet and (seen["n"] % 25 == 0 or seen["n"] == len(lines)):
            print(f"  record {seen['n']}/{len(lines)}", file=sys.stderr, flush=True)

    feed = out / "observations.ndjson"
    feed.write_bytes(b"\n".join(lines[:first]) + b"\n")
    if not quiet:
        print(f"casecloud demo: {days} days of made-up ED visits, {particles} particles -> {out}", file=sys.stderr)
    counts1 = asyncio.run(_run_service(config, progress))
    if not quiet:
        print("  (service stopped; more data arrives; restarting from checkpoints)", file=sys.stderr)
    with open(feed, "ab") as f:
        f.write(b"\n".join(lines[first:]) + b"\n")
    counts2 = asyncio.run(_run_service(config, progress))
    summary = summarise_demo(out, model, truth, counts1, counts2)
    (out / "summary.txt").write_text(summary, encoding="utf-8")
    return summary


def summarise_demo(out: Path, model, truth, counts1: dict, counts2: dict) -> str:
    estimates = [orjson.loads(line) for line in (out / "estimates.ndjson").read_bytes().splitlines() if line]
    alerts = [orjson.loads(line) for line in (out / "alerts.ndjson").read_bytes().splitlines() if line]
    dead = [orjson.loads(line) for line in (out / "dead_letters.ndjson").read_bytes().splitlines() if line]
    lines = [
        "casecloud demo: Brackenford district (fictional), ED visits for influenza-like illness",
        "=" * 78,
        f"records: first run applied {counts1['applied']}, skipped {counts1['skipped']}, dead-lettered {counts1['dead_letter']};",
        f"         after restart applied {counts2['applied']}, skipped {counts2['skipped']}, dead-lettered {counts2['dead_letter']}",
        f"dead letters: {', '.join(sorted(d['reason'] for d in dead)) or 'none'}",
        "",
        "How well the cloud tracked the hidden truth (90% interval = 5%..95% posterior quantiles):",
        f"{'quantity':<14}{'days covered by 90% interval':>30}{'mean |error| of median':>26}",
    ]
    for comp in ("E", "I"):
        for g, gname in enumerate(model.groups):
            name = f"{comp}[{gname}]"
            c = model.compartments.index(comp)
            hits, errs = 0, []
            for e in estimates:
                true = truth.states[e["day"], g, c]
                q = e["quantities"][name]["quantiles"]
                hits += q["0.05"] <= true <= q["0.95"]
                errs.append(abs(q["0.5"] - true))
            lines.append(f"{name:<14}{f'{hits}/{len(estimates)} ({100 * hits / len(estimates):.0f}%)':>30}{np.mean(errs):>26.1f}")
    beta_idx = model.param_names.index("beta")
    last = estimates[-1]
    lines += [
        "",
        f"transmission rate beta at the end: truth {truth.params[last['day'], beta_idx]:.3f}, "
        f"estimate {last['quantities']['beta']['quantiles']['0.5']:.3f} "
        f"(90%: {last['quantities']['beta']['quantiles']['0.05']:.3f}-{last['quantities']['beta']['quantiles']['0.95']:.3f})",
        f"effective reproduction number at the end: {last['quantities']['R_eff']['quantiles']['0.5']:.2f} "
        f"(90%: {last['quantities']['R_eff']['quantiles']['0.05']:.2f}-{last['quantities']['R_eff']['quantiles']['0.95']:.2f})",
        f"alerts published: {len(alerts)} ("
        + ", ".join(f"{a['status']} on {a['period']} p={a['probability']:.2f}" for a in alerts)
        + ")",
        f"outputs in {out}/: estimates.ndjson, alerts.ndjson, dead_letters.ndjson, checkpoints/ (the service's);",
        f"  {CONFIG_NAME} (the deployment config this run used: edit it, pass it to serve, replay, scenario, checkpoint,",
        f"  backtest), {HISTORY_NAME} (the feed as a history CSV), {SCENARIO_EXAMPLE}.toml (example intervention scenarios)",
        "",
        CAUTION,
        "",
        *next_commands(out),
    ]
    return "\n".join(lines) + "\n"


def next_commands(out: Path) -> list[str]:
    """The closing lines: what to run next, each command runnable as printed from the
    directory the demo ran in (paths are ``out`` as given, quoted for a POSIX shell)."""
    d = str(out)

    def path(name: str) -> str:
        return shlex.quote(str(Path(d) / name))

    config = path(CONFIG_NAME)
    return [
        "Next, from the directory you ran the demo in (each line runs as printed):",
        "  # pictures: an HTML page of the estimates, forecasts, alerts and feed",
        f"  casecloud report --estimates {path('estimates.ndjson')} --alerts {path('alerts.ndjson')} "
        f"--observations {path('observations.ndjson')} --out {path('report')}",
        "  # the cloud as saved: step, period, particles, effective sample size, alert states (--json: everything)",
        f"  casecloud checkpoint show --config {config}",
        "  # what if: school closure and vaccination scenarios from the cloud as it stands, against no change",
        f"  casecloud scenario --config {config} --stream {DEMO_STREAM} --scenarios {path(SCENARIO_EXAMPLE + '.toml')} "
        f"--out {path('scenarios')}",
        "  # how good the forecasts and alerts were: replay the history through the service, score against baselines",
        f"  casecloud backtest --config {config} --history {path(HISTORY_NAME)} --stream {DEMO_STREAM} --out {path('backtest')}",
        "  # fit the model's static parameters to the history: a short trial (about half a minute; its diagnostics",
        "  # will ask for more: a real fit uses the defaults and runs far longer)",
        f"  casecloud calibrate --model seir_two_band --history {path(HISTORY_NAME)} --start {DEMO_START.isoformat()} "
        f"{' '.join(CALIBRATE_TRIAL)} --out {path('calibration')}",
    ]


def cmd_demo(args) -> int:
    summary = run_demo(Path(args.out), days=args.days, particles=args.particles, seed=args.seed, quiet=args.quiet)
    print(summary)
    return 0


def add_demo_parser(sub) -> None:
    demo = sub.add_parser("demo", help="run a made-up season end to end over the file transport (no broker)")
    demo.add_argument("--out", default="casecloud-demo", help="output directory (default: ./casecloud-demo)")
    demo.add_argument("--days", type=int, default=120, help="days to simulate (default 120)")
    demo.add_argument("--particles", type=int, default=2000, help="particles in the cloud (default 2000)")
    demo.add_argument("--seed", type=int, default=7, help="seed of the hidden truth (default 7)")
    demo.add_argument("--quiet", action="store_true", help="no progress lines")
    demo.set_defaults(handler=cmd_demo)
