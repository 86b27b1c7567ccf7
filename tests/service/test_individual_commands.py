"""The analyst's commands on an individual-based stream: ``scenario``, ``report``
(from a checkpoint) and ``calibrate``, as a user runs them.

The stream's checkpoints come from ``casecloud replay`` of a season simulated
from the same small town model, so every command reads what the service wrote.
"""

from __future__ import annotations

import csv
import datetime as dt
import math
from pathlib import Path

import numpy as np
import orjson
import pytest

from filters import IndividualModel, simulate_season
from schemas import load_spec
from service import cli

STREAM = "thornby.ed"
START = dt.date(2026, 9, 6)
DAYS = 30

TOWN = """
name = "thornby"
seed = 41
size = 1200
bands = [{ name = "child", share = 0.3 }, { name = "adult", share = 0.7 }]
[households]
size = { dist = "discrete", values = [1, 2, 3, 4], weights = [0.25, 0.35, 0.25, 0.15] }
head_bands = ["adult"]
[[settings]]
name = "school"
size = 90
members = { child = 0.95 }
"""

MODEL = """
kind = "individual"
name = "thornby_flu"
population = "thornby_town.toml"
[transmission]
household = 0.45
community = "beta"
importation = 0.3
settings = { school = "beta_school" }
[disease]
latent = { dist = "discrete", days = [1, 2], weights = [0.5, 0.5] }
infectious = { dist = "gamma", mean = 3.0, sd = 1.0, max_days = 7 }
[parameters.beta]
kind = "drifting"
prior = { dist = "lognormal", mean_log = -1.2, sd_log = 0.2 }
volatility = 0.03
[parameters.beta_school]
kind = "static"
prior = { dist = "lognormal", mean_log = -1.0, sd_log = 0.3 }
[parameters.rho]
kind = "static"
prior = { dist = "beta", a = 8.0, b = 12.0 }
[initial]
exposed = { dist = "uniform", low = 3, high = 10 }
[[series]]
name = "ed"
kind = "incidence"
flow = "onset"
reporting = "rho"
noise = { dist = "poisson" }
"""

CONFIG = f"""\
transport = "file"
[service]
seed = 11
checkpoint_dir = "ck"
[metrics]
enabled = false
[[streams]]
id = "{STREAM}"
model = "thornby_flu.toml"
start = "{START.isoformat()}"
particles = 120
forecast_trajectories = 20
[[streams.alerts]]
name = "ed_high"
series = "ed"
threshold = 12
horizon_days = 7
"""

SCENARIOS = """
horizon_days = 21
[[scenarios]]
name = "unchanged"
description = "Community contacts times one: the same epidemic as the baseline."
[[scenarios.interventions]]
kind = "community"
factor = 1.0
[[scenarios]]
name = "shut_in"
description = "School closed, no community contacts, no imports spared: households only."
[[scenarios.interventions]]
kind = "close"
setting = "school"
[[scenarios.interventions]]
kind = "community"
factor = 0.0
"""


