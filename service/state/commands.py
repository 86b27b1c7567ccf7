"""``casecloud checkpoint show|verify``: inspect saved stream state in any store."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import orjson

from ..console import load_config

__all__ = ["add_checkpoint_parser"]


def _describe_stored(store, stream: str, info) -> dict:
    """describe_checkpoint's report for a checkpoint held in a Kafka store (via a temporary file)."""
    import tempfile

    from .format import CheckpointCorrupt, describe_checkpoint

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
    from ..errors import ServiceError
    from .format import describe_checkpoint
    from .local import LocalCheckpointStore
    from .store import build_checkpoint_store

    if args.checkpoint_dir:
        root: object = Path(args.checkpoint_dir)
        store = LocalCheckpointStore(root)
    else:
        config = load_config(args.config)
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


def add_checkpoint_parser(sub) -> None:
    ckpt = sub.add_parser("checkpoint", help="inspect saved stream state")
    ckpt.add_argument("action", choices=["show", "verify"])
    where = ckpt.add_mutually_exclusive_group(required=True)
    where.add_argument("--config", help="deployment config (uses its checkpoint store: checkpoint_dir or the Kafka checkpoint_topic)")
    where.add_argument("--checkpoint-dir", help="checkpoint root directory")
    ckpt.add_argument("--stream", help="one stream id (default: all)")
    ckpt.set_defaults(handler=cmd_checkpoint)
