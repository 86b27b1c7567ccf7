"""What every command shares: reading a deployment config with a clear error."""

from __future__ import annotations

import sys

__all__ = ["load_config"]


def load_config(path: str):
    """The deployment config at ``path``, or exit 2 with the loader's message."""
    from schemas import SpecError, load_deployment_config

    try:
        return load_deployment_config(path)
    except SpecError as exc:
        print(f"casecloud: {exc}", file=sys.stderr)
        raise SystemExit(2) from None
