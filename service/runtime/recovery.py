"""Operator commands for a stream's saved state: ``casecloud stream rebuild|reset``.

A stream that was advanced before but has no checkpoint is held by the
service (its records become dead letters ``needs_recovery``). An operator then
either **rebuilds** its cloud offline from the retained history, or **resets**
it to start from the prior on purpose. Both write a checkpoint through the
deployment's own checkpoint store; the running service notices it at the
stream's next record and goes on from there without replaying anything itself.

``rebuild`` reads the stream's records from the input (the input file, or every
partition of the input topic from its beginning) and runs them through the same
record processor the service uses, so the cloud, its random numbers and its
input positions are exactly what an uninterrupted service would hold; records
the service held back are applied too, since they are still in the input. With
``--history CSV`` it replays a history file instead (no input positions: the
service then skips the periods the file covered as duplicates, or refuses them
as late). ``reset`` archives the stream's checkpoints (moved or copied, never
deleted) and writes a checkpoint drawn from the prior whose input positions are
the current end of the input, so only records that arrive afterwards feed it.
Every action is logged in the checkpoint header under ``operations``.
"""

from __future__ import annotations

import argparse
import asyncio
import datetime as dt
import os
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import orjson
from prometheus_client import CollectorRegistry

from schemas import DeploymentConfig

from ..console import Progress, load_config
from ..errors import ServiceError
from ..state import CheckpointStore, LocalCheckpointStore, build_checkpoint_store, encode_stream_id
from ..transports import FileTransport
from ..transports.base import OutRecord, Record, Transport
from .metrics import Metrics
from .processor import RecordProcessor
from .streams import StreamRegistry, samples_from_header

__all__ = [
    "RebuildReport",
    "add_stream_parser",
    "migrate_stream",
    "rebuild_stream",
    "reset_stream",
    "resize_stream",
    "stream_records",
]


@dataclass
class RebuildReport:
    """What a rebuild found and did."""

    stream: str
    source: str
    records: int
    applied: int = 0
    skipped: int = 0
    dead_letters: int = 0
    step: int | None = None
    period: str | None = None
    positions: dict[str, int] = field(default_factory=dict)
    written: str | None = None


def input_transport(config: DeploymentConfig) -> Transport:
    """A transport over the deployment's input, used only to read it again."""
    if config.transport == "kafka":
        from ..transports.kafka import KafkaTransport

        return KafkaTransport(config.kafka, config.service.max_message_bytes)
    if config.file.input is None:
        raise ServiceError("the deployment reads standard input, which cannot be read again; rebuild from --history CSV")
    return FileTransport(config.file.input, None)


async def stream_records(transport: Transport, stream_id: str, progress: Progress | None = None) -> list[Record]:
    """Every input record whose message names ``stream_id``, partition by partition, oldest first."""
    key = stream_id.encode()
    ends = await transport.input_ends()
    total = sum(ends.values())
    seen, found = 0, []
    for (topic, partition), end in sorted(ends.items()):
        async for record in transport.earlier(topic, partition, end):
            seen += 1
            if progress is not None and seen % 500 == 0:
                progress.update(seen, total)
            if (record.key is not None and record.key != key) or key not in record.value:
                continue
            try:
                raw = orjson.loads(record.value)
            except orjson.JSONDecodeError:
                continue
            if isinstance(raw, dict) and raw.get("stream") == stream_id:
                found.append(record)
    if progress is not None:
        progress.update(total, total)
    return found


def _history_records(config: DeploymentConfig, stream_id: str, path: Path) -> list[Record]:
    from schemas import load_history

    from schemas import message_fields

    from .streams import load_stream_model

    history = load_history(path)
    scfg = next(s for s in config.streams if s.id == stream_id)
    series = load_stream_model(scfg).series
    kinds = {s.name: getattr(s, "kind", "incidence") for s in series}
    history.check_kinds(kinds, f"stream {stream_id!r}")
    topic = f"history:{path}"
    return [
        Record(value=orjson.dumps({"stream": stream_id, "period": period,
                                   **message_fields(counts, *history.details(i), kinds, history.series)}),
               key=stream_id.encode(), topic=topic, offset=i)  # fmt: skip
        for i, (period, counts) in enumerate(zip(history.periods, history.values))
    ]


