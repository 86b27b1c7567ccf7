"""The ``casecloud`` command line."""

from __future__ import annotations

import argparse
import asyncio
import logging
import os
import signal
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

import orjson

__all__ = ["main", "build_parser"]

# The per-particle matrix products are small; BLAS threads only add contention
# with the service's own worker thread. Set before numpy is imported.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")


def _load_config(path: str):
    from schemas import SpecError, load_deployment_config

    try:
        return load_deployment_config(path)
    except SpecError as exc:
        print(f"casecloud: {exc}", file=sys.stderr)
        raise SystemExit(2) from None


async def _serve(config, transport, until_exhausted: bool, progress=None) -> dict[str, int]:
    from .app import Service

    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, stop.set)
    service = Service(config, transport, on_outcome=progress)
    return await service.run(stop, until_exhausted=until_exhausted)


def _progress_printer(every: int = 100):
    seen = {"n": 0}

    def show(outcome) -> None:
        seen["n"] += 1
        if seen["n"] % every == 0:
            print(f"casecloud: {seen['n']} records handled", file=sys.stderr, flush=True)

    return show


def _run_service(config, transport, until_exhausted: bool, progress=None) -> int:
    from .errors import ServiceError

    try:
        counts = asyncio.run(_serve(config, transport, until_exhausted, progress))
    except ServiceError as exc:
        print(f"casecloud: {exc}", file=sys.stderr)
        return 1
    print(orjson.dumps(counts).decode(), file=sys.stderr)
    return 0


def cmd_serve(args: argparse.Namespace) -> int:
    config = _load_config(args.config)
    if config.transport == "kafka":
        from .transports.kafka import KafkaTransport

        transport = KafkaTransport(config.kafka, config.service.max_message_bytes)
        return _run_service(config, transport, until_exhausted=False)
    from .transports import FileTransport

    return _run_service(config, FileTransport(config.file.input, config.file.output_dir), until_exhausted=args.exit_at_end)


def cmd_replay(args: argparse.Namespace) -> int:
    from .transports import FileTransport

    config = _load_config(args.config)
    out = Path(args.out)
    if args.checkpoint_dir:
        config = config.model_copy(update={"service": config.service.model_copy(update={"checkpoint_dir": Path(args.checkpoint_dir)})})
    config = config.model_copy(update={"metrics": config.metrics.model_copy(update={"enabled": False})})
    return _run_service(config, FileTransport(Path(args.input), out), until_exhausted=True, progress=_progress_printer())


def cmd_demo(args: argparse.Namespace) -> int:
    from .demo import run_demo

    summary = run_demo(Path(args.out), days=args.days, particles=args.particles, seed=args.seed, quiet=args.quiet)
    print(summary)
    return 0


def _describe_stored(store, stream: str, info) -> dict:
    """describe_checkpoint's report for a checkpoint held in a Kafka store (via a temporary file)."""
    import tempfile

    from .checkpoints import CheckpointCorrupt, describe_checkpoint

    try:
        data = store.read_bytes(stream, info.step)
    except CheckpointCorrupt as exc:
        return {"path": str(info.path), "stored_bytes": info.size_bytes, "ok": False, "reason": exc.reason, "step": info.step}
    with tempfile.TemporaryDirectory(prefix="casecloud-show-") as tmp:
        copy = Path(tmp) / "checkpoint.ckpt"
        copy.write_bytes(data or b"")
        report = describe_checkpoint(copy)
    report.update(path=str(info.path), stored_bytes=info.size_bytes)
    return report


def cmd_checkpoint(args: argparse.Namespace) -> int:
    from .checkpoints import LocalCheckpointStore, describe_checkpoint
    from .errors import ServiceError

    if args.checkpoint_dir:
        root: object = Path(args.checkpoint_dir)
        store = LocalCheckpointStore(root)
    else:
        from .app import build_checkpoint_store

        config = _load_config(args.config)
        store = build_checkpoint_store(config)
        root = f"Kafka topic {config.service.checkpoint_topic}" if config.service.checkpoint_store == "kafka" else config.service.checkpoint_dir
    try:
        streams = [args.stream] if args.stream else store.streams()
        if not streams:
            print(f"casecloud: no checkpoints under {root}", file=sys.stderr)
            return 1
        failed = False
        for stream in streams:
            infos = store.list(stream)
            if args.action == "show":
                if not infos:
                    print(f"casecloud: stream {stream!r} has no checkpoint under {root}", file=sys.stderr)
                    failed = True
                    continue
                report = describe_checkpoint(infos[0].path) if isinstance(store, LocalCheckpointStore) else _describe_stored(store, stream, infos[0])
                print(orjson.dumps(report, option=orjson.OPT_INDENT_2 | orjson.OPT_SERIALIZE_NUMPY, default=str).decode())
            else:
                for report in store.verify(stream):
                    print(f"{stream}\t{report.path}\t{'ok' if report.ok else 'CORRUPT: ' + str(report.reason)}")
                    failed |= not report.ok
        return 1 if failed else 0
    except ServiceError as exc:  # e.g. the Kafka checkpoint topic cannot be reached
        print(f"casecloud: {exc}", file=sys.stderr)
        return 1
    finally:
        close = getattr(store, "close", None)
        if close is not None:
            close()


