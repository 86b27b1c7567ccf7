"""``casecloud demo --town``: the individual-based demo, then every command it prints.

As a newcomer would: the installed console script in a subprocess, from a
working directory of its own, into an output directory with a space in its
name; each printed command is split as a POSIX shell would and run verbatim.
The demo is small (35 days, 150 towns) so the whole chain stays under a minute.
"""

from __future__ import annotations

import shlex
import subprocess
import sys
from pathlib import Path

import orjson
import pytest

from service.analysis.demo_town import TOWN_STREAM

pytestmark = pytest.mark.slow

CASECLOUD = Path(sys.executable).with_name("casecloud")
OUT = "runs/town try"
EXPECTED = {
    "report": ["report/index.html", "report/susceptibles.png", "report/series_ed_child.png"],
    "checkpoint": [],
    "scenario": ["scenarios/scenarios.json", "scenarios/scenarios.csv", "scenarios/scenarios_daily.csv"],
    "backtest": ["backtest/backtest.json", "backtest/scores.csv", "backtest/per_origin.csv"],
    "calibrate": ["calibration/draws.csv", "calibration/summary.json", "calibration/prior.toml"],
}


def _casecloud(argv: list[str], cwd: Path) -> subprocess.CompletedProcess:
    assert CASECLOUD.exists(), f"no console script at {CASECLOUD}: install the project (pip install -e .)"
    return subprocess.run([str(CASECLOUD), *argv], cwd=cwd, capture_output=True, text=True, timeout=600)


@pytest.fixture(scope="module")
def town(tmp_path_factory) -> dict:
    cwd = tmp_path_factory.mktemp("town-newcomer")
    run = _casecloud(["demo", "--town", "--out", OUT, "--days", "35", "--particles", "150", "--quiet"], cwd)
    assert run.returncode == 0, run.stderr
    commands = [line.strip() for line in run.stdout.splitlines() if line.startswith("  casecloud ")]
    return {"cwd": cwd, "out": cwd / OUT, "stdout": run.stdout, "commands": commands}


def test_the_town_demo_streams_a_town_and_resumes_from_its_checkpoints(town):
    """Bugs caught: the demo's stream not running the individual-based model; the restart
    replaying history instead of resuming (run 2 must apply only the new days)."""
    out = town["stdout"]
    assert "Pellingwold" in out and "20,000 people" in out and "Cautions" in out
    assert "run 1: {'applied': 21, 'skipped': 0, 'dead_letter': 0}" in out
    assert "run 2: {'applied': 14, 'skipped': 0, 'dead_letter': 0}" in out
    estimates = [orjson.loads(x) for x in (town["out"] / "estimates.ndjson").read_bytes().splitlines() if x]
    assert len(estimates) == 35 and {e["model"] for e in estimates} == {"pellingwold_flu"}
    assert {"S[child]", "I[senior]", "beta_home", "R_eff", "infections_7d.school"} <= set(estimates[-1]["quantities"])
    assert (town["out"] / "summary.txt").read_text(encoding="utf-8").strip() == out.strip()


def test_every_printed_command_runs_as_printed(town):
    """Bug caught: a printed command that a newcomer cannot run on this family (scenario, report
    and calibrate refused individual-based streams before)."""
    assert [shlex.split(c)[1] for c in town["commands"]] == list(EXPECTED)
    assert town["stdout"].rstrip("\n").splitlines()[-1].startswith("  casecloud calibrate ")
    for command in town["commands"]:
        argv = shlex.split(command)
        assert argv[0] == "casecloud"
        run = _casecloud(argv[1:], town["cwd"])
        assert run.returncode == 0, (command, run.stdout[-2000:], run.stderr[-2000:])
        for name in EXPECTED[argv[1]]:
            assert (town["out"] / name).is_file(), (command, name)
    scenarios = orjson.loads((town["out"] / "scenarios" / "scenarios.json").read_bytes())
    assert [o["name"] for o in scenarios["scenarios"]] == ["baseline", "schools_closed", "household_quarantine", "workplaces_half"]
    assert scenarios["run"]["stream"] == TOWN_STREAM
