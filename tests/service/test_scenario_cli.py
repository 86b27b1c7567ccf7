"""``casecloud scenario`` on a checkpoint made by ``casecloud replay``, and the
bench's ``forecast`` section on a tiny workload.

The scenario command must read the stream's checkpoint without touching it,
print one row per scenario with the cautions, and write CSV and JSON that
agree with each other and with the library's report.
"""

from __future__ import annotations

import csv
import datetime as dt
import math
from pathlib import Path

import numpy as np
import orjson
import pytest

from filters import CAUTION, CompartmentalModel, simulate_season
from schemas import example_model_path, example_scenario_path, load_model_spec
from service import cli

STREAM = "brackenford.ed"
START = dt.date(2024, 9, 1)
DAYS = 18

CONFIG = f"""\
transport = "file"

[service]
seed = 13
checkpoint_dir = "ck"
keep_checkpoints = 2

[metrics]
enabled = false

[[streams]]
id = "{STREAM}"
model = "seir_two_band"
start = "{START.isoformat()}"
particles = 300
forecast_trajectories = 20

[[streams.alerts]]
name = "child_surge"
series = "ed_child"
threshold = 30
horizon_days = 7
"""


def _snapshot(root: Path) -> dict[str, tuple[bytes | None, int]]:
    """Everything under ``root`` (and root itself): file bytes, and every entry's
    modification time in ns (a directory's changes when an entry is added,
    removed or renamed in it)."""
    entries = [root, *sorted(root.rglob("*"))]
    return {str(p.relative_to(root)): (p.read_bytes() if p.is_file() else None, p.stat().st_mtime_ns) for p in entries}


@pytest.fixture(scope="module")
def deployment(tmp_path_factory) -> Path:
    """A config whose stream has checkpoints from replaying a simulated season."""
    root = tmp_path_factory.mktemp("scenario-cli")
    (root / "casecloud.toml").write_text(CONFIG, encoding="utf-8")
    model = CompartmentalModel(load_model_spec(example_model_path("seir_two_band")))
    season = simulate_season(model, DAYS, np.random.default_rng(2024), params={"beta": 0.3, "rho": 0.12, "k": 25.0})
    lines = [
        orjson.dumps(
            {
                "stream": STREAM,
                "period": (START + dt.timedelta(days=obs.time)).isoformat(),
                "counts": {k: int(v) for k, v in obs.values.items()},
            }
        )
        for obs in season.observations
    ]
    (root / "feed.ndjson").write_bytes(b"\n".join(lines) + b"\n")
    code = cli.main(
        ["replay", "--config", str(root / "casecloud.toml"), "--input", str(root / "feed.ndjson"), "--out", str(root / "replay")]
    )
    assert code == 0
    assert (root / "ck").is_dir()
    return root


def _scenario(deployment: Path, *extra: str) -> int:
    return cli.main(
        [
            "scenario",
            "--config",
            str(deployment / "casecloud.toml"),
            "--stream",
            STREAM,
            "--scenarios",
            str(example_scenario_path("brackenford_schools")),
            "--trajectories",
            "300",
            "--horizon",
            "21",
            *extra,
        ]
    )


def test_scenario_command_prints_the_table_and_writes_consistent_outputs(deployment, capsys, tmp_path):
    before = _snapshot(deployment / "ck")
    out = tmp_path / "out"
    capsys.readouterr()
    assert _scenario(deployment, "--seed", "4", "--out", str(out)) == 0
    printed = capsys.readouterr().out
    assert _snapshot(deployment / "ck") == before, "the scenario run changed the stream's checkpoint files"

    names = ["baseline", "school-closure", "closure-and-vaccination", "distancing"]
    table = printed.splitlines()
    header = next(i for i, line in enumerate(table) if line.strip().startswith("scenario "))
    rows = [line.strip() for line in table[header + 2 : header + 2 + len(names)]]
    assert [r.split()[0] for r in rows] == names
    assert "P(ed_child>40 within 21d)" in table[header] and "P(ed_child>30 within 7d)" in table[header]
    assert "cases averted" in table[header]
    assert f"checkpoint step {DAYS}" in printed and f"model day {DAYS}" in printed
    assert (START + dt.timedelta(days=DAYS)).isoformat() in printed
    assert CAUTION in printed
    assert "horizon 21 days; 300 trajectories per scenario; seed 4" in printed

    document = orjson.loads((out / "scenarios.json").read_bytes())
    assert [s["name"] for s in document["scenarios"]] == names
    assert document["run"]["stream"] == STREAM and document["run"]["checkpoint_step"] == DAYS
    assert document["horizon"] == 21 and document["n_trajectories"] == 300 and document["seed"] == 4
    assert document["caution"] == CAUTION
    with (out / "scenarios.csv").open(encoding="utf-8", newline="") as handle:
        rows_csv = list(csv.DictReader(handle))
    assert {r["scenario"] for r in rows_csv} == set(names)
    by_name = {s["name"]: s for s in document["scenarios"]}
    checked = 0
    for row in rows_csv:
        entry = by_name[row["scenario"]]
        metric = row["metric"]
        if metric.startswith("exceedance:"):
            prob = entry["exceedance"][metric.removeprefix("exceedance:")]
            assert float(row["mean"]) == prob["p"] and float(row["low"]) == prob["low"] and row["median"] == ""
        elif "." in metric:
            series, what = metric.split(".", 1)
            assert float(row["median"]) == entry["per_series"][series][what]["median"]
        else:
            for column in ("mean", "low", "median", "high"):
                assert float(row[column]) == entry[metric][column], (row, metric, column)
        checked += 1
    assert checked == len(rows_csv) > 40
    # The table shows the JSON's medians and intervals, rounded.
    closure = by_name["school-closure"]["cases"]
    cell = f"{closure['median']:.0f} [{closure['low']:.0f}, {closure['high']:.0f}]"
    assert cell in next(r for r in rows if r.startswith("school-closure"))
    assert by_name["baseline"]["averted_cases"] is None
    with (out / "scenarios_daily.csv").open(encoding="utf-8", newline="") as handle:
        daily = list(csv.DictReader(handle))
    assert len(daily) == len(names) * 21 * 3
    first = daily[0]
    assert first["scenario"] == "baseline" and first["day_ahead"] == "1" and first["model_day"] == str(DAYS + 1)
    assert all(math.isfinite(float(r["mean"])) for r in daily)


