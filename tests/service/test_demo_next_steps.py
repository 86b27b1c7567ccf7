"""From ``casecloud demo`` to every other command without writing a file by hand.

The demo runs as a newcomer would run it: the installed ``casecloud`` console
script, in a subprocess, from a working directory of its own; its output
directory has a space in its name (``runs/first try``) so unquoted paths in
the printed commands would break. Each command of the demo's closing lines is
then split as a POSIX shell would (``shlex``) and run verbatim, from the same
directory, with the same console script. The demo is small (40 days, 200
particles) and the printed commands use their printed options: the calibrate
line carries its own short-trial options, the others run at their defaults.
The demo prints two backtests: the ED history (final counts) and the lab
feed's vintages (a history CSV with an ``as_of`` column).
"""

from __future__ import annotations

import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import orjson
import pytest

from schemas import example_model_path, example_scenario_path, load_deployment_config, load_history, load_model_spec
from service.analysis.demo import (
    CONFIG_NAME,
    DAILY_HISTORY_NAME,
    DEMO_MODEL,
    DEMO_STREAM,
    HISTORY_NAME,
    LAB_HISTORY_NAME,
    LAB_SERIES,
    SCENARIO_EXAMPLE,
    _start_afresh,
)
from service.cli import build_parser, main

pytestmark = pytest.mark.slow  # the demo and six commands: about half a minute

CASECLOUD = Path(sys.executable).with_name("casecloud")  # the console script installed beside this Python
OUT = "runs/first try"
# Each printed command (its name, and its --out when a command is printed twice) and what it must leave
# behind (relative to the demo's directory).
EXPECTED = {
    "report": ["report/index.html", "report/nowcast_lab_confirmed.png"],
    "checkpoint": [],  # prints only
    "scenario": ["scenarios/scenarios.json", "scenarios/scenarios.csv", "scenarios/scenarios_daily.csv"],
    "backtest": ["backtest/backtest.json", "backtest/scores.csv", "backtest/per_origin.csv"],
    "backtest-lab": ["backtest-lab/backtest.json", "backtest-lab/nowcast_scores.csv", "backtest-lab/nowcast_per_origin.csv"],
    "calibrate": ["calibration/draws.csv", "calibration/summary.json", "calibration/prior.toml"],
}


def _name(command: str) -> str:
    """The command's key in EXPECTED: its name, or for the second backtest the directory it writes."""
    argv = shlex.split(command)
    return "backtest-lab" if argv[1] == "backtest" and argv[argv.index("--out") + 1].endswith("backtest-lab") else argv[1]


def _casecloud(argv: list[str], cwd: Path) -> subprocess.CompletedProcess:
    assert CASECLOUD.exists(), f"no console script at {CASECLOUD}: install the project (pip install -e .)"
    return subprocess.run([str(CASECLOUD), *argv], cwd=cwd, capture_output=True, text=True, timeout=600)


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> dict:
    cwd = tmp_path_factory.mktemp("newcomer")
    run = _casecloud(["demo", "--out", OUT, "--days", "40", "--particles", "200", "--quiet"], cwd)
    assert run.returncode == 0, run.stderr
    commands = [line.strip() for line in run.stdout.splitlines() if line.startswith("  casecloud ")]
    return {"cwd": cwd, "out": cwd / OUT, "stdout": run.stdout, "commands": commands}


def test_the_closing_lines_are_the_six_next_commands(demo):
    lines = demo["stdout"].rstrip("\n").splitlines()
    # The commands close the output (after the cautions), so they are what a newcomer sees last.
    assert lines[-1].startswith("  casecloud calibrate ")
    assert [_name(c) for c in demo["commands"]] == list(EXPECTED)
    # Bug caught: a printed command that no longer parses (an option renamed or dropped).
    parser = build_parser()
    for command in demo["commands"]:
        parser.parse_args(shlex.split(command)[1:])