def _check_stream(config: DeploymentConfig, stream_id: str) -> None:
    known = [s.id for s in config.streams]
    if stream_id not in known:
        raise ServiceError(f"stream {stream_id!r} is not configured; configured: {known}")


def _write_outputs(out: Path, records: list[OutRecord]) -> None:
    out.mkdir(parents=True, exist_ok=True)
    names = {"estimates": "estimates.ndjson", "alerts": "alerts.ndjson", "dead_letters": "dead_letters.ndjson"}
    for kind, name in names.items():
        lines = [r.value + b"\n" for r in records if r.kind == kind]
        if lines:
            with open(out / name, "ab") as f:
                f.writelines(lines)
                f.flush()
                os.fsync(f.fileno())


def rebuild_stream(
    config: DeploymentConfig,
    stream_id: str,
    *,
    history: Path | None = None,
    out: Path | None = None,
    dry_run: bool = False,
    store: CheckpointStore | None = None,
    transport: Transport | None = None,
    show_progress: bool = True,
) -> RebuildReport:
    """Rebuild the stream's cloud from its input (or ``history``) into a checkpoint."""
    _check_stream(config, stream_id)
    with _opened(config, store) as store:
        existing = store.list(stream_id)
        if existing:
            raise ServiceError(
                f"stream {stream_id!r} already has {len(existing)} checkpoint(s) (newest step {existing[0].step}); "
                "a rebuild starts from the prior and would fork its history: reset it first (casecloud stream reset), "
                "which archives them"
            )
        if history is not None:
            records, source = _history_records(config, stream_id, history), f"history file {history}"
        else:
            reader = transport or input_transport(config)
            with Progress("reading input", 0, "records", enabled=show_progress) as shown:
                records = asyncio.run(stream_records(reader, stream_id, shown))
            source = "input topic " + config.kafka.input_topic if config.transport == "kafka" else f"input file {config.file.input}"
        report = RebuildReport(stream_id, source, len(records))
        if dry_run or not records:
            return report
        registry = StreamRegistry(config, store)
        processor = RecordProcessor(config, registry, store, Metrics(registry=CollectorRegistry()))
        outputs: list[OutRecord] = []
        last = None

        async def publish(batch: list[OutRecord]) -> None:
            outputs.extend(batch)

        async def replay() -> None:
            nonlocal last
            with Progress("rebuild", len(records), "records", enabled=show_progress) as shown:
                for i, record in enumerate(records, start=1):
                    outcome = await processor.handle(record, publish, defer_checkpoint=True)
                    if outcome.status == "applied":
                        report.applied += 1
                        last = outcome.checkpoint
                    elif outcome.status == "skipped":
                        report.skipped += 1
                    else:
                        report.dead_letters += 1
                    shown.update(i)

        asyncio.run(replay())
        if out is not None:
            _write_outputs(out, outputs)
        if last is None:
            return report
        runtime = registry.runtimes[stream_id]
        runtime.operations.append({"action": "rebuild", "source": source, "records": len(records), "at": _now()})
        checkpoint = runtime.to_checkpoint()
        info = store.write(checkpoint)
        report.step, report.period, report.positions = checkpoint.step, runtime.last_period, dict(runtime.positions)
        report.written = str(info.path)
        return report


@contextmanager
def _opened(config: DeploymentConfig, store: CheckpointStore | None) -> Iterator[CheckpointStore]:
    """The store given, or the deployment's own, opened here and closed afterwards."""
    if store is not None:
        yield store
        return
    own = build_checkpoint_store(config)
    try:
        yield own
    finally:
        close = getattr(own, "close", None)
        if close is not None:
            close()


def _now() -> str:
    return dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat()


