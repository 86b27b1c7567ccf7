"""``casecloud backtest``: a simulated history replayed through the service and scored.

Histories are simulated from the shipped ``sir`` example itself (beta fixed at
0.5, so R0 = beta / gamma = 2; 60 days; Poisson reporting of half the new
infections), so casecloud's model is the true data-generating process up to its
static-parameter prior. Everything is seeded: the same inputs give the same
files. Cloud sizes are small (300 particles, 200 forecast draws) to keep the
module at a few seconds per replay.
"""

from __future__ import annotations

import asyncio
import csv
import datetime as dt
import json
import math
from pathlib import Path

import numpy as np
import orjson
import pytest

from filters import CompartmentalModel, mcmc_ess, simulate_season
from schemas import AlertRule, History, example_model_path, load_deployment_config, load_history, load_model_spec
from service.runtime.app import Service
from service.analysis.backtest import (
    METHODS,
    ORIGIN_KEYS,
    SCORE_KEYS,
    alert_episodes,
    persistence_draws,
    run_backtest,
    trend_draws,
)
from service.cli import main
from service.transports import MemoryTransport

STREAM = "north-cases"
START = dt.date(2026, 1, 1)
DAYS = 60
CONFIG = f"""
transport = "file"

[service]
seed = 5
checkpoint_dir = "unused-checkpoints"

[metrics]
enabled = false

[[streams]]
id = "{STREAM}"
model = "sir"
start = "{START.isoformat()}"
particles = 300
forecast_trajectories = 200
forecast_horizon_days = 14

[[streams.alerts]]
name = "cases_high"
series = "cases"
threshold = 300
horizon_days = 7
raise_level = 0.7
clear_level = 0.4
"""
TOP_KEYS = {"stream", "model", "history", "horizons", "methods", "scores", "per_origin", "alerts", "cautions"}


def _simulate(seed: int, path: Path) -> Path:
    model = CompartmentalModel(load_model_spec(example_model_path("sir")))
    truth = simulate_season(model, DAYS, np.random.default_rng(seed), params={"beta": 0.5})
    lines = ["period,cases"]
    for o in truth.observations:
        lines.append(f"{(START + dt.timedelta(days=o.time)).isoformat()},{int(o.values['cases'])}")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("backtest")
    (root / "deploy.toml").write_text(CONFIG, encoding="utf-8")
    histories = {seed: _simulate(seed, root / f"history-{seed}.csv") for seed in (1, 2, 3)}
    return root, histories


@pytest.fixture(scope="module")
def cli_run(setup):
    root, histories = setup
    out = root / "out"
    rc = main(["backtest", "--config", str(root / "deploy.toml"), "--history", str(histories[1]),
               "--stream", STREAM, "--horizons", "1,7,14", "--out", str(out)])  # fmt: skip
    return rc, out


@pytest.fixture(scope="module")
def seed2_run(setup):
    """Seed 2 through the Python API, keeping the replay's checkpoints in a known directory."""
    root, histories = setup
    config = load_deployment_config(root / "deploy.toml")
    ckpt = root / "seed2-checkpoints"
    result = run_backtest(config, load_history(histories[2]), STREAM, [7], checkpoint_dir=ckpt)
    return result, ckpt