@pytest.mark.parametrize("name", list(EXPECTED))
def test_each_printed_command_runs_verbatim_from_the_same_directory(demo, name):
    command = next(c for c in demo["commands"] if _name(c) == name)
    argv = shlex.split(command)
    assert argv[0] == "casecloud"
    run = _casecloud(argv[1:], demo["cwd"])
    # Bug caught: a path the printed command cannot find from here (unquoted space, relative to the
    # wrong directory, a file the demo does not write), or a command that fails on the demo's files.
    assert run.returncode == 0, f"{command}\n{run.stderr}"
    for name_ in EXPECTED[name]:
        assert (demo["out"] / name_).is_file(), f"{command} did not write {name_}"
    assert run.stdout.strip()
    if name == "checkpoint":
        # The summary reads the header keys the service really writes.
        estimates = [orjson.loads(x) for x in (demo["out"] / "estimates.ndjson").read_bytes().splitlines()]
        out = run.stdout
        assert out.startswith(f"stream {DEMO_STREAM}\n")
        assert f"  step           {len(estimates)} (records assimilated)" in out
        assert f"  last period    {estimates[-1]['period']} (model day {estimates[-1]['day']}; model seir_two_band" in out
        assert "  particles      200; effective sample size " in out
        assert "  alerts         child_ed_surge: " in out
        assert "observations.ndjson partition 0, offset " in out


def test_config_loads_from_anywhere_and_points_at_the_demo_files(demo, tmp_path, monkeypatch):
    out = demo["out"]
    text = (out / CONFIG_NAME).read_text(encoding="utf-8")
    # Bug caught: absolute paths baked in, so the directory cannot be moved or shared.
    assert str(demo["cwd"]) not in text
    monkeypatch.chdir(tmp_path)  # somewhere else entirely
    config = load_deployment_config(out / CONFIG_NAME, environ={})
    assert config.file.input.resolve() == (out / "observations.ndjson").resolve()
    assert config.file.output_dir.resolve() == out.resolve()
    assert config.service.checkpoint_dir.resolve() == (out / "checkpoints").resolve()
    assert config.transport == "file" and [s.id for s in config.streams] == [DEMO_STREAM]
    assert config.streams[0].particles == 200  # the demo's --particles: the config it really ran with

    # Moved (copied) as a whole, it describes the copy: checkpoint show finds the copy's checkpoint.
    moved = shutil.copytree(out, tmp_path / "moved demo")
    assert main(["checkpoint", "show", "--config", str(moved / CONFIG_NAME)]) == 0


def _feed(out: Path) -> list[dict]:
    messages = []
    for line in (out / "observations.ndjson").read_bytes().splitlines():
        try:
            message = orjson.loads(line)
        except orjson.JSONDecodeError:
            continue  # the feed's deliberately truncated line
        if all(v >= 0 for v in message["counts"].values()):  # and its negative count
            messages.append(message)
    return messages


def test_history_csv_is_the_clean_ed_feed(demo):
    out = demo["out"]
    spec = load_model_spec(example_model_path("seir_two_band"))
    history = load_history(out / HISTORY_NAME, allowed_series=[s.name for s in spec.series])
    feed: dict[str, dict] = {}
    for message in _feed(out):
        if LAB_SERIES not in message["counts"]:
            feed.setdefault(message["period"], {}).update(message["counts"])  # Sundays: one message per band
    # Bug caught: the CSV built from the feed with its mistakes (a re-sent day twice, a negative
    # count), a Sunday holding one band only, or series in a different order from the header.
    assert history.periods == sorted(feed) and len(history) == 40
    assert [dict(v) for v in history.values] == [{k: feed[p][k] for k in ("ed_child", "ed_adult")} for p in history.periods]


