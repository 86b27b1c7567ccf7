"""``casecloud backtest`` over a history with all kinds of evidence: cases (counts), positives out of
tests (lab_pos) and wastewater levels censored below the lab's limit (ww), simulated from
tests/filters/specs/sir_all_kinds.toml itself (beta 0.5) and replayed through the service.

What is checked: the run ends (exit 0) with rows for every series and method; positivity draws are
positives out of each target's realised tests; the continuous scores of the concentration series
equal a recomputation from the origins' draws (CRPS, on the censored scale for targets with a limit)
and from the model's measurement law (log score: a mixture of scipy log-normals, or their cdf at the
limit for a sample not detected), an implementation independent of the backtest's.
"""

from __future__ import annotations

import csv
import datetime as dt
from pathlib import Path

import numpy as np
import pytest
from scipy import special, stats

from filters import CompartmentalModel, simulate_season
from schemas import load_deployment_config, load_history, load_model_spec
from service.analysis.backtest import (
    METHODS,
    ORIGIN_KEYS,
    SCORE_KEYS,
    format_backtest_table,
    run_backtest,
)
from service.cli import main

SPEC = Path(__file__).parents[1] / "filters" / "specs" / "sir_all_kinds.toml"
STREAM = "rivermouth-all"
START = dt.date(2026, 1, 1)
DAYS = 36
SD = 0.3  # the spec's ww noise sd (log scale)


