"""A non-editable install must carry every subpackage and data file (a
missing ``service.transports`` once broke ``pip install . && casecloud demo``;
a broker launcher kept outside the package once broke ``casecloud bench``
from a plain install)."""

from __future__ import annotations

import fnmatch
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))


def _packages() -> list[str]:
    found = []
    for top in ("filters", "schemas", "service"):
        for init in (ROOT / top).rglob("__init__.py"):
            found.append(".".join(init.parent.relative_to(ROOT).parts))
    return sorted(found)


def test_every_package_is_included():
    include = PYPROJECT["tool"]["setuptools"]["packages"]["find"]["include"]
    missing = [p for p in _packages() if not any(fnmatch.fnmatch(p, pat) for pat in include)]
    assert not missing, f"packages not matched by tool.setuptools.packages.find.include: {missing}"


DATA_SUFFIXES = (".toml", ".json", ".xml")


def _data_files(package: str) -> set[str]:
    """Files a package needs at run time besides its modules, relative to the package."""
    folder = ROOT.joinpath(*package.split("."))
    return {
        p.relative_to(folder).as_posix()
        for p in folder.rglob("*")
        if p.suffix in DATA_SUFFIXES and "__pycache__" not in p.parts
        and not any((folder / sub / "__init__.py").is_file() for sub in p.relative_to(folder).parents if str(sub) != ".")
    }


def test_data_files_are_declared():
    data = PYPROJECT["tool"]["setuptools"]["package-data"]
    for package, patterns in data.items():
        for pattern in patterns:
            assert list(ROOT.joinpath(*package.split(".")).glob(pattern)), f"{package}/{pattern} matches no file"
    for package in _packages():
        shipped = _data_files(package)
        covered = {f for f in shipped if any(fnmatch.fnmatch(f, pat) for pat in data.get(package, []))}
        assert shipped == covered, f"data files of {package} not declared in package-data: {sorted(shipped - covered)}"
    assert "pom.xml" in _data_files("service.broker")  # the broker launcher's Maven file


def test_a_build_carries_the_data_files_and_the_broker_finds_its_pom(tmp_path):
    """setuptools' build_py (what a wheel is made of) on a copy of the source, then the
    packaged broker launcher imported from that build: it must read the Kafka version
    from the pom.xml beside it, with no source checkout around."""
    src = tmp_path / "src"
    src.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, src / name)
    for top in ("filters", "schemas", "service"):
        shutil.copytree(ROOT / top, src / top, ignore=shutil.ignore_patterns("__pycache__"))
    lib = tmp_path / "lib"
    done = subprocess.run(
        [sys.executable, "-c", "from setuptools import setup; setup()", "-q", "build_py", "--build-lib", str(lib)],
        cwd=src, capture_output=True, text=True, timeout=300,
    )
    assert done.returncode == 0, done.stderr
    for package in _packages():
        for f in _data_files(package):
            assert lib.joinpath(*package.split("."), f).is_file(), f"{package}/{f} is missing from the build"
    probe = subprocess.run(
        [sys.executable, "-c", "from service.broker import launcher; print(launcher.POM); print(launcher.KAFKA_VERSION)"],
        cwd=tmp_path, env={"PYTHONPATH": str(lib), "PATH": "/usr/bin:/bin"}, capture_output=True, text=True, timeout=60,
    )
    assert probe.returncode == 0, probe.stderr
    pom, version = probe.stdout.split()
    assert Path(pom) == lib / "service" / "broker" / "pom.xml"
    assert version.count(".") == 2 and version.startswith("3.")