def test_cli_writes_the_documented_files(cli_run, setup):
    rc, out = cli_run
    assert rc == 0
    doc = json.loads((out / "backtest.json").read_text())
    assert set(doc) == TOP_KEYS
    assert doc["stream"] == STREAM and doc["model"] == "sir"
    assert doc["history"] == {"first": "2026-01-02", "last": "2026-03-02", "n": DAYS}
    assert doc["horizons"] == [1, 7, 14] and doc["methods"] == list(METHODS) == ["casecloud", "persistence", "trend"]
    assert "decision support only" in doc["cautions"] and "local public-health judgement" in doc["cautions"]
    assert {(r["method"], r["horizon"]) for r in doc["scores"]} == {(m, h) for m in METHODS for h in (1, 7, 14)}
    for row in doc["scores"]:
        assert tuple(row) == SCORE_KEYS
        assert row["n"] > 30 and all(np.isfinite(row[k]) for k in SCORE_KEYS[4:])
    for row in doc["per_origin"]:
        assert tuple(row) == ORIGIN_KEYS
        assert row["q05"] <= row["q25"] <= row["median"] <= row["q75"] <= row["q95"]
    # every scored target appears once per method in per_origin
    assert len(doc["per_origin"]) == sum(r["n"] for r in doc["scores"])
    origin = next(r for r in doc["per_origin"] if r["horizon"] == 7)
    assert dt.date.fromisoformat(origin["target_period"]) - dt.date.fromisoformat(origin["origin_period"]) == dt.timedelta(days=7)
    assert origin["origin_day"] == (dt.date.fromisoformat(origin["origin_period"]) - START).days
    (alert,) = doc["alerts"]
    assert set(alert) == {"rule", "series", "threshold", "horizon_days", "auc", "roc", "episodes"}
    assert (alert["rule"], alert["series"], alert["threshold"], alert["horizon_days"]) == ("cases_high", "cases", 300, 7)
    assert set(alert["roc"]) == {"fpr", "tpr", "thresholds"}
    assert alert["roc"]["thresholds"][0] is None  # +inf ("never alert") is null in JSON
    assert (alert["roc"]["fpr"][0], alert["roc"]["tpr"][0], alert["roc"]["fpr"][-1], alert["roc"]["tpr"][-1]) == (0, 0, 1, 1)
    assert alert["auc"] is not None and 0.5 < alert["auc"] <= 1.0  # an epidemic from the model: informative alerts
    for e in alert["episodes"]:
        assert set(e) == {"first_exceeding_period", "raised_period", "lead_days"}
    for name, keys in (("scores.csv", SCORE_KEYS), ("per_origin.csv", ORIGIN_KEYS)):
        with open(out / name, newline="") as f:
            rows = list(csv.reader(f))
        assert tuple(rows[0]) == keys and len(rows) - 1 == len(doc[name.removesuffix(".csv")])
    print("\nbacktest table (seed 1):")
    for r in doc["scores"]:
        print(f"  {r['method']:<12}h={r['horizon']:>2} n={r['n']:>3} WIS {r['wis']:9.2f} CRPS {r['crps']:9.2f} "
              f"cov50 {r['coverage_50']:.2f} cov90 {r['coverage_90']:.2f} log {r['log_score']:.2f} bias {r['bias']:+.2f}")  # fmt: skip
    print(f"  alert AUC {alert['auc']}, episodes {alert['episodes']}")


def test_casecloud_coverage_is_sane(cli_run):
    """On data from its own model the 90 % (50 %) intervals should cover about 90 % (50 %) of targets.
    Origins are autocorrelated (one epidemic curve, overlapping forecasts), so the band is binomial with
    the *effective* number of targets: the ESS of the series of coverage indicators in origin order
    (filters.mcmc_ess, Geyer's initial-sequence estimator; capped at n). Seen for seed 1: n 44-57,
    n_eff 27-57 (50 %) and 39-57 (90 %). Band: nominal +- 3 sqrt(p (1 - p) / n_eff) (6 checks; a false
    failure about 1.6 % under the normal approximation), about +-0.12 to +-0.14 for 90 % and +-0.2 to
    +-0.29 for 50 %. Power against intervals one level too narrow (true 80 % coverage reported as 90 %)
    is low at this size (0.25-0.3 for n_eff 39-44): that bug is caught exactly by
    test_scores_csv_is_reproduced_from_per_origin_csv_alone, which recomputes coverage from the quantiles."""
    doc = json.loads((cli_run[1] / "backtest.json").read_text())
    for h in doc["horizons"]:
        rows = [r for r in doc["per_origin"] if r["method"] == "casecloud" and r["horizon"] == h]
        (score,) = [r for r in doc["scores"] if r["method"] == "casecloud" and r["horizon"] == h]
        for level, lo, hi, key in ((0.9, "q05", "q95", "coverage_90"), (0.5, "q25", "q75", "coverage_50")):
            inside = np.array([r[lo] <= r["observed"] <= r[hi] for r in rows], dtype=float)
            assert score[key] == pytest.approx(inside.mean(), abs=1e-6)
            n_eff = len(rows) if inside.std() == 0 else min(len(rows), float(mcmc_ess(inside[None, :, None])[0]))
            band = 3 * math.sqrt(level * (1 - level) / n_eff)
            assert abs(inside.mean() - level) <= band, (h, key, inside.mean(), n_eff, band)


