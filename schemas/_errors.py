"""Errors raised while reading configuration and model specs."""

from __future__ import annotations

__all__ = ["SpecError"]


class SpecError(ValueError):
    """A model spec or config file is invalid.

    The message names the file (and line where it can be found), the field,
    what was given and what is allowed. ``problems`` holds one entry per error.
    """

    def __init__(self, message: str, problems: list[str] | None = None) -> None:
        super().__init__(message)
        self.problems = problems or [message]
