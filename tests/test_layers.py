"""The rooms of the code base and which way their imports may point.

filters -> schemas only; service -> filters, schemas. Inside service:
transports < state < runtime < analysis, bench; cli sees everything. A
plausible regression this catches: a runtime module importing a report
helper, which would make the streaming service load matplotlib.
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

# room -> rooms it must never import (absolute module prefixes)
FORBIDDEN = {
    "filters": ["service", "aiokafka", "asyncio"],
    "schemas": ["service", "filters"],
    "service.transports": ["service.state", "service.runtime", "service.analysis", "service.bench"],
    "service.state": ["service.runtime", "service.analysis", "service.bench"],
    "service.runtime": ["service.analysis", "service.bench"],
    "service.analysis": ["service.bench"],
}


def _imports(path: Path, module: str) -> list[str]:
    """Absolute names of every module ``path`` imports (relative imports resolved)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = module.split(".") if path.name == "__init__.py" else module.split(".")[:-1]
    names = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = package[: len(package) - node.level + 1] if node.level else []
            target = ".".join([*base, node.module] if node.module else base)
            names.append(target)
            names += [f"{target}.{a.name}" for a in node.names]
    return names


def _modules(room: str):
    folder = ROOT.joinpath(*room.split("."))
    for path in sorted(folder.rglob("*.py")):
        parts = path.relative_to(ROOT).with_suffix("").parts
        yield path, ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def test_imports_point_one_way():
    bad = []
    for room, forbidden in FORBIDDEN.items():
        for path, module in _modules(room):
            for name in _imports(path, module):
                if any(name == f or name.startswith(f + ".") for f in forbidden):
                    bad.append(f"{path.relative_to(ROOT)} imports {name}")
    assert not bad, "\n".join(bad)


def test_the_checker_sees_relative_imports(tmp_path):
    # the negative control: a relative import from runtime into analysis is resolved and caught
    fake = tmp_path / "service" / "runtime" / "x.py"
    fake.parent.mkdir(parents=True)
    fake.write_text("from ..analysis.report import cmd_report\n", encoding="utf-8")
    assert "service.analysis.report" in _imports(fake, "service.runtime.x")
