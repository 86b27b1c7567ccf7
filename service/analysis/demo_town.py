"""``casecloud demo --town``: a made-up influenza-like season in the invented town of Pellingwold.

The individual-based counterpart of the district demo: every particle is the
whole town of 20,000 people (households, schools, workplaces; the shipped
example ``pellingwold_flu``). A hidden "true" season is simulated person by
person from the same model with known transmission rates; its daily ED visits
with symptom onset (children; adults and seniors) are written as an NDJSON
feed and streamed through the service over the file transport, stopped
part-way and resumed from the checkpoints.

It ends with how well the estimates tracked the hidden town (the people still
susceptible and infectious now, per age band, and the transmission rates) and the
next commands, each runnable as printed: the report, the checkpoint, the
school-closure-against-household-quarantine scenarios from the cloud as it
stands, a backtest of the ED history and a short calibration trial.
"""

from __future__ import annotations

import datetime as dt
import sys
from pathlib import Path

import numpy as np
import orjson

from filters import IndividualModel, simulate_season
from schemas import example_individual_path, example_setting_scenarios_path, load_deployment_config, load_spec

from .demo import CONFIG_NAME, HISTORY_NAME, _start_afresh, first_next_commands, quoted_in, stream_with_a_restart

__all__ = ["TOWN_STREAM", "run_town_demo", "town_next_commands"]

TOWN_STREAM = "pellingwold-ed"
TOWN_START = dt.date(2025, 10, 6)
TOWN_MODEL = "pellingwold_flu"
TOWN_SCENARIOS = "pellingwold_schools_or_quarantine"
# Known truth (the filter is not told these); beta_community drifts in the model and starts here.
TRUE_PARAMS = {"beta_home": 0.45, "beta_school": 0.36, "beta_work": 0.20, "beta_community": 0.26, "rho": 0.20, "k": 20.0}
CALIBRATE_TRIAL = ("--particles", "40", "--iterations", "30", "--chains", "2", "--noise-repeats", "0")
CAUTION = (
    "Cautions: these are model-based estimates with stated uncertainty, for decision support only. "
    "Local public-health judgement and reporting rules prevail. casecloud handles aggregated counts only, "
    "never personal identifiers. The town, its people, feeds and epidemic are invented."
)


def town_config_toml(particles: int) -> str:
    """The deployment config of the town demo (relative paths, read from the file's own directory)."""
    return f"""\
# casecloud deployment config, written by `casecloud demo --town` for the invented town of Pellingwold.
# Relative paths below are read from this file's directory, not from where a command runs.
transport = "file"

[service]
seed = 7
checkpoint_dir = "checkpoints"
keep_checkpoints = 3

[metrics]
enabled = false

[file]
input = "observations.ndjson"
output_dir = "."

[[streams]]
id = "{TOWN_STREAM}"
# An individual-based model: each particle is the whole town, person by person (schemas/POPULATION.md).
model = "{TOWN_MODEL}"
start = "{TOWN_START.isoformat()}"
particles = {int(particles)}          # towns in the cloud: 1 byte per person each (20 kB per town)
forecast_trajectories = 40
forecast_horizon_days = 21

[[streams.alerts]]                  # P(ed_child > 10 on some day of the next 7)
name = "child_ed_surge"
series = "ed_child"
threshold = 10
horizon_days = 7
raise_level = 0.7
clear_level = 0.4
persistence = 2
"""


def _feed(observations, series: list[str]) -> list[bytes]:
    return [
        orjson.dumps({
            "stream": TOWN_STREAM,
            "period": (TOWN_START + dt.timedelta(days=o.time)).isoformat(),
            "counts": {s: int(o.values[s]) for s in series},
            "metadata": {"feed": "pellingwold-ed-daily"},
        })
        for o in observations
    ]


def _history(observations, series: list[str]) -> str:
    """The ED feed as a history CSV (``schemas.load_history``): period, then one column per series."""
    rows = ["period," + ",".join(series)]
    for o in observations:
        rows.append((TOWN_START + dt.timedelta(days=o.time)).isoformat() + "," + ",".join(str(int(o.values[s])) for s in series))
    return "\n".join(rows) + "\n"