@pytest.fixture(scope="module")
def town(tmp_path_factory) -> Path:
    """A deployment whose individual-based stream was replayed over a simulated season."""
    root = tmp_path_factory.mktemp("individual-commands")
    (root / "thornby_town.toml").write_text(TOWN, encoding="utf-8")
    (root / "thornby_flu.toml").write_text(MODEL, encoding="utf-8")
    (root / "casecloud.toml").write_text(CONFIG, encoding="utf-8")
    (root / "scenarios.toml").write_text(SCENARIOS, encoding="utf-8")
    model = IndividualModel(load_spec(root / "thornby_flu.toml"))
    season = simulate_season(model, DAYS, np.random.default_rng(9), params={"beta": 0.35, "beta_school": 0.4, "rho": 0.4})
    feed, rows = [], ["period,ed"]
    for obs in season.observations:
        period = (START + dt.timedelta(days=obs.time)).isoformat()
        feed.append(orjson.dumps({"stream": STREAM, "period": period, "counts": {"ed": int(obs.values["ed"])}}))
        rows.append(f"{period},{int(obs.values['ed'])}")
    (root / "feed.ndjson").write_bytes(b"\n".join(feed) + b"\n")
    (root / "history.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    assert sum(int(r.split(",")[1]) for r in rows[1:]) > 20, "the simulated season should have an epidemic to replay"
    code = cli.main(["replay", "--config", str(root / "casecloud.toml"), "--input", str(root / "feed.ndjson"), "--out", str(root / "out")])
    assert code == 0
    return root


def test_scenario_runs_setting_interventions_from_the_streams_checkpoint(town, capsys):
    """Bugs caught: the command refusing (or mis-reading) an individual-based stream; the
    scenarios not paired with the baseline (a do-nothing scenario must reproduce the
    baseline trajectory for trajectory: tried, drawing the quarantine's detections from
    the model's generator would break that if a quarantine were in force); interventions
    that never reach the step (shut_in would then avert nothing)."""
    code = cli.main(["scenario", "--config", str(town / "casecloud.toml"), "--stream", STREAM,
                     "--scenarios", str(town / "scenarios.toml"), "--trajectories", "150", "--out", str(town / "scen")])
    out = capsys.readouterr().out
    assert code == 0, out
    assert "baseline" in out and "unchanged" in out and "shut_in" in out and "school closed" in out
    assert "P(ed>12 within 7d)" in out and "Caution" in out
    doc = orjson.loads((town / "scen" / "scenarios.json").read_bytes())
    by = {o["name"]: o for o in doc["scenarios"]}
    assert doc["run"]["model"] == "thornby_flu" and doc["horizon"] == 21
    # Common random numbers: a factor of exactly 1 changes no draw, so every summary is the baseline's.
    for key in ("infections", "cases", "peak", "peak_day"):
        assert by["unchanged"][key] == by["baseline"][key], key
    assert by["unchanged"]["averted_infections"] == {"mean": 0.0, "low": 0.0, "median": 0.0, "high": 0.0}
    # Households only: every trajectory with a case in progress loses the school and community
    # infections it would have had; the paired mean must be clearly positive.
    assert by["shut_in"]["averted_infections"]["mean"] > 0.2 * by["baseline"]["infections"]["mean"] > 0
    assert by["shut_in"]["averted_infections"]["low"] >= 0


def test_scenario_refuses_a_compartmental_scenario_file_for_this_family(town, capsys):
    """Bad input: interventions on flows given to an individual-based stream get exit 2 and a
    message naming the family, the kinds it takes and the file's own errors."""
    from schemas import example_scenario_path

    code = cli.main(["scenario", "--config", str(town / "casecloud.toml"), "--stream", STREAM,
                     "--scenarios", str(example_scenario_path("brackenford_schools"))])
    err = capsys.readouterr().err
    assert code == 2
    assert "individual-based" in err and "household_quarantine" in err and "brackenford_schools.toml" in err


def test_report_from_an_individual_based_checkpoint(town, capsys):
    """Bugs caught: the current-state page reading compartments an individual-based model does
    not have; a spec path that the report cannot resolve."""
    code = cli.main(["report", "--checkpoint-dir", str(town / "ck"), "--stream", STREAM, "--out", str(town / "rep0")])
    err = capsys.readouterr().err
    assert code != 0 and "--model" in err  # the checkpoint names a model that is not shipped: say how to give it
    code = cli.main(["report", "--checkpoint-dir", str(town / "ck"), "--stream", STREAM,
                     "--model", str(town / "thornby_flu.toml"), "--out", str(town / "rep")])
    assert code == 0
    page = (town / "rep" / "index.html").read_text(encoding="utf-8")
    assert "thornby_flu" in page and "R_eff" in page and "S[child]" in page
    assert (town / "rep" / "susceptibles.png").stat().st_size > 1000
    assert (town / "rep" / "parameters.png").stat().st_size > 1000


def test_calibrate_fits_the_static_parameters_of_an_individual_model(town, capsys):
    """Bug caught: calibrate compiling every spec as compartmental (it refused this family).
    What PMMH computes is checked against exact posteriors elsewhere (tests/filters/test_pmmh_nile.py);
    here the command must run the individual model and keep its static parameters."""
    code = cli.main(["calibrate", "--model", str(town / "thornby_flu.toml"), "--history", str(town / "history.csv"),
                     "--start", START.isoformat(), "--particles", "40", "--iterations", "16", "--chains", "2",
                     "--noise-repeats", "0", "--out", str(town / "cal"), "--quiet"])
    out = capsys.readouterr().out
    assert code == 0, out
    summary = orjson.loads((town / "cal" / "summary.json").read_bytes())
    text = orjson.dumps(summary).decode()
    assert "beta_school" in text and "rho" in text
    assert '"beta"' not in text  # drifting: not a calibration parameter
    prior = (town / "cal" / "prior.toml").read_text(encoding="utf-8")
    assert "[parameters.beta_school]" in prior and "[parameters.rho]" in prior
    with (town / "cal" / "draws.csv").open(encoding="utf-8") as handle:
        draws = list(csv.DictReader(handle))
    assert len(draws) == 2 * (16 - 4) and set(draws[0]) == {"chain", "iteration", "beta_school", "rho", "log_posterior"}
    assert all(float(d["beta_school"]) > 0 and 0 < float(d["rho"]) < 1 for d in draws)
    assert all(math.isfinite(float(d["log_posterior"])) for d in draws)


def test_stream_migrate_refuses_an_individual_based_stream_and_touches_nothing(town, capsys):
    """Bad input: `stream migrate` on a town's cloud (a revised individual spec) gets exit 1, a
    message pointing to `stream rebuild`, and leaves the checkpoints as they were."""
    revised = town / "revised"
    revised.mkdir()
    (revised / "thornby_town.toml").write_text(TOWN, encoding="utf-8")
    (revised / "thornby_flu.toml").write_text(MODEL.replace("importation = 0.3", "importation = 0.5"), encoding="utf-8")
    config = CONFIG.replace('model = "thornby_flu.toml"', 'model = "revised/thornby_flu.toml"')
    (town / "revised.toml").write_text(config, encoding="utf-8")
    before = {p: p.read_bytes() for p in sorted((town / "ck").rglob("*")) if p.is_file()}
    code = cli.main(["stream", "migrate", "--config", str(town / "revised.toml"), "--stream", STREAM])
    err = capsys.readouterr().err
    assert code == 1
    assert "individual-based" in err and "stream rebuild" in err and "nothing was done" in err
    assert {p: p.read_bytes() for p in sorted((town / "ck").rglob("*")) if p.is_file()} == before
