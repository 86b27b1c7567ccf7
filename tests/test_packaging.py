"""A non-editable install must carry every subpackage and data file (a
missing ``service.transports`` once broke ``pip install . && casecloud demo``)."""

from __future__ import annotations

import fnmatch
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


def test_data_files_are_declared():
    data = PYPROJECT["tool"]["setuptools"]["package-data"]
    for package, patterns in data.items():
        for pattern in patterns:
            assert list((ROOT / package).glob(pattern)), f"{package}/{pattern} matches no file"
    for package in ("schemas",):
        shipped = {p.relative_to(ROOT / package).as_posix() for p in (ROOT / package).rglob("*") if p.suffix in (".toml", ".json")}
        covered = {f for f in shipped if any(fnmatch.fnmatch(f, pat) for pat in data[package])}
        assert shipped == covered, f"data files not declared in package-data: {sorted(shipped - covered)}"
