"""The model-spec reference (schemas/REFERENCE.md) shows one TOML example per series kind, and
every example there is valid: it parses as TOML and each table validates against the spec schema."""

from __future__ import annotations

import re
import tomllib
import typing
from pathlib import Path

from schemas import Flow, Parameter, Series

REFERENCE = Path(__file__).resolve().parents[1] / "schemas" / "REFERENCE.md"


def _spec_part() -> str:
    text = REFERENCE.read_text(encoding="utf-8")
    return text[text.index("## Model specs") : text.index("## Scenario files")]


def _toml_blocks() -> list[dict]:
    return [tomllib.loads(block) for block in re.findall(r"```toml\n(.*?)```", _spec_part(), flags=re.DOTALL)]


def test_every_toml_example_validates():
    blocks = _toml_blocks()
    assert blocks
    for block in blocks:
        # Bug caught: an example with a key the schema refuses (a renamed field) or a wrong value.
        for s in block.get("series", []):
            Series.model_validate(s)
        for f in block.get("flows", []):
            Flow.model_validate(f)
        for p in block.get("parameters", {}).values():
            Parameter.model_validate(p)


def test_each_series_kind_has_its_row_and_an_example():
    kinds = set(typing.get_args(Series.model_fields["kind"].annotation))
    part = _spec_part()
    rows = set(re.findall(r"^\| `(\w+)` \|", part[part.index("### Series kinds") :], flags=re.MULTILINE))
    examples = {s["kind"] for block in _toml_blocks() for s in block.get("series", [])}
    # Bug caught: a kind added to the schema but left out of the reference (no row, no example).
    assert rows == kinds and examples == kinds
