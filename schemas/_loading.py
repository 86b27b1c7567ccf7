"""Read TOML into pydantic models with errors that point at file, line and field."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path
from typing import Any, TypeVar

from pydantic import BaseModel, ValidationError

from ._errors import SpecError

__all__ = ["load_toml_model", "validate_document"]

M = TypeVar("M", bound=BaseModel)


def _line_of(text: str, loc: tuple[Any, ...]) -> int | None:
    """Best-effort line number of the field at ``loc`` in TOML text.

    Follows ``[[table]]`` arrays by index (``flows[2].rate`` looks after the
    third ``[[flows]]``), then finds the last named key from there. Nested
    arrays are counted from their parent's header on
    (``scenarios[1].interventions[0]`` is the first ``[[scenarios.interventions]]``
    after the second ``[[scenarios]]``).
    """
    parts = [k for k in loc if not (isinstance(k, str) and k.startswith(("function-", "tagged-")))]
    position = 0
    for key, nxt in zip(parts, parts[1:]):
        if isinstance(key, str) and isinstance(nxt, int):
            header = re.compile(rf"^[ \t]*\[\[[ \t]*([\w.-]*\.)?{re.escape(key)}[ \t]*\]\]", re.M)
            headers = list(header.finditer(text, position))
            if len(headers) > nxt:
                position = headers[nxt].start()
    for key in reversed([k for k in parts if isinstance(k, str)]):
        pattern = re.compile(rf'^[ \t]*(\[+[ \t]*)?([\w."-]*\.)?"?{re.escape(key)}"?[ \t]*(=|\]|\.)', re.M)
        match = pattern.search(text, position) or pattern.search(text)
        if match:
            return text.count("\n", 0, match.start()) + 1
    return None


def _format_loc(loc: tuple[Any, ...]) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        elif isinstance(part, str) and part.startswith(("function-", "tagged-")):
            continue
        else:
            out += ("." if out else "") + str(part)
    return out or "(top level)"


def validate_document(model: type[M], data: Any, source: str, text: str | None = None) -> M:
    """Validate parsed data; on failure raise one SpecError listing every problem."""
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        problems = []
        for err in exc.errors():
            loc = tuple(err.get("loc", ()))
            where = source
            line = _line_of(text, loc) if text else None
            if line is not None:
                where += f":{line}"
            given = err.get("input")
            secret = any(isinstance(k, str) and ("password" in k or "secret" in k) for k in loc)
            given_text = "" if isinstance(given, dict) else " (given a value, not shown)" if secret else f" (given {given!r})"
            msg = err["msg"].removeprefix("Value error, ")
            problems.append(f"{where}: field {_format_loc(loc)}: {msg}{given_text}")
        raise SpecError(
            f"{len(problems)} problem(s) in {source}:\n  " + "\n  ".join(problems), problems
        ) from None


def load_toml_model(model: type[M], path: str | Path) -> M:
    """Load a TOML file into ``model``; every error names the file."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise SpecError(f"{path}: cannot read file: {exc.strerror}") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"{path}: not valid TOML: {exc}") from None
    return validate_document(model, data, str(path), text)