def test_daily_history_csv_holds_every_daily_feed(demo):
    out = demo["out"]
    spec = load_model_spec(example_model_path(DEMO_MODEL))
    history = load_history(out / DAILY_HISTORY_NAME, allowed_series=[s.name for s in spec.series])
    feed: dict[str, dict] = {}
    for message in _feed(out):
        if LAB_SERIES in message["counts"]:
            continue
        row = feed.setdefault(message["period"], {})
        row.update({k: (v, (message.get("tests") or {}).get(k)) for k, v in message["counts"].items()})
        for k, c in (message.get("concentrations") or {}).items():
            row[k] = (c["value"], c["lod"], c["flow"])
    assert history.series == ["ed_child", "ed_adult", "lab_positivity", "ww_millrace"] and len(history) == 40
    # Bug caught: positives without their tests, a wastewater sample on the day it was sent rather than
    # taken, a sample not detected read as 0 without its limit, or the ED columns differing from history.csv.
    for i, (period, values) in enumerate(zip(history.periods, history.values)):
        sent = feed[period]
        tests, limits, flows = history.details(i)
        assert {k: values[k] for k in ("ed_child", "ed_adult")} == {k: sent[k][0] for k in ("ed_child", "ed_adult")}
        if "lab_positivity" in sent:
            assert (values["lab_positivity"], tests["lab_positivity"]) == sent["lab_positivity"]
        else:
            assert values["lab_positivity"] is None
        if "ww_millrace" in sent:
            value, lod, flow = sent["ww_millrace"]
            assert (values["ww_millrace"], limits["ww_millrace"], flows["ww_millrace"]) == (value or 0.0, lod, flow)
        else:
            assert values["ww_millrace"] is None


def test_lab_history_csv_holds_the_lab_feeds_vintages(demo):
    out = demo["out"]
    spec = load_model_spec(example_model_path("seir_two_band_lab"))
    history = load_history(out / LAB_HISTORY_NAME, allowed_series=[s.name for s in spec.series])
    sent = [(m["period"], m["as_of"], m["counts"][LAB_SERIES]) for m in _feed(out) if LAB_SERIES in m["counts"]]
    assert history.vintages is not None and history.series == [LAB_SERIES]
    # Bug caught: vintages lost (final counts only), reordered, or differing from what the lab sent.
    assert [(v.period, v.as_of.isoformat(), v.counts[LAB_SERIES]) for v in history.vintages] == sent
    assert len({p for p, _, _ in sent}) < len(sent)  # weeks known as of several dates


def test_the_example_scenario_file_names_the_demo_stream_and_files(demo):
    shipped = example_scenario_path(SCENARIO_EXAMPLE)
    assert (demo["out"] / shipped.name).read_bytes() == shipped.read_bytes()
    comment = " ".join(line.lstrip("# ").rstrip("\\ ") for line in shipped.read_text().splitlines() if line.startswith("#"))
    argv = shlex.split(comment[comment.index("casecloud scenario") :].split(" Every run")[0])
    options = dict(zip(argv[2::2], argv[3::2]))
    # The demo's default directory (cmd_demo's; the parser leaves --out unset so --town can default to its own).
    default_out = "casecloud-demo"
    # Bug caught: the comment naming a stream id or file the demo does not have.
    assert options == {
        "--config": f"{default_out}/{CONFIG_NAME}",
        "--stream": DEMO_STREAM,
        "--scenarios": f"{default_out}/{shipped.name}",
    }


def test_a_new_demo_drops_calibration_chains_of_the_old_feed_only(tmp_path):
    calibration = tmp_path / "calibration"
    calibration.mkdir()
    for name in ("pmmh_state.json", "pmmh_chain.npy", "summary.json", "my notes.txt"):
        (calibration / name).write_text("x")
    _start_afresh(tmp_path)
    # Bug caught: the printed calibrate command refused after a demo re-run with other --days
    # (saved chains of another feed), or the demo deleting files it did not make.
    assert sorted(p.name for p in calibration.iterdir()) == ["my notes.txt", "summary.json"]