def test_casecloud_beats_persistence_at_seven_days(cli_run, seed2_run, setup):
    """Expected: the histories come from casecloud's own model, so its forecast is close to the Bayes
    predictive, while persistence ignores the growth and decline of the epidemic and is off by hundreds of
    cases a week ahead. Asserted per seed (weakly: lower WIS) and for the mean over three seeds with a
    margin (casecloud's WIS at most half of persistence's; measured ~0.07 when written)."""
    root, histories = setup
    config = load_deployment_config(root / "deploy.toml")
    docs = [json.loads((cli_run[1] / "backtest.json").read_text()), seed2_run[0]]
    docs.append(run_backtest(config, load_history(histories[3]), STREAM, [7]))
    ratios = []
    for doc in docs:
        wis = {r["method"]: r["wis"] for r in doc["scores"] if r["horizon"] == 7}
        assert wis["casecloud"] < wis["persistence"], wis
        ratios.append(wis["casecloud"] / wis["persistence"])
    print(f"\nWIS(casecloud) / WIS(persistence) at 7 days, seeds 1-3: {[round(r, 3) for r in ratios]}")
    assert np.mean(ratios) <= 0.5


def test_replay_goes_through_the_service_and_forecasting_is_read_only(seed2_run, setup):
    """The backtest replays through Service (checkpoints written, one estimate per history row) and its
    forecasting hook draws its own random numbers: the published estimates equal a plain service replay's."""
    result, ckpt = seed2_run
    root, histories = setup
    replay = result["_replay"]
    assert replay["counts"] == {"applied": DAYS, "skipped": 0, "dead_letter": 0}
    assert len(replay["estimates"]) == DAYS and replay["dead_letters"] == []
    assert sorted((ckpt / STREAM).glob("*.ckpt")), "no checkpoints written"
    # a plain replay of the same messages, no hook
    config = load_deployment_config(root / "deploy.toml")
    config = config.model_copy(update={"service": config.service.model_copy(update={"checkpoint_dir": root / "plain"})})
    history = load_history(histories[2])
    messages = [orjson.dumps({"stream": STREAM, "period": p, "counts": {"cases": v["cases"]}}) for p, v in zip(history.periods, history.values)]
    transport = MemoryTransport(messages)
    asyncio.run(Service(config, transport, today=lambda: history.dates[-1] + dt.timedelta(days=1)).run(until_exhausted=True))
    plain = [orjson.loads(r.value) for r in transport.published["estimates"]]
    assert plain == replay["estimates"]


def test_backtest_is_deterministic(cli_run, setup):
    root, histories = setup
    again = run_backtest(load_deployment_config(root / "deploy.toml"), load_history(histories[1]), STREAM, [1, 7, 14])
    doc = json.loads((cli_run[1] / "backtest.json").read_text())
    assert again["scores"] == doc["scores"] and again["per_origin"] == doc["per_origin"]


def test_unknown_stream_exits_2(setup, capsys):
    root, histories = setup
    rc = main(["backtest", "--config", str(root / "deploy.toml"), "--history", str(histories[1]), "--stream", "nope"])
    assert rc == 2 and "not configured" in capsys.readouterr().err


# -------------------------------------------------------------- pure parts
def _history(values: list[int | None]) -> History:
    dates = [START + dt.timedelta(days=i + 1) for i in range(len(values))]
    return History([d.isoformat() for d in dates], dates, ["cases"], [{"cases": v} for v in values])