def cmd_schemas(args: argparse.Namespace) -> int:
    from schemas import MESSAGE_MODELS, json_schema

    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    for name in MESSAGE_MODELS:
        (out / f"{name}.json").write_bytes(orjson.dumps(json_schema(name), option=orjson.OPT_INDENT_2 | orjson.OPT_SORT_KEYS) + b"\n")
        print(out / f"{name}.json")
    return 0


def _bench(args: argparse.Namespace) -> int:
    from .bench import run_bench_command

    return run_bench_command(args)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="casecloud",
        description="Streaming particle-filter estimates and exceedance alerts for surveillance counts.",
    )
    parser.add_argument("-v", "--verbose", action="store_true", help="log progress (INFO)")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    demo = sub.add_parser("demo", help="run a made-up season end to end over the file transport (no broker)")
    demo.add_argument("--out", default="casecloud-demo", help="output directory (default: ./casecloud-demo)")
    demo.add_argument("--days", type=int, default=120, help="days to simulate (default 120)")
    demo.add_argument("--particles", type=int, default=2000, help="particles in the cloud (default 2000)")
    demo.add_argument("--seed", type=int, default=7, help="seed of the hidden truth (default 7)")
    demo.add_argument("--quiet", action="store_true", help="no progress lines")
    demo.set_defaults(handler=cmd_demo)

    serve = sub.add_parser("serve", help="run the service with a deployment config (Kafka or files)")
    serve.add_argument("--config", required=True, help="deployment config TOML")
    serve.add_argument("--exit-at-end", action="store_true", help="file transport: stop when the input ends")
    serve.set_defaults(handler=cmd_serve)

    replay = sub.add_parser("replay", help="run a file of observations through a config, offline")
    replay.add_argument("--config", required=True)
    replay.add_argument("--input", required=True, help="NDJSON observations")
    replay.add_argument("--out", required=True, help="directory for estimates, alerts, dead letters")
    replay.add_argument("--checkpoint-dir", help="override the config's checkpoint directory")
    replay.set_defaults(handler=cmd_replay)

    ckpt = sub.add_parser("checkpoint", help="inspect saved stream state")
    ckpt.add_argument("action", choices=["show", "verify"])
    where = ckpt.add_mutually_exclusive_group(required=True)
    where.add_argument("--config", help="deployment config (uses its checkpoint store: checkpoint_dir or the Kafka checkpoint_topic)")
    where.add_argument("--checkpoint-dir", help="checkpoint root directory")
    ckpt.add_argument("--stream", help="one stream id (default: all)")
    ckpt.set_defaults(handler=cmd_checkpoint)

    sch = sub.add_parser("schemas", help="write the JSON Schema of every message")
    sch.add_argument("--out", required=True)
    sch.set_defaults(handler=cmd_schemas)

    from .scenario import add_scenario_parser

    add_scenario_parser(sub)

    from .calibrate import add_calibrate_parser

    add_calibrate_parser(sub)

    from .report import add_report_parser

    add_report_parser(sub)

    from .backtest import add_backtest_parser

    add_backtest_parser(sub)

    bench = sub.add_parser("bench", help="measure update speed and memory against in-process baselines")
    bench.add_argument("--json", action="store_true", help="print the figures as JSON")
    bench.add_argument("--particles", type=int, default=10_000, help="particles in the reference workload")
    bench.add_argument("--repeats", type=int, default=5, help="timed repetitions per figure (median reported)")
    bench.add_argument(
        "--sections",
        default="update,service,forecast",
        help="comma-separated workloads: update (filter step vs floor and naive loop), "
        "service (end to end through Kafka vs the engine alone), forecast (3 intervention scenarios "
        "with common random numbers vs their binomial floor); default: update,service,forecast",
    )
    bench.add_argument("--kafka-bootstrap", help="service section: use this broker instead of starting a local one")
    bench.set_defaults(handler=_bench)
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
    return handler(args)


if __name__ == "__main__":
    sys.exit(main())
