"""The README's promises: its Python example runs, its set-up section has
exactly two commands, and the cautions are stated."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

README = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")


def test_python_example_runs(tmp_path):
    blocks = re.findall(r"```python\n(.*?)```", README, re.S)
    assert blocks, "README has no python example"
    script = tmp_path / "example.py"
    script.write_text(blocks[0], encoding="utf-8")
    done = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    lines = done.stdout.strip().splitlines()
    assert len(lines) == 3  # one line per observation: ESS and the level's summary
    for line in lines:
        ess = float(line.split()[0])
        assert 1.0 <= ess <= 5000.0


def test_setup_has_exactly_two_commands():
    setup = README.split("## Set-up", 1)[1].split("## User guide", 1)[0]
    commands = re.findall(r"```sh\n(.*?)```", setup, re.S)
    assert len(commands) == 2
    assert "casecloud demo" in commands[0]
    assert "pytest" in commands[1] and ".[test]" in commands[1]


def test_ci_runs_the_readme_test_command():
    setup = README.split("## Set-up", 1)[1].split("## User guide", 1)[0]
    test_command = re.findall(r"```sh\n(.*?)```", setup, re.S)[1].strip()
    ci = (Path(__file__).resolve().parents[1] / ".ci" / "run").read_text(encoding="utf-8")
    assert test_command in ci.splitlines()


def test_cautions_are_stated():
    for phrase in ("decision support only", "Local public-health judgement", "aggregated counts only"):
        assert phrase in README