def test_alert_episodes_and_lead_times():
    """Episodes are runs of rows above the threshold; the lead is from the raise active on the first exceeding day."""
    rule = AlertRule(name="r", series="cases", threshold=10, horizon_days=7, raise_level=0.7, clear_level=0.4)
    #          day: 1  2  3  4   5   6  7  8  9  10  11 12  13  14
    h = _history([1, 2, 3, 4, 20, 30, 5, 4, 3, 25, 2, 1, 50, 60])

    def ev(day, status):
        return {"rule": "r", "status": status, "period": (START + dt.timedelta(days=day)).isoformat()}

    eps = alert_episodes(h, rule, [ev(2, "raised"), ev(7, "cleared"), ev(10, "raised")])
    assert [e["first_exceeding_period"] for e in eps] == [h.periods[4], h.periods[9], h.periods[12]]
    assert eps[0]["raised_period"] == h.periods[1] and eps[0]["lead_days"] == 3  # raised day 2, first above day 5
    assert eps[1]["raised_period"] == h.periods[9] and eps[1]["lead_days"] == 0  # raised on the exceeding day itself
    assert eps[2]["raised_period"] is None and eps[2]["lead_days"] is None  # day-10 alert belongs to episode 2
    # raised, then cleared before the episode: no warning
    eps = alert_episodes(h, rule, [ev(1, "raised"), ev(3, "cleared")])
    assert eps[0]["lead_days"] is None
    # other rules' alerts do not count
    assert alert_episodes(h, rule, [{**ev(2, "raised"), "rule": "other"}])[0]["lead_days"] is None


def test_persistence_baseline_moments():
    """Negative binomial with mean = last count and variance = mean + s2 * h (s2 = mean squared one-step change)."""
    days = np.arange(1, 9)
    past = np.array([10, 14, 12, 18, 16, 20, 19, 24])
    s2 = np.mean(np.diff(past) ** 2)  # (16+4+36+4+16+1+25)/7 = 102/7
    draws = persistence_draws(days, past, [1, 7], 200_000, np.random.default_rng(0))
    for j, h in enumerate((1, 7)):
        var = 24 + s2 * h
        assert draws[:, j].mean() == pytest.approx(24, abs=4 * np.sqrt(var / 200_000))
        assert draws[:, j].var() == pytest.approx(var, rel=0.05)


def test_trend_baseline_recovers_exact_growth():
    """On an exact log-linear series (log(y+1) = 0.1 d) the fit has zero residual: draws are Poisson(exp(0.1 (d+h)) - 1)."""
    days = np.arange(1, 15)
    past = np.exp(0.1 * days) - 1  # not integers: the fit is exact
    draws = trend_draws(days, past, 14, [7], 100_000, np.random.default_rng(0))
    lam = np.exp(0.1 * 21) - 1
    assert draws[:, 0].mean() == pytest.approx(lam, abs=4 * np.sqrt(lam / 100_000))
    assert draws[:, 0].var() == pytest.approx(lam, rel=0.05)


