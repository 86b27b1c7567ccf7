"""The ``casecloud`` command line: a thin dispatcher.

Each command's parser and handler live with the command: the runtime's in
``runtime/commands.py``, checkpoints' in ``state/commands.py``, the analysts'
in ``analysis/`` and the benchmark's in ``bench/command.py``.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
from collections.abc import Callable, Sequence

from .allocator import tune_allocator

__all__ = ["main", "build_parser"]

# The per-particle matrix products are small; BLAS threads only add contention
# with the service's own worker thread. Set before numpy is imported.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")


def build_parser() -> argparse.ArgumentParser:
    from .analysis.backtest import add_backtest_parser
    from .analysis.calibrate import add_calibrate_parser
    from .analysis.check import add_check_parser
    from .analysis.demo import add_demo_parser
    from .analysis.report import add_report_parser
    from .analysis.scenario import add_scenario_parser
    from .bench.command import add_bench_parser
    from .broker import add_broker_parser
    from .runtime.commands import add_runtime_parsers, add_schemas_parser
    from .runtime.recovery import add_stream_parser
    from .state.commands import add_checkpoint_parser

    parser = argparse.ArgumentParser(
        prog="casecloud",
        description="Streaming particle-filter estimates and exceedance alerts for surveillance counts.",
    )
    parser.add_argument("-v", "--verbose", action="store_true", help="log progress (INFO)")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    add_demo_parser(sub)
    add_runtime_parsers(sub)
    add_checkpoint_parser(sub)
    add_stream_parser(sub)
    add_schemas_parser(sub)
    add_scenario_parser(sub)
    add_check_parser(sub)
    add_calibrate_parser(sub)
    add_report_parser(sub)
    add_backtest_parser(sub)
    add_bench_parser(sub)
    add_broker_parser(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=logging.INFO if args.verbose or args.command == "serve" else logging.WARNING,
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
        stream=sys.stderr,
    )
    handler: Callable[[argparse.Namespace], int] = args.handler
    tune_allocator()
    try:
        return handler(args)
    except BrokenPipeError:
        # The reader went away (e.g. `| head`): stop quietly, as command-line tools do.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1


if __name__ == "__main__":
    sys.exit(main())
