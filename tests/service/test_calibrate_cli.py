"""``casecloud calibrate``: a tiny PMMH run on a small simulated history, its outputs and resume."""

from __future__ import annotations

import csv
import datetime as dt
import tomllib

import numpy as np
import orjson

from filters import CompartmentalModel, simulate_season
from schemas import example_model_path, load_model_spec
from service.cli import main

START = dt.date(2025, 9, 1)


def write_history(path, days: int = 25) -> None:
    model = CompartmentalModel(load_model_spec(example_model_path("sir")))
    season = simulate_season(model, days, np.random.default_rng(12), {"beta": 0.6})
    lines = ["period,cases"]
    for obs in season.observations:
        value = "" if obs.time == 5 else str(int(obs.values["cases"]))  # one missing day
        lines.append(f"{(START + dt.timedelta(days=obs.time)).isoformat()},{value}")
    path.write_text("\n".join(lines) + "\n")


def run(tmp_path, capsys, *extra: str):
    code = main([
        "calibrate", "--model", "sir", "--history", str(tmp_path / "counts.csv"), "--start", START.isoformat(),
        "--particles", "30", "--chains", "2", "--burn-in", "10", "--noise-repeats", "3", "--adapt-start", "15", "--seed", "5",
        "--out", str(tmp_path / "out"), *extra,
    ])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_tiny_run_writes_draws_summary_and_prior_block_and_resumes(tmp_path, capsys, monkeypatch):
    # Progress lines at every update (not every 5 s), so the counts can be checked (console.Progress).
    monkeypatch.setattr("service.console.PROGRESS_INTERVAL", 0.0)
    write_history(tmp_path / "counts.csv")
    code, out, err = run(tmp_path, capsys, "--iterations", "40")
    assert code == 0, err
    assert "calibrate: 80/80 iterations (100%), done in" in err  # progress on stderr
    assert "beta" in out and "R-hat" in out and "log-evidence noise" in out and "Cautions" in out
    d = tmp_path / "out"
    rows = list(csv.DictReader((d / "draws.csv").read_text().splitlines()))
    assert len(rows) == 2 * 30 and set(rows[0]) == {"chain", "iteration", "beta", "log_posterior"}
    assert all(0.1 < float(r["beta"]) < 1.0 for r in rows)  # inside the uniform prior's support
    summary = orjson.loads((d / "summary.json").read_bytes())
    beta = summary["parameters"]["beta"]
    assert {"rhat", "ess", "mean", "q0.05", "q0.5", "q0.95"} <= set(beta)
    assert beta["q0.05"] <= beta["q0.5"] <= beta["q0.95"]
    assert len(summary["acceptance"]) == 2
    noise = summary["log_evidence_noise"]
    assert noise["repeats"] == 3 and noise["particles"] == 30
    assert noise["suggested_particles"] is None or noise["suggested_particles"] >= 30
    prior = tomllib.loads((d / "prior.toml").read_text())
    assert prior["parameters"]["beta"]["kind"] == "static"
    assert prior["parameters"]["beta"]["prior"]["dist"] == "uniform"  # logit on (0.1, 1.0)
    assert (d / "pmmh_state.json").exists()

    # Same directory, more iterations: the saved 40 are kept and 20 more run.
    code, out, err = run(tmp_path, capsys, "--iterations", "60")
    assert code == 0, err
    # The resumed run starts its count at the saved 80 of 120, not at 0.
    assert "calibrate: 80/120 iterations" in err and "calibrate: 120/120 iterations (100%), done in" in err
    resumed = list(csv.DictReader((d / "draws.csv").read_text().splitlines()))
    assert len(resumed) == 2 * 50
    first = {(r["chain"], r["iteration"]): r["beta"] for r in rows}
    assert all(first[(r["chain"], r["iteration"])] == r["beta"] for r in resumed if (r["chain"], r["iteration"]) in first)

    # Another seed against the same state is refused, not silently restarted.
    code, _, err = run(tmp_path, capsys, "--iterations", "60", "--seed", "6")
    assert code == 2 and "does not match this run" in err


def test_bad_history_is_reported_with_file_and_line(tmp_path, capsys):
    (tmp_path / "counts.csv").write_text("period,cases\n2025-09-02,4\n2025-09-03,x\n")
    code, _, err = run(tmp_path, capsys, "--iterations", "20")
    assert code == 2
    assert f"{tmp_path / 'counts.csv'}:3: column 2 (cases)" in err
    (tmp_path / "counts.csv").write_text("period,deaths\n2025-09-02,4\n")
    code, _, err = run(tmp_path, capsys, "--iterations", "20")
    assert code == 2 and "not a series of the model; allowed: ['cases']" in err
