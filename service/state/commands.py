"""``casecloud checkpoint show|verify``: inspect saved stream state in any store.

``show`` prints, per stream, a short summary of its newest checkpoint (file and
integrity, size, step, last period, particles and effective sample size of the
stored weights, alert states, last source position); ``show --json`` prints the
full report instead (``describe_checkpoint``: header, arrays, checksum).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import orjson

from ..console import load_config

__all__ = ["add_checkpoint_parser", "format_checkpoint_summary"]


def _describe_stored(store, stream: str, info) -> tuple[dict, bytes | None]:
    """describe_checkpoint's report for a checkpoint held in a Kafka store (via a temporary file), and its bytes."""
    import tempfile

    from .format import CheckpointCorrupt, describe_checkpoint

    try:
        data = store.read_bytes(stream, info.step)
    except CheckpointCorrupt as exc:
        return {"path": str(info.path), "stored_bytes": info.size_bytes, "ok": False, "reason": exc.reason, "step": info.step}, None
    with tempfile.TemporaryDirectory(prefix="casecloud-show-") as tmp:
        copy = Path(tmp) / "checkpoint.ckpt"
        copy.write_bytes(data or b"")
        report = describe_checkpoint(copy)
    report.update(path=str(info.path), stored_bytes=info.size_bytes)
    return report, data


def _describe_local(info) -> tuple[dict, bytes | None]:
    from .format import describe_checkpoint

    report = describe_checkpoint(info.path)
    try:
        data = Path(info.path).read_bytes() if report["ok"] else None
    except OSError:  # pruned by a concurrent write since it was described
        data = None
    return report, data


def _effective_sample_size(report: dict, data: bytes | None) -> str:
    """"1843 of 2000 (92%)" from the checkpoint's stored log-weights, or why it cannot be said."""
    from filters import effective_sample_size, normalised_weights

    from .format import CheckpointError, decode_checkpoint

    if data is None:
        return "- (the checkpoint cannot be read)"
    try:
        log_weights = decode_checkpoint(Path(report["path"]), data).arrays.get("log_weights")
    except CheckpointError as exc:
        return f"- ({exc})"
    if log_weights is None or log_weights.ndim != 1 or log_weights.size == 0:
        return "- (no log_weights array in the checkpoint)"
    try:
        ess = effective_sample_size(normalised_weights(log_weights))
    except ValueError:
        return f"0 of {log_weights.size} (no particle has positive weight)"
    return f"{ess:.0f} of {log_weights.size} ({100 * ess / log_weights.size:.0f}%)"


def _alert_state(name: str, state: object) -> str:
    if not isinstance(state, dict):
        return f"{name}: {state!r}"
    probability = state.get("last_probability")
    p = f"{probability:.2f}" if isinstance(probability, (int, float)) else None
    if state.get("active"):
        return f"{name}: RAISED (alert {state.get('alert_id')}" + (f", last published probability {p})" if p else ")")
    above = state.get("above") or 0
    if state.get("alert_id"):
        text = f"{name}: clear (alert {state.get('alert_id')} cleared" + (f" at probability {p})" if p else ")")
    else:
        text = f"{name}: clear"
    if above:
        text += f", {above} consecutive update(s) at or above the raise level"
    return text


def _position(key: str, offset: object) -> str:
    topic, sep, partition = key.rpartition("|")
    where = f"{topic} partition {partition}" if sep else key
    return f"{where}, offset {offset} (the last record applied)"


def format_checkpoint_summary(stream: str, report: dict, data: bytes | None) -> str:
    """The human-readable summary of ``checkpoint show`` for one stream's newest checkpoint.

    ``report`` is the JSON report (``describe_checkpoint``'s, as ``--json`` prints it);
    ``data`` the file's bytes when they could be read (for the effective sample size).
    """
    header = report.get("header") if isinstance(report.get("header"), dict) else {}
    filt = header.get("filter") if isinstance(header.get("filter"), dict) else {}
    size = report.get("size_bytes", report.get("stored_bytes"))
    state = "intact" if report.get("ok") else f"DAMAGED: {report.get('reason')}"
    lines = [
        f"stream {stream}",
        f"  checkpoint     {report.get('path')} ({state})",
        f"  size           {f'{size:,} bytes' if isinstance(size, int) else '-'}",
        f"  step           {report.get('step') if report.get('step') is not None else '-'} (records assimilated)",
    ]
    if not header:
        return "\n".join(lines + ["  (the header cannot be read: nothing more can be said)"])
    model = header.get("model", "-")
    fingerprint = filt.get("model_fingerprint") or header.get("model_fingerprint")
    if "last_period" in header and header["last_period"] is None:  # a new stream's prior, kept before any record applied
        period = "none yet: the cloud is still its prior ("
    else:
        period = f"{header.get('last_period', '-')} (model day {header.get('last_day', '-')}; "
    lines.append(f"  last period    {period}model {model}" + (f", fingerprint {fingerprint})" if fingerprint else ")"))
    config = filt.get("config") if isinstance(filt.get("config"), dict) else {}
    particles = config.get("n_particles", "-")
    lines.append(f"  particles      {particles}; effective sample size {_effective_sample_size(report, data)}")
    alerts = header.get("alerts") if isinstance(header.get("alerts"), dict) else {}
    rules = [_alert_state(name, alerts[name]) for name in sorted(alerts)] or ["no alert rules"]
    lines.append(f"  alerts         {rules[0]}")
    lines += [f"                 {r}" for r in rules[1:]]
    positions = header.get("positions") if isinstance(header.get("positions"), dict) else {}
    places = [_position(k, positions[k]) for k in sorted(positions)] or ["none recorded"]
    lines.append(f"  last position  {places[0]}")
    lines += [f"                 {p}" for p in places[1:]]
    return "\n".join(lines)


def cmd_checkpoint(args: argparse.Namespace) -> int:
    from ..errors import ServiceError
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
        shown = 0
        for stream in streams:
            infos = store.list(stream)
            if args.action == "show":
                if not infos:
                    print(f"casecloud: stream {stream!r} has no checkpoint under {root}", file=sys.stderr)
                    failed = True
                    continue
                if isinstance(store, LocalCheckpointStore):
                    report, data = _describe_local(infos[0])
                else:
                    report, data = _describe_stored(store, stream, infos[0])
                if args.json:
                    print(orjson.dumps(report, option=orjson.OPT_INDENT_2 | orjson.OPT_SERIALIZE_NUMPY, default=str).decode())
                else:
                    if shown:
                        print()
                    print(format_checkpoint_summary(stream, report, data))
                    shown += 1
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
    ckpt.add_argument(
        "--json", action="store_true",
        help="show: the newest checkpoint's full report as JSON (header, arrays, checksum) instead of the summary",
    )
    ckpt.set_defaults(handler=cmd_checkpoint)