def test_scenario_outputs_are_reproducible(deployment, tmp_path, capsys):
    assert _scenario(deployment, "--seed", "9", "--out", str(tmp_path / "a")) == 0
    assert _scenario(deployment, "--seed", "9", "--out", str(tmp_path / "b")) == 0
    for name in ("scenarios.json", "scenarios.csv", "scenarios_daily.csv"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name


def test_default_seed_is_the_deployment_seed(deployment, capsys):
    assert _scenario(deployment) == 0
    assert "seed 13" in capsys.readouterr().out


def test_invalid_scenario_file_is_refused_with_file_line_and_field(deployment, tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('name = "typo"\n\n[[interventions]]\nkind = "rate"\nflow = "infektion"\nfactor = 0.5\n', encoding="utf-8")
    before = _snapshot(deployment / "ck")
    code = cli.main(["scenario", "--config", str(deployment / "casecloud.toml"), "--stream", STREAM, "--scenarios", str(bad)])
    err = capsys.readouterr().err
    assert code == 2
    assert f"{bad}:5: field interventions[0].rate.flow: flow 'infektion'" in err
    assert "allowed: ['infection', 'onset', 'recovery']" in err
    assert _snapshot(deployment / "ck") == before


def test_missing_checkpoint_is_a_clear_error(tmp_path, capsys):
    conf = tmp_path / "casecloud.toml"
    conf.write_text(CONFIG.replace('checkpoint_dir = "ck"', 'checkpoint_dir = "empty"'), encoding="utf-8")
    code = cli.main(
        ["scenario", "--config", str(conf), "--stream", STREAM, "--scenarios", str(example_scenario_path("brackenford_single"))]
    )
    err = capsys.readouterr().err
    assert code == 1
    assert f"stream {STREAM!r} has no checkpoint under {tmp_path / 'empty'}" in err
    assert not (tmp_path / "empty").exists(), "looking for a checkpoint must not create directories"


def test_unknown_stream_and_bad_numbers_exit_2(deployment, capsys):
    conf = str(deployment / "casecloud.toml")
    scen = str(example_scenario_path("brackenford_single"))
    assert cli.main(["scenario", "--config", conf, "--stream", "elsewhere", "--scenarios", scen]) == 2
    assert f"stream 'elsewhere' is not in {conf}; allowed: ['{STREAM}']" in capsys.readouterr().err
    assert cli.main(["scenario", "--config", conf, "--stream", STREAM, "--scenarios", scen, "--trajectories", "0"]) == 2
    assert "--trajectories must be >= 1, got 0" in capsys.readouterr().err
    assert cli.main(["scenario", "--config", conf, "--stream", STREAM, "--scenarios", scen, "--horizon", "400"]) == 2
    assert "--horizon must be between 1 and 365 days, got 400" in capsys.readouterr().err


# ---------------------------------------------------------------- bench section
def test_bench_forecast_section_on_a_tiny_workload():
    from service.bench import SECTIONS, run_bench

    assert "forecast" in SECTIONS
    options = {"forecast": {"trajectories": 40, "horizon": 7, "warmup_days": 3}}
    report = run_bench(particles=200, repeats=1, sections=("forecast",), options=options)
    figures = report["forecast"]
    assert "error" not in figures, figures
    assert figures["workload"]["scenarios"] == ["baseline", "school-closure", "distancing-and-vaccination"]
    # Binomial calls, counted from the scheme: 3 scenarios x 7 days x 4 sub-steps x one leave
    # draw for each of S, E, I; plus, in the vaccination scenario (in force every day), one
    # more split draw per sub-step (infection versus vaccination out of S).
    assert figures["floor_binomial_calls"] == 3 * 7 * 4 * 3 + 7 * 4
    # Observation noise: 3 scenarios x 7 days x 2 negative-binomial series x (gamma, Poisson).
    assert figures["observation_draw_calls"] == 3 * 7 * 2 * 2
    assert figures["recorded_run_identical"] is True
    for key in ("scenarios_seconds", "floor_seconds", "floor_ratio", "floor_ratio_all_draws"):
        assert figures[key] > 0 and math.isfinite(figures[key])
    target = report["targets"]["forecast.floor_ratio"]
    assert target["max"] == 1.3 and target["value"] == figures["floor_ratio"]