# ------------------------------------------------- scores recomputed independently
def _read_csv(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


def _cdf_bounds(y: float, quantiles: dict[float, float], m: int) -> tuple[float, float]:
    """Bounds on F(y) = share of the m draws <= y, from numpy's linear-interpolation quantiles
    Q(p) of the draws alone: with h = (m - 1) p, y < Q(p) implies F(y) <= ceil(h) / m (Q(p) <=
    x_(ceil h)), and y >= Q(p) implies F(y) >= (floor(h) + 1) / m (Q(p) >= x_(floor h))."""
    lo, hi = 0.0, 1.0
    for p, q in quantiles.items():
        h = (m - 1) * p
        if y < q:
            hi = min(hi, math.ceil(h) / m)
        else:
            lo = max(lo, (math.floor(h) + 1) / m)
    return lo, hi


def test_scores_csv_is_reproduced_from_per_origin_csv_alone(cli_run):
    """scores.csv from per_origin.csv and nothing else: mean WIS, CRPS and log score per method and
    horizon; the 50 % and 90 % coverage recomputed from each row's q25/q75 and q05/q95 and the
    observed count; the mean bias of Funk et al. (2019), 1 - (F(y) + F(y - 1)), bracketed by the
    bounds on the draws' cdf that the five quantiles imply (per_origin.csv carries no draws).
    Injected while writing this: coverage_90 computed from the q10-q90 (80 %) interval in
    service/analysis/backtest.py; this test fails on it (e.g. 0.9 recomputed vs 0.8 reported)."""
    out = cli_run[1]
    rows = _read_csv(out / "per_origin.csv")
    scores = _read_csv(out / "scores.csv")
    m = 200  # forecast_trajectories of the config: draws per forecast, for the bias bounds
    groups: dict[tuple[str, str, int], list[dict[str, str]]] = {}
    for r in rows:
        groups.setdefault((r["method"], r["series"], int(r["horizon"])), []).append(r)
    assert {(s["method"], s["series"], int(s["horizon"])) for s in scores} == set(groups)
    for s in scores:
        g = groups[(s["method"], s["series"], int(s["horizon"]))]
        y = np.array([float(r["observed"]) for r in g])
        q = {k: np.array([float(r[k]) for r in g]) for k in ("q05", "q25", "median", "q75", "q95")}
        mine = {
            "n": len(g),
            "wis": np.mean([float(r["wis"]) for r in g]),
            "crps": np.mean([float(r["crps"]) for r in g]),
            "log_score": np.mean([float(r["log_score"]) for r in g]),
            "coverage_50": np.mean((q["q25"] <= y) & (y <= q["q75"])),
            "coverage_90": np.mean((q["q05"] <= y) & (y <= q["q95"])),
        }
        assert int(s["n"]) == mine["n"], s
        # Per-origin values are rounded to 6 decimals before we average them: 1e-6 covers it.
        for key in ("wis", "crps", "log_score", "coverage_50", "coverage_90"):
            assert float(s[key]) == pytest.approx(mine[key], abs=1e-6), (s, key, mine[key])
        lower = upper = 0.0
        for r, obs in zip(g, y):
            qs = {p: float(r[k]) for p, k in ((0.05, "q05"), (0.25, "q25"), (0.5, "median"), (0.75, "q75"), (0.95, "q95"))}
            lo_y, hi_y = _cdf_bounds(obs, qs, m)
            lo_y1, hi_y1 = _cdf_bounds(obs - 1, qs, m)
            lower += 1 - hi_y - min(hi_y1, hi_y)
            upper += 1 - lo_y - lo_y1
        assert lower / len(g) - 1e-6 <= float(s["bias"]) <= upper / len(g) + 1e-6, (s, lower / len(g), upper / len(g))


def test_no_look_ahead_forecasts_at_or_before_an_origin_ignore_later_data(setup, seed2_run):
    """Changing every count after day 30 (tripled, plus 7) must leave every estimate published for
    days up to 30 byte-identical, and every forecast made at those origins (all three methods'
    quantiles) identical; scores of targets after day 30 change with the data, as they should."""
    root, histories = setup
    config = load_deployment_config(root / "deploy.toml")
    history = load_history(histories[2])
    cut = 30
    changed = History(history.periods, history.dates, history.series,
                      [v if i < cut else {"cases": 3 * v["cases"] + 7} for i, v in enumerate(history.values)])
    base, _ = seed2_run  # horizons [7]
    other = run_backtest(config, changed, STREAM, [7])
    cut_period = history.periods[cut - 1]
    early = lambda est: [orjson.dumps(e) for e in est if e["period"] <= cut_period]  # noqa: E731
    assert len(early(base["_replay"]["estimates"])) == cut
    assert early(other["_replay"]["estimates"]) == early(base["_replay"]["estimates"])
    forecast_keys = ("method", "series", "origin_period", "horizon", "target_period", "median", "q05", "q25", "q75", "q95")
    pick = lambda doc: [tuple(r[k] for k in forecast_keys) for r in doc["per_origin"] if r["origin_period"] <= cut_period]  # noqa: E731
    assert len(pick(base)) > 3 * 20  # three methods, origins from day 3 to day 30
    assert pick(other) == pick(base)
    # Positive control: later data did change (targets after the cut, later forecasts).
    later = lambda doc: [(r["origin_period"], r["method"], r["median"]) for r in doc["per_origin"] if r["origin_period"] > cut_period]  # noqa: E731
    assert later(other) != later(base)
