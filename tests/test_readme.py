"""The README's promises: its set-up section has exactly two commands, the
test command sets up what it needs (tests/setup.sh: installs what is missing,
or stops with one line before any test when it cannot) and is what CI runs,
the cautions are stated, and the Python example of the analysts' guide runs."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")
# The README is a front door; the analysts' guide (with the Python example) lives beside its code.
GUIDE = (ROOT / "service" / "analysis" / "GUIDE.md").read_text(encoding="utf-8")


def setup_commands() -> list[str]:
    """The ```sh blocks between "## Set-up" and the next "## " heading."""
    section = README.split("\n## Set-up", 1)[1]
    section = re.split(r"^## ", section, maxsplit=1, flags=re.M)[0]
    return [c.strip() for c in re.findall(r"```sh\n(.*?)```", section, re.S)]


def test_python_example_runs(tmp_path):
    blocks = re.findall(r"```python\n(.*?)```", GUIDE, re.S)
    assert blocks, "the analysts' guide has no python example"
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
    commands = setup_commands()
    assert len(commands) == 2
    assert "casecloud demo" in commands[0]
    assert "\n" not in commands[1], "the test command must be one copy-pasteable line"
    assert "pytest" in commands[1]
    # The command's set-up script installs the project with its test extra.
    scripts = re.findall(r"bash (\S+\.sh)", commands[1])
    assert scripts, f"the test command runs no set-up script: {commands[1]}"
    script = (ROOT / scripts[0]).read_text(encoding="utf-8")
    assert re.search(r"pip install -e '\.\[test\]'", script), f"{scripts[0]} does not install '.[test]'"


def test_ci_runs_the_readme_test_command():
    test_command = setup_commands()[1]
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert test_command in ci.splitlines()


def test_cautions_are_stated():
    for name, text in (("README.md", README), ("service/analysis/GUIDE.md", GUIDE)):
        for phrase in ("decision support only", "Local public-health judgement", "aggregated counts only"):
            assert phrase in text, f"{name} lacks {phrase!r}"


def _path_without(tmp_path: Path, hidden: set[str], fakes: dict[str, str]) -> str:
    """A PATH of one directory: every command of the current PATH except `hidden`, plus `fakes`."""
    bindir = tmp_path / "bin"
    bindir.mkdir()
    for directory in os.environ.get("PATH", "").split(os.pathsep):
        if not directory or not Path(directory).is_dir():
            continue
        for entry in Path(directory).iterdir():
            target = bindir / entry.name
            if entry.name in hidden or entry.name in fakes or target.exists() or target.is_symlink():
                continue
            if entry.is_file() and os.access(entry, os.X_OK):
                target.symlink_to(entry)
    for name, body in fakes.items():
        (bindir / name).write_text("#!/bin/sh\n" + body + "\n", encoding="utf-8")
        (bindir / name).chmod(0o755)
    return str(bindir)


def _run_readme_command_without_kcat(tmp_path: Path, hidden: set[str], fakes: dict[str, str]):
    # A checkout of our own: the README's set-up script, and a .venv whose python only records how
    # it was called (so a test can tell whether the command got as far as starting pytest).
    root = tmp_path / "checkout"
    (root / "tests").mkdir(parents=True)
    shutil.copy2(ROOT / "tests" / "setup.sh", root / "tests" / "setup.sh")
    shutil.copy2(ROOT / "pyproject.toml", root / "pyproject.toml")
    (root / ".venv" / "bin").mkdir(parents=True)
    marker = tmp_path / "python-started"
    fake_python = root / ".venv" / "bin" / "python"
    fake_python.write_text(f'#!/bin/sh\necho "$@" >> "{marker}"\n', encoding="utf-8")
    fake_python.chmod(0o755)
    env = {"PATH": _path_without(tmp_path, hidden | {"kcat", "sudo"}, fakes), "HOME": str(tmp_path), "LANG": "C.UTF-8"}
    done = subprocess.run(
        ["/bin/bash", "-c", setup_commands()[1]], cwd=root, env=env, capture_output=True, text=True, timeout=120
    )
    return done, marker


def _assert_one_clear_line(done, marker: Path, because: str) -> None:
    assert done.returncode != 0
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1, f"expected one line on stderr, got:\n{done.stderr}"
    line = lines[0]
    assert line.startswith("tests/setup.sh: missing ") and "kcat" in line, line
    assert because in line, line
    assert "apt-get install -y" in line and "kcat" in line.split("apt-get install -y", 1)[1], line
    assert done.stdout == "", done.stdout
    assert not marker.exists(), f"the command went on to run .venv/bin/python {marker.read_text()}"


def test_setup_stops_with_one_line_without_a_package_manager(tmp_path):
    done, marker = _run_readme_command_without_kcat(tmp_path, {"apt-get"}, {})
    _assert_one_clear_line(done, marker, "no apt-get on PATH")


def test_setup_stops_with_one_line_when_not_root_and_no_sudo(tmp_path):
    apt_called = tmp_path / "apt-get-called"
    fakes = {"id": "echo 1000", "apt-get": f'echo "$@" >> "{apt_called}"; exit 1'}
    done, marker = _run_readme_command_without_kcat(tmp_path, set(), fakes)
    _assert_one_clear_line(done, marker, "not root and no password-less sudo")
    assert not apt_called.exists(), "apt-get was called without root"


def test_setup_installs_what_is_missing_then_runs_pytest(tmp_path):
    # kcat is missing and apt-get (a stand-in, run as root) provides it: the script updates the
    # package lists, installs exactly the missing package, checks again and goes on to the tests.
    bindir = tmp_path / "bin"
    apt_log = tmp_path / "apt-get-calls"
    kcat = shutil.which("kcat") or "/bin/true"
    fakes = {
        "id": "echo 0",
        "apt-get": f'echo "$@" >> "{apt_log}"\ncase "$*" in *install*) ln -s "{kcat}" "{bindir}/kcat";; esac',
    }
    done, marker = _run_readme_command_without_kcat(tmp_path, set(), fakes)
    assert done.returncode == 0, done.stderr
    calls = apt_log.read_text().splitlines()
    assert calls[0].endswith("update") and "install" in calls[1] and calls[1].split()[-1] == "kcat", calls
    assert "tests/setup.sh: installing kcat (missing: kcat)" in done.stdout
    # The checkout's stand-in .venv/bin/python answers every check; the last call is the suite.
    assert marker.read_text().splitlines()[-1] == "-m pytest"
