"""The runtime's commands: ``serve``, ``replay`` and ``schemas`` (the message contracts)."""

from __future__ import annotations

import argparse
import asyncio
import signal
import sys
from pathlib import Path

import orjson

from ..console import Progress, load_config

__all__ = ["add_runtime_parsers"]


async def _serve(config, transport, until_exhausted: bool, progress=None) -> dict[str, int]:
    from .app import Service

    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, stop.set)
    service = Service(config, transport, on_outcome=progress)
    return await service.run(stop, until_exhausted=until_exhausted)


def _count_lines(path: Path) -> int:
    """Lines in a file, a last line without a newline included (each is one record of the file transport)."""
    lines, last = 0, b"\n"
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            lines += chunk.count(b"\n")
            last = chunk[-1:]
    return lines + (last != b"\n")


def _replay_progress(transport, total: int, shown):
    """An ``on_outcome`` hook showing how far into the input file the replay is.

    The file transport's offset is the line number, so the position is the
    offset after the last record read; a replay resumed part-way starts there.
    """
    receive = transport.receive
    position = {"next": 0}

    async def receive_and_note(timeout: float = 1.0):
        record = await receive(timeout)
        if record is not None:
            position["next"] = record.offset + 1
        return record

    transport.receive = receive_and_note

    def show(outcome) -> None:
        shown.update(position["next"], total)

    return show


def _run_service(config, transport, until_exhausted: bool, progress=None, shown=None) -> int:
    from ..errors import ServiceError

    def end_progress() -> None:  # before anything else is printed, so a terminal's progress line is ended
        if shown is not None:
            shown.finish()

    try:
        counts = asyncio.run(_serve(config, transport, until_exhausted, progress))
    except ServiceError as exc:
        end_progress()
        print(f"casecloud: {exc}", file=sys.stderr)
        return 1
    except BaseException:
        end_progress()
        raise
    end_progress()
    print(orjson.dumps(counts).decode(), file=sys.stderr)
    return 0


def cmd_serve(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    if config.transport == "kafka":
        from ..transports.kafka import KafkaTransport

        transport = KafkaTransport(config.kafka, config.service.max_message_bytes)
        return _run_service(config, transport, until_exhausted=False)
    from ..transports import FileTransport

    return _run_service(config, FileTransport(config.file.input, config.file.output_dir), until_exhausted=args.exit_at_end)


def cmd_replay(args: argparse.Namespace) -> int:
    from ..transports import FileTransport

    config = load_config(args.config)
    out = Path(args.out)
    if args.checkpoint_dir:
        config = config.model_copy(update={"service": config.service.model_copy(update={"checkpoint_dir": Path(args.checkpoint_dir)})})
    config = config.model_copy(update={"metrics": config.metrics.model_copy(update={"enabled": False})})
    source = Path(args.input)
    try:
        total = _count_lines(source)
    except OSError:
        total = 0  # the transport reports the unreadable input as before
    transport = FileTransport(source, out)
    shown = Progress("replay", total, "lines")
    return _run_service(config, transport, until_exhausted=True, progress=_replay_progress(transport, total, shown), shown=shown)


def cmd_schemas(args: argparse.Namespace) -> int:
    from schemas import MESSAGE_MODELS, json_schema

    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    for name in MESSAGE_MODELS:
        (out / f"{name}.json").write_bytes(orjson.dumps(json_schema(name), option=orjson.OPT_INDENT_2 | orjson.OPT_SORT_KEYS) + b"\n")
        print(out / f"{name}.json")
    return 0


def add_runtime_parsers(sub) -> None:
    """``serve``, ``replay`` and ``schemas``."""
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


def add_schemas_parser(sub) -> None:
    sch = sub.add_parser("schemas", help="write the JSON Schema of every message")
    sch.add_argument("--out", required=True)
    sch.set_defaults(handler=cmd_schemas)
