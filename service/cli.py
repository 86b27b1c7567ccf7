"""The ``casecloud`` command line."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence

__all__ = ["main"]


def _bench(args: argparse.Namespace) -> int:
    from .bench import run_bench_command

    return run_bench_command(args)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="casecloud",
        description="Streaming particle-filter estimates and exceedance alerts for surveillance counts.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    bench = sub.add_parser("bench", help="measure update speed and memory against in-process baselines")
    bench.add_argument("--json", action="store_true", help="print the figures as JSON")
    bench.add_argument("--particles", type=int, default=10_000, help="particles in the reference workload")
    bench.add_argument("--repeats", type=int, default=5, help="timed repetitions per figure (median reported)")
    bench.set_defaults(handler=_bench)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    handler: Callable[[argparse.Namespace], int] = args.handler
    return handler(args)


if __name__ == "__main__":
    sys.exit(main())