def _config(root: Path) -> Path:
    path = root / "deploy.toml"
    path.write_text(f"""
transport = "file"

[service]
seed = 7
checkpoint_dir = "unused"

[metrics]
enabled = false

[[streams]]
id = "{STREAM}"
model = "{SPEC}"
start = "{START.isoformat()}"
particles = 300
forecast_trajectories = 200
forecast_horizon_days = 7
""", encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    root = tmp_path_factory.mktemp("backtest_kinds")
    model = CompartmentalModel(load_model_spec(SPEC))
    tests = [60 + 4 * d for d in range(1, DAYS + 1)]
    free = simulate_season(model, DAYS, np.random.default_rng(21), {"beta": 0.5}, tests={"lab_pos": tests})
    levels = np.array([o.values["ww"] for o in free.observations])
    lod = float(np.quantile(levels, 0.3))  # about a third of the samples not detected
    truth = simulate_season(model, DAYS, np.random.default_rng(21), {"beta": 0.5}, tests={"lab_pos": tests}, limits={"ww": lod})
    lines = ["period,cases,lab_pos,lab_pos.tests,ww,ww.lod"]
    for o in truth.observations:
        v = o.values["ww"]
        lines.append(f"{(START + dt.timedelta(days=o.time)).isoformat()},{int(o.values['cases'])},"
                     f"{int(o.values['lab_pos'])},{int(o.trials['lab_pos'])},{'nd' if v == 0 else repr(v)},{lod!r}")  # fmt: skip
    history = root / "history.csv"
    history.write_text("\n".join(lines) + "\n", encoding="utf-8")
    config = _config(root)
    out = root / "out"
    rc = main(["backtest", "--config", str(config), "--history", str(history), "--stream", STREAM,
               "--horizons", "1,3,7", "--out", str(out)])  # fmt: skip
    result = run_backtest(load_deployment_config(config), load_history(history), STREAM, [1, 3, 7])
    return {"rc": rc, "out": out, "result": result, "lod": lod, "lines": lines, "root": root, "config": config, "history": history}


def _read(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


def test_a_history_with_all_kinds_runs_end_to_end(run):
    assert run["rc"] == 0
    result = run["result"]
    assert result["_replay"]["dead_letters"] == [] and result["_replay"]["counts"]["applied"] == DAYS
    rows = result["per_origin"]
    assert all(tuple(r) == ORIGIN_KEYS for r in rows) and all(tuple(r) == SCORE_KEYS for r in result["scores"])
    assert {(r["series"], r["kind"]) for r in rows} == {("cases", "incidence"), ("lab_pos", "positivity"), ("ww", "concentration")}
    assert {(r["method"], r["series"]) for r in result["scores"]} == {(m, s) for m in METHODS for s in ("cases", "lab_pos", "ww")}
    ww = [r for r in rows if r["series"] == "ww"]
    assert {r["censored"] for r in ww} == {0, 1}  # both kinds of target were scored
    assert all(r["lod"] == run["lod"] for r in ww) and all(r["tests"] is None for r in ww)
    # the files hold the same rows, new columns after the existing ones
    csv_rows = _read(run["out"] / "per_origin.csv")
    assert list(csv_rows[0]) == list(ORIGIN_KEYS) and len(csv_rows) == len(rows)
    # the scores rows are the means of the per-origin rows
    for s in result["scores"]:
        mine = [r for r in rows if (r["method"], r["series"], r["horizon"]) == (s["method"], s["series"], s["horizon"])]
        assert s["n"] == len(mine)
        for key, col in (("crps", "crps"), ("log_score", "log_score"), ("wis", "wis")):
            assert s[key] == pytest.approx(np.mean([r[col] for r in mine]), abs=2e-6)  # rows are rounded to 1e-6
    table = format_backtest_table(result)
    assert "series ww  (lower WIS/CRPS/log is better" in table and "positives out of the realised tests" in table


def test_positivity_forecasts_are_positives_out_of_the_realised_tests(run):
    """Bug caught: scoring the share positive (values in [0, 1]) against positives, or drawing positives
    out of another number of tests than the target row's."""
    tests = {line.split(",")[0]: int(line.split(",")[3]) for line in run["lines"][1:]}
    rows = [r for r in run["result"]["per_origin"] if r["series"] == "lab_pos"]
    assert rows
    for r in rows:
        assert r["tests"] == tests[r["target_period"]] and 0 <= r["observed"] <= r["tests"]
        assert 0 <= r["q05"] <= r["median"] <= r["q95"] <= r["tests"]
    casecloud = [r for r in rows if r["method"] == "casecloud" and r["horizon"] == 1]
    # a forecast on the positives' scale: median share within 0.15 of the realised one on most days
    close = [abs(r["median"] / r["tests"] - r["observed"] / r["tests"]) < 0.15 for r in casecloud]
    assert np.mean(close) > 0.8, close


def test_concentration_scores_equal_a_recomputation_from_the_draws_and_the_measurement_law(run):
    """CRPS: E|X - y| - 1/2 E|X - X'| over all pairs (Gneiting & Raftery 2007, eq. 21), written out
    here as an O(M^2) double sum on max(X, lod) and max(y, lod). Log score: -log of the mixture over
    trajectories of scipy.stats.lognorm(0.3, scale=median_j) at y, or of its cdf at the limit when the
    sample was not detected. Equal to the stored rows up to their rounding (1e-6)."""
    result, lod = run["result"], run["lod"]
    origins = {o.period: o for o in result["_replay"]["origins"]}
    horizons = result["horizons"]
    rows = [r for r in result["per_origin"] if r["series"] == "ww" and r["method"] == "casecloud"]
    assert len(rows) > 20
    for r in rows:
        o = origins[r["origin_period"]]
        j = horizons.index(r["horizon"])
        x = np.maximum(o.draws["ww"][:, j], lod)
        y = max(r["observed"], lod)
        crps = np.mean(np.abs(x - y)) - 0.5 * np.mean(np.abs(x[:, None] - x[None, :]))
        assert r["crps"] == pytest.approx(crps, abs=2e-6)
        medians = o.extra["expected"]["ww"][:, j]
        law = stats.lognorm(SD, scale=medians)
        logs = law.logcdf(lod) if r["censored"] else law.logpdf(r["observed"])
        assert r["censored"] == int(r["observed"] < lod)
        assert r["log_score"] == pytest.approx(-(special.logsumexp(logs) - np.log(medians.size)), abs=2e-6)


def test_the_vintage_form_of_the_same_history_scores_the_same(run):
    """The same rows, each final on arrival (an empty as_of), replay through the vintage path with the
    new kinds' tests and samples: the same estimates and the same scores as the plain file. Bug caught:
    tests or samples dropped from vintage messages (dead letters, or other scores)."""
    lines = run["lines"]
    text = "\n".join([lines[0].replace("period,", "period,as_of,", 1)] + [line.replace(",", ",,", 1) for line in lines[1:]]) + "\n"
    path = run["root"] / "vintages.csv"
    path.write_text(text, encoding="utf-8")
    history = load_history(path)
    assert history.vintages is not None and history.tests[0] == {"lab_pos": int(lines[1].split(",")[3])}
    new = run_backtest(load_deployment_config(run["config"]), history, STREAM, [1, 3, 7])
    old = run["result"]
    assert new["_replay"]["dead_letters"] == [] and new["_replay"]["estimates"] == old["_replay"]["estimates"]
    assert new["scores"] == old["scores"]
    assert [{k: r[k] for k in ORIGIN_KEYS} for r in new["per_origin"]] == old["per_origin"]


def test_a_stream_rebuilt_from_the_history_takes_every_kind(run, tmp_path):
    """casecloud stream rebuild --history sends positives with their tests and samples with their limits."""
    from service.runtime.recovery import rebuild_stream

    config = load_deployment_config(run["config"])
    config = config.model_copy(update={"service": config.service.model_copy(update={"checkpoint_dir": tmp_path / "ckpt"})})
    report = rebuild_stream(config, STREAM, history=run["history"], show_progress=False)
    assert (report.applied, report.dead_letters) == (DAYS, 0)