def reset_stream(
    config: DeploymentConfig,
    stream_id: str,
    *,
    archive: Path | None = None,
    dry_run: bool = False,
    store: CheckpointStore | None = None,
    transport: Transport | None = None,
) -> dict[str, Any]:
    """Archive the stream's checkpoints and start it from the prior with the next new record."""
    _check_stream(config, stream_id)
    with _opened(config, store) as store:
        infos = store.list(stream_id)
        stamp = dt.datetime.now(dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        target = (archive or Path(f"{config.service.checkpoint_dir}-archive")) / f"{encode_stream_id(stream_id)}-{stamp}"
        reader = transport or input_transport(config)
        ends = asyncio.run(reader.input_ends())
        positions = {f"{topic}|{partition}": end - 1 for (topic, partition), end in sorted(ends.items()) if end > 0}
        plan = {
            "stream": stream_id,
            "archive": str(target) if infos else None,
            "archived_steps": [i.step for i in infos],
            "positions": positions,
        }
        if dry_run:
            return plan
        if infos:
            target.mkdir(parents=True, exist_ok=False)
            for info in infos:
                if isinstance(store, LocalCheckpointStore):
                    os.replace(info.path, target / info.path.name)  # moved, not deleted
                else:
                    data = store.read_bytes(stream_id, info.step)  # type: ignore[attr-defined]
                    (target / f"{info.step:012d}.ckpt").write_bytes(data or b"")
            if not isinstance(store, LocalCheckpointStore):
                store.forget(stream_id)  # type: ignore[attr-defined]
        registry = StreamRegistry(config, store)
        runtime = registry.from_prior(stream_id)
        runtime.positions = positions
        runtime.operations.append({"action": "reset", "archive": plan["archive"], "archived_steps": plan["archived_steps"], "at": _now()})
        info = store.write(runtime.to_checkpoint())
        plan["written"] = str(info.path)
        return plan


def _load(config: DeploymentConfig, stream_id: str, store: CheckpointStore, model=None):
    """The stream's runtime restored from its newest checkpoint (raises if it has none)."""
    registry = StreamRegistry(config, store)
    if model is not None:
        registry.models[stream_id] = model
    runtime = registry.get(stream_id)
    assert runtime is not None
    if runtime.fresh:
        raise ServiceError(f"stream {stream_id!r} has no checkpoint to change; nothing was done")
    return registry, runtime


def resize_stream(
    config: DeploymentConfig, stream_id: str, particles: int, *, dry_run: bool = False, store: CheckpointStore | None = None
) -> dict[str, Any]:
    """Change the stream's particle count: draw the new cloud from the weighted old one.

    Systematic resampling of ``particles`` indices by weight (copies of a particle
    when growing, a weighted subset when shrinking); the new particles carry equal
    weights, the same paths and parameters, and the generator goes on from its
    saved state. Logged under ``operations``; set ``particles`` in the config to
    match, or the start-up report says they differ.
    """
    import numpy as np

    from filters import resample

    _check_stream(config, stream_id)
    if not 10 <= particles <= 1_000_000:
        raise ServiceError(f"particles must be between 10 and 1000000, got {particles}")
    with _opened(config, store) as store:
        _, runtime = _load(config, stream_id, store)
        pf = runtime.filter
        before, ess = pf.config.n_particles, pf.ess()
        plan = {"stream": stream_id, "step": pf.step_count, "particles": [before, particles], "ess": ess}
        if dry_run:
            return plan
        from dataclasses import replace

        weights = pf.weights()
        # a systematic draw of the new size (the scheme's own resampler, with the stream's generator)
        index = resample(weights, pf.rng, "systematic", n=particles)
        pf.particles = pf.particles.take(index)
        pf.particles.log_weights = np.zeros(particles)
        pf.lineage = pf.lineage[index]
        pf.config = replace(pf.config, n_particles=particles)
        runtime.operations.append({"action": "resize", "from": before, "to": particles, "ess_before": ess, "at": _now()})
        info = store.write(runtime.to_checkpoint())
        plan["written"] = str(info.path)
        return plan


def migrate_stream(
    config: DeploymentConfig, stream_id: str, *, dry_run: bool = False, store: CheckpointStore | None = None
) -> dict[str, Any]:
    """Move the stream's cloud to the model spec the config now names, where it maps.

    The checkpoint was written for an older spec (its fingerprint differs). Mapped:
    compartments and groups (they must be the same names, in any order; otherwise
    refused), parameters of the same name (values kept), the incidence history of
    flows observed by both (the days both keep). New parameters are drawn from their
    priors (or take their fixed values); parameters and flows the new spec lacks are
    dropped. The plan lists each.
    """
    import numpy as np

    from filters import CompartmentalModel, FilterConfig, ParticleFilter, ParticleSet
    from schemas import IndividualModelSpec

    from .streams import load_stream_model

    _check_stream(config, stream_id)
    with _opened(config, store) as store:
        s = next(x for x in config.streams if x.id == stream_id)
        new_spec = load_stream_model(s)
        loaded = store.load_latest(stream_id, expected_fingerprint=None)
        if loaded is None:
            raise ServiceError(f"stream {stream_id!r} has no checkpoint to migrate; nothing was done")
        cp = loaded.checkpoint
        if isinstance(new_spec, IndividualModelSpec) or (cp.header.get("spec") or {}).get("kind") == "individual":
            raise ServiceError(
                f"stream {stream_id!r}: migrate maps compartmental clouds only; an individual-based cloud holds each "
                "person's state in one town, which another spec need not share. Rebuild the stream under the new "
                "spec instead (`casecloud stream rebuild`; runbook: Upgrading a model spec); nothing was done"
            )
        new_model = CompartmentalModel(new_spec, window_days=s.assimilation_window_days)
        old_spec_name = cp.header.get("model")
        old_fp = cp.header["filter"]["model_fingerprint"]
        if old_fp == new_model.fingerprint():
            raise ServiceError(f"stream {stream_id!r} already runs model fingerprint {old_fp}; nothing to migrate")
        old_spec = cp.header.get("spec")
        if old_spec is None:
            raise ServiceError(
                f"the checkpoint of {stream_id!r} does not carry the spec it was written with (written before migrations "
                "were possible): rebuild the stream under the new spec instead (runbook: Upgrading a model spec)"
            )
        from schemas import ModelSpec

        old_model = CompartmentalModel(ModelSpec.model_validate(old_spec), window_days=cp.header.get("window_days"))
        problems = []
        if sorted(old_model.compartments) != sorted(new_model.compartments):
            problems.append(f"compartments differ: {old_model.compartments} -> {new_model.compartments}")
        if sorted(old_model.groups) != sorted(new_model.groups):
            problems.append(f"groups differ: {old_model.groups} -> {new_model.groups}")
        old_params, new_params = old_model.param_names, new_model.param_names
        old_flows = {old_model.spec.flows[f].name: k for k, f in enumerate(old_model._observed_flows)}
        new_flows = {new_model.spec.flows[f].name: k for k, f in enumerate(new_model._observed_flows)}
        plan: dict[str, Any] = {
            "stream": stream_id,
            "from": {"model": old_spec_name, "fingerprint": old_fp},
            "to": {"model": new_model.spec.name, "fingerprint": new_model.fingerprint()},
            "parameters": {
                "kept": [p for p in new_params if p in old_params],
                "new (drawn from the prior or fixed)": [p for p in new_params if p not in old_params],
                "dropped": [p for p in old_params if p not in new_params],
            },
            "observed flows": {
                "kept": [f for f in new_flows if f in old_flows],
                "new (history starts empty)": [f for f in new_flows if f not in old_flows],
                "dropped": [f for f in old_flows if f not in new_flows],
            },
            "refused": problems,
        }
        if problems:
            raise ServiceError("the stream's cloud does not map onto the new spec: " + "; ".join(problems))
        if dry_run:
            return plan
        arrays = {k: np.asarray(v) for k, v in cp.arrays.items()}
        n = arrays["states"].shape[0]
        c_old = [old_model.compartments.index(c) for c in new_model.compartments]
        g_old = [old_model.groups.index(g) for g in new_model.groups]
        states = arrays["states"][:, g_old][:, :, c_old]
        header = cp.header["filter"]
        from filters import restore_generator

        rng = restore_generator(header["rng"])
        fresh = new_model.initial(n, rng)  # priors for new parameters (drawn with the stream's generator)
        params = fresh.params
        for j, name in enumerate(new_params):
            if name in old_params:
                params[:, j] = arrays["params"][:, old_params.index(name)]
        history = np.zeros((n, new_model.history_days, len(new_flows), new_model.n_groups), dtype=np.int64)
        days = min(history.shape[1], arrays["history"].shape[1])
        for name, k in new_flows.items():
            if name in old_flows:
                history[:, :days, k, :] = arrays["history"][:, :days, old_flows[name], :][:, :, g_old]
        particles = ParticleSet(states=states, params=params, history=history, log_weights=arrays["log_weights"])
        registry = StreamRegistry(config, store)
        runtime = registry.from_prior(stream_id)
        filter_config = FilterConfig(**{**header["config"], "summary_probs": tuple(header["config"]["summary_probs"])})
        evidence = header["log_evidence"]
        pf = ParticleFilter(
            new_model, filter_config, rng, particles=particles, time=header["time"], step_count=header["step"],
            log_evidence=float("-inf") if evidence is None else evidence,
        )
        if "lineage" in arrays and arrays["lineage"].shape == pf.lineage.shape:
            pf.lineage = arrays["lineage"].astype(np.int32)
        runtime.filter, runtime.model = pf, new_model
        for key in ("last_day", "last_period"):
            setattr(runtime, key, cp.header.get(key))
        runtime.positions = {k: int(v) for k, v in cp.header.get("positions", {}).items()}
        runtime.known = {
            series: {int(d): (float(tot), None if a is None else int(a)) for d, (tot, a) in ds.items()}
            for series, ds in cp.header.get("known", {}).items()
            if series in {x.name for x in new_model.series}
        }
        runtime.tests = {
            series: {int(d): float(n) for d, n in ds.items()}
            for series, ds in cp.header.get("tests", {}).items()
            if series in {x.name for x in new_model.series}
        }
        runtime.samples = samples_from_header(cp.header, {x.name for x in new_model.series})
        runtime.operations = [*cp.header.get("operations", []), {"action": "migrate", **{k: plan[k] for k in ("from", "to")}, "at": _now()}]
        info = store.write(runtime.to_checkpoint())
        plan["written"] = str(info.path)
        return plan


# -------------------------------------------------------------------- command
def cmd_stream(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    try:
        if args.action == "rebuild":
            report = rebuild_stream(
                config, args.stream, history=Path(args.history) if args.history else None,
                out=Path(args.out) if args.out else None, dry_run=args.dry_run,
            )
            verb = "would replay" if args.dry_run else "replayed"
            print(f"stream {report.stream}: {verb} {report.records} record(s) from the {report.source}", file=sys.stderr)
            if not args.dry_run:
                if report.written is None:
                    print(f"casecloud: nothing was applied ({report.skipped} skipped, {report.dead_letters} dead letters); no checkpoint written", file=sys.stderr)
                    return 1
                print(
                    f"applied {report.applied}, skipped {report.skipped}, dead letters {report.dead_letters}; "
                    f"checkpoint step {report.step} (period {report.period}, positions {report.positions}) written to {report.written}",
                    file=sys.stderr,
                )
        else:
            if args.action == "reset":
                plan = reset_stream(config, args.stream, archive=Path(args.archive) if args.archive else None, dry_run=args.dry_run)
            elif args.action == "resize":
                if args.particles is None:
                    print("casecloud: stream resize needs --particles N", file=sys.stderr)
                    return 2
                plan = resize_stream(config, args.stream, args.particles, dry_run=args.dry_run)
            else:
                plan = migrate_stream(config, args.stream, dry_run=args.dry_run)
            print(orjson.dumps(plan, option=orjson.OPT_INDENT_2).decode())
            if args.dry_run:
                print("dry run: nothing was moved or written", file=sys.stderr)
    except ServiceError as exc:
        print(f"casecloud: {exc}", file=sys.stderr)
        return 1
    return 0


def add_stream_parser(sub) -> None:
    p = sub.add_parser(
        "stream",
        help="operator actions on a stream's saved state: rebuild, reset, resize, migrate",
        description="rebuild: replay the stream's records from the input (or a history CSV) into a checkpoint the "
        "running service resumes from. reset: archive the stream's checkpoints and start it from the prior with "
        "the next new record. resize: change its particle count (a weighted draw from the cloud). migrate: move "
        "its cloud to the model spec the config now names, where compartments, groups and parameters map (the "
        "dry run lists what maps, what is new and what is dropped). Stop the service first unless the stream is "
        "held for lost state.",
    )
    p.add_argument("action", choices=["rebuild", "reset", "resize", "migrate"])
    p.add_argument("--config", required=True, help="deployment config TOML (its checkpoint store and input are used)")
    p.add_argument("--stream", required=True, help="the stream id")
    p.add_argument("--history", help="rebuild: replay this history CSV instead of the input")
    p.add_argument("--out", help="rebuild: also write the replayed estimates, alerts and dead letters here (NDJSON)")
    p.add_argument("--archive", help="reset: where to move the checkpoints (default: <checkpoint_dir>-archive/)")
    p.add_argument("--particles", type=int, help="resize: the new particle count")
    p.add_argument("--dry-run", action="store_true", help="say what would be done; change nothing")
    p.set_defaults(handler=cmd_stream)