def run_town_demo(out: Path, days: int = 84, particles: int = 1000, seed: int = 7, quiet: bool = False) -> str:
    """Run the town demo into ``out``; returns the readable summary (also written to summary.txt)."""
    out.mkdir(parents=True, exist_ok=True)
    _start_afresh(out)
    model = IndividualModel(load_spec(example_individual_path(TOWN_MODEL)))  # type: ignore[arg-type]
    truth = simulate_season(model, days, np.random.default_rng(seed), params=TRUE_PARAMS)
    series = [s.name for s in model.series]
    lines = _feed(truth.observations, series)
    (out / CONFIG_NAME).write_text(town_config_toml(particles), encoding="utf-8")
    (out / HISTORY_NAME).write_text(_history(truth.observations, series), encoding="utf-8")
    scenarios = example_setting_scenarios_path(TOWN_SCENARIOS)
    (out / scenarios.name).write_bytes(scenarios.read_bytes())
    config = load_deployment_config(out / CONFIG_NAME, environ={})
    seen = {"n": 0}

    def progress(outcome) -> None:
        seen["n"] += 1
        if not quiet and (seen["n"] % 10 == 0 or seen["n"] == len(lines)):
            print(f"  day {seen['n']}/{len(lines)}", file=sys.stderr, flush=True)

    if not quiet:
        print(f"casecloud demo --town: {days} days in Pellingwold (20,000 people), {particles} towns in the cloud -> {out}",
              file=sys.stderr)
    counts1, counts2, _ = stream_with_a_restart(config, out / "observations.ndjson", lines, progress, quiet, "more days arrive")
    summary = summarise_town(out, model, truth, counts1, counts2)
    (out / "summary.txt").write_text(summary, encoding="utf-8")
    return summary


def _covered(estimates: list[dict], name: str, truth: np.ndarray) -> tuple[int, int]:
    """Days whose 90 % interval of ``name`` holds the truth, of days estimated."""
    hits = total = 0
    for e in estimates:
        q = e["quantities"].get(name)
        if q is None:
            continue
        lo, hi = q["quantiles"]["0.05"], q["quantiles"]["0.95"]
        total += 1
        hits += lo <= truth[e["day"]] <= hi
    return hits, total


def summarise_town(out: Path, model: IndividualModel, truth, counts1: dict, counts2: dict) -> str:
    estimates = [orjson.loads(x) for x in (out / "estimates.ndjson").read_bytes().splitlines() if x]
    alerts = [orjson.loads(x) for x in (out / "alerts.ndjson").read_bytes().splitlines() if x]
    band = model.population.band
    states = truth.states  # (days + 1, people): each person's byte, day 0 first
    lines = [
        f"casecloud demo --town: Pellingwold (invented; {model.people:,} people in "
        f"{model.population.households.count:,} households), stream {TOWN_STREAM!r}, model {TOWN_MODEL}",
        f"  run 1: {counts1}; restarted from checkpoints, run 2: {counts2} (no history replayed)",
        f"  {len(estimates)} estimates, {len(alerts)} alert messages",
        "  90 % intervals holding the hidden town's value, over the days estimated:",
    ]
    for g, name in enumerate(model.groups):
        members = band == g
        ever = (states[:, members] != 255).sum(axis=1)  # not susceptible: infected at some time
        infectious = ((states[:, members] >= 127) & (states[:, members] < 253)).sum(axis=1)
        h1, t1 = _covered(estimates, f"S[{name}]", members.sum() - ever)
        h2, t2 = _covered(estimates, f"I[{name}]", infectious)
        lines.append(f"    {name:<7} susceptible {h1}/{t1}, infectious now {h2}/{t2}")
    last = estimates[-1]["quantities"] if estimates else {}
    lines.append("  transmission rates at the last day (truth: the filter was not told):")
    for p in ("beta_home", "beta_school", "beta_work", "beta_community"):
        q = last.get(p)
        if q is None:
            continue
        true = truth.params[-1, model.param_names.index(p)]
        g = q["quantiles"]
        lines.append(f"    {p:<15} {q['mean']:.3f} (90 %: {g['0.05']:.3f}-{g['0.95']:.3f}); truth {true:.3f}")
    r = last.get("R_eff")
    if r is not None:
        lines.append(f"  R_eff now: {r['mean']:.2f} (90 %: {r['quantiles']['0.05']:.2f}-{r['quantiles']['0.95']:.2f})")
    # The next commands close the output, so they are what a newcomer sees last.
    lines += ["", CAUTION, "", *town_next_commands(out)]
    return "\n".join(lines) + "\n"


def town_next_commands(out: Path) -> list[str]:
    """The closing lines: each runnable as printed from the directory the demo ran in."""
    path = quoted_in(out)
    config = path(CONFIG_NAME)
    return [
        *first_next_commands(out, "the cloud as saved"),
        "  # what if: schools closed, households of detected cases at home, or half attendance at work",
        f"  casecloud scenario --config {config} --stream {TOWN_STREAM} --scenarios {path(TOWN_SCENARIOS + '.toml')} "
        f"--trajectories 200 --out {path('scenarios')}",
        "  # how good the forecasts and alerts were: replay the ED history, score against baselines",
        f"  casecloud backtest --config {config} --history {path(HISTORY_NAME)} --stream {TOWN_STREAM} "
        f"--trajectories 40 --out {path('backtest')}",
        "  # fit the static transmission rates and reporting by PMMH: a short trial (a real fit runs far longer)",
        f"  casecloud calibrate --model {TOWN_MODEL} --history {path(HISTORY_NAME)} --start {TOWN_START.isoformat()} "
        f"{' '.join(CALIBRATE_TRIAL)} --out {path('calibration')}",
    ]
