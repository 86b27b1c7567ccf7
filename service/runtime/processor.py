"""What happens to one input record: validate, step, publish, checkpoint, commit.

Bad records never raise and never touch a cloud: they become dead letters
carrying a reason code, a readable message and the original bytes.
"""

from __future__ import annotations

import asyncio
import base64
import datetime as dt
import json
import logging
import time
import uuid
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import orjson
from pydantic import ValidationError

from filters import ModelGuardError, Observation, ObservationError, Report, forecast, nowcast
from schemas import (
    AlertMessage,
    DeadLetter,
    DeploymentConfig,
    EstimateMessage,
    Exceedance,
    NowcastPeriod,
    ObservationMessage,
    QuantitySummary,
    SeriesPredictive,
    SourcePosition,
    parse_period,
)

from ..state import Checkpoint, CheckpointInfo, CheckpointStore
from ..transports.base import OutRecord, Record
from .alerts import AlertState, decide
from .metrics import Metrics
from .streams import StreamRegistry, StreamRuntime

__all__ = ["RecordProcessor", "Outcome", "EVENT_NAMESPACE"]

log = logging.getLogger("casecloud.processor")
EVENT_NAMESPACE = uuid.UUID("0b8f5a4e-2d6c-5b1a-8e3f-7c9d0a1b2c3d")
SCHEMA_BASE = "https://schemas.casecloud.invalid"
EVENT_TYPE_PREFIX = "invalid.casecloud"  # reverse-DNS of casecloud.invalid, as SCHEMA_BASE


@dataclass
class Outcome:
    """What became of a record: 'applied', 'skipped' or 'dead_letter'."""

    status: str
    reason: str | None = None
    stream: str | None = None
    outputs: list[OutRecord] = field(default_factory=list)
    checkpoint: Checkpoint | None = None  # snapshot still to be written (deferred mode only)


class _Reject(Exception):
    def __init__(self, reason: str, message: str, stream: str | None = None) -> None:
        super().__init__(message)
        self.reason, self.message, self.stream = reason, message, stream


@dataclass
class _Plan:
    """What one message does to its stream: move the cloud to ``time`` and weigh it by ``reports``."""

    day: int  # model day of the message's period
    time: int  # the cloud's day afterwards
    reports: list[Report]
    updates: dict[str, tuple[float, int | None]]  # series -> (total, as-of day) to remember for ``day``
    skipped: list[str]  # one reason per skipped series value


def _repeated_key(value: bytes) -> str | None:
    """The first key given twice in one JSON object (a parser keeps only one of them), or None."""
    repeated: list[str] = []

    def pairs(items: list[tuple[str, Any]]) -> dict[str, Any]:
        keys = [k for k, _ in items]
        repeated.extend(k for i, k in enumerate(keys) if k in keys[:i])
        return dict(items)

    json.loads(value, object_pairs_hook=pairs)
    return repeated[0] if repeated else None


def _vintage(as_of: int | None) -> float:
    return float("inf") if as_of is None else float(as_of)


def _event_id(kind: str, stream: str, period: str, step: int, extra: str = "") -> str:
    return str(uuid.uuid5(EVENT_NAMESPACE, f"{kind}|{stream}|{period}|{step}|{extra}"))


def _headers(kind: str, event_id: str, stream: str | None, subject: str | None) -> tuple[tuple[str, bytes], ...]:
    """CloudEvents 1.0 attributes for the Kafka binary content mode (no wall clock, so re-publishing is byte-identical).

    ``type`` is reverse-DNS of ``casecloud.invalid``, the reserved domain the schema ids use
    too (RFC 2606): the project owns no domain, so it claims none."""
    h = [
        ("ce_specversion", b"1.0"),
        ("ce_id", event_id.encode()),
        ("ce_source", f"/casecloud/streams/{stream or 'unknown'}".encode()),
        ("ce_type", f"{EVENT_TYPE_PREFIX}.{kind}.v1".encode()),
        ("ce_dataschema", f"{SCHEMA_BASE}/{kind}.v1.json".encode()),
        ("content-type", b"application/json"),
    ]
    if subject:
        h.append(("ce_subject", subject.encode()))
    return tuple(h)


def _classify(exc: ValidationError) -> tuple[str, str]:
    errors = exc.errors()
    parts = []
    reason = "schema"
    for e in errors[:5]:
        loc = ".".join(str(x) for x in e["loc"])
        given = e.get("input")
        shown = repr(given) if not isinstance(given, (dict, list)) else type(given).__name__
        parts.append(f"{loc or '(message)'}: {e['msg']} (given {shown})")
        if e["loc"][:1] == ("counts",) and e["loc"][-1:] == ("[key]",) and reason == "schema":
            reason = "unknown_series"  # not even a valid series name, so no stream observes it
        elif e["loc"][:1] == ("counts",) and len(e["loc"]) > 1:
            reason = "bad_count"
        elif e["loc"][:1] == ("tests",) and len(e["loc"]) > 1 and e["loc"][-1:] != ("[key]",):
            reason = "bad_tests"
        elif e["loc"][:1] == ("concentrations",) and len(e["loc"]) > 1 and e["loc"][-1:] != ("[key]",):
            reason = "bad_concentration"
        elif e["loc"][:1] == ("period",) and e["type"] != "missing" and reason == "schema":  # absent: schema
            reason = "bad_period"
    return reason, "; ".join(parts)


class RecordProcessor:
    def __init__(
        self,
        config: DeploymentConfig,
        registry: StreamRegistry,
        store: CheckpointStore,
        metrics: Metrics,
        today: Callable[[], dt.date] = dt.date.today,
        earlier: Callable[[str, int, int], AsyncIterator[Record]] | None = None,
    ) -> None:
        """``earlier(topic, partition, before)`` reads a partition's older input records
        again (the transport's :meth:`~service.transports.base.Transport.earlier`); it is
        how a stream without a checkpoint is told apart from a stream whose state was lost.
        Without it that check is skipped."""
        self.config, self.registry, self.store, self.metrics, self.today = config, registry, store, metrics, today
        self.earlier = earlier
        # (topic, partition) -> (offset read up to, first valid observation of each stream seen)
        self._first_seen: dict[tuple[str, int], tuple[int, dict[str, Record]]] = {}

    # ------------------------------------------------------------------ entry
    async def handle(
        self, record: Record, publish: Callable[[list[OutRecord]], Any], defer_checkpoint: bool = False
    ) -> Outcome:
        """Process one record; ``publish`` is awaited before the checkpoint is written.

        With ``defer_checkpoint`` the checkpoint is not written here: the
        outcome carries a snapshot for the caller to write (and only then
        commit), so the write can overlap the next record's step.
        """
        runtime: StreamRuntime | None = None
        new_stream = False  # this record is the first a new stream (no checkpoint, no earlier observation) is judged by
        try:
            message, runtime = self._parse(record)
            if runtime.broken is not None:
                until = ("its spec is fixed and the service restarted" if runtime.broken_reason == "model_error"
                         else "the service is restarted (on a fixed version)")
                raise _Reject(
                    runtime.broken_reason,
                    f"stream {runtime.id!r} is stopped on {'a model' if runtime.broken_reason == 'model_error' else 'an internal'} "
                    f"error until {until}: {runtime.broken}",
                    runtime.id,
                )
            if runtime.fresh or runtime.held is not None:
                runtime, new_stream = await self._guard_lost_state(runtime, record)
            self._check(record, message, runtime)
        except _Reject as rej:
            outcome = await self._dead_letter(record, rej, publish)
            return await self._keep_prior(runtime, outcome, defer_checkpoint) if new_stream else outcome
        key = f"{record.topic}|{record.partition}"
        if key in runtime.positions and record.offset <= runtime.positions[key]:
            self.metrics.skipped.labels(runtime.id, "already_applied").inc()
            return Outcome("skipped", "already_applied", runtime.id)
        try:
            plan = self._plan(runtime, message)
        except _Reject as rej:
            outcome = await self._dead_letter(record, rej, publish)
            return await self._keep_prior(runtime, outcome, defer_checkpoint) if new_stream else outcome
        for r in plan.skipped:
            self.metrics.skipped.labels(runtime.id, r).inc()
        if plan.skipped and not plan.reports:
            # Nothing new: every value was known already (or is an older vintage).
            reason = "duplicate_period" if all(r == "duplicate_period" for r in plan.skipped) else plan.skipped[0]
            return Outcome("skipped", reason, runtime.id)
        try:
            outputs = await self._apply(runtime, message, plan, record)
        except ModelGuardError as exc:
            # The spec cannot run on this cloud: publish nothing, keep the records, wait for a fixed spec.
            runtime.broken = str(exc)
            self.metrics.model_errors.labels(runtime.id).set(1)
            log.error("stream %s stopped on a model error: %s", runtime.id, exc)
            rej = _Reject("model_error", f"stream {runtime.id!r} stopped on a model error: {exc}", runtime.id)
            return await self._dead_letter(record, rej, publish)
        except Exception as exc:  # noqa: BLE001 - a defect must stop this stream, not the service
            # The step may have changed the cloud part-way: the stream applies nothing more until a restart
            # reloads its last checkpoint; this record and the stream's next ones are kept as dead letters.
            runtime.broken, runtime.broken_reason = f"{type(exc).__name__}: {exc}", "internal_error"
            self.metrics.internal_errors.labels(runtime.id).set(1)
            log.exception("stream %s stopped on an internal error at %s|%s@%s", runtime.id, record.topic, record.partition, record.offset)
            rej = _Reject("internal_error", f"stream {runtime.id!r} stopped on an internal error: {runtime.broken}", runtime.id)
            return await self._dead_letter(record, rej, publish)
        started = time.perf_counter()
        await publish(outputs)
        self.metrics.publish_seconds.observe(time.perf_counter() - started)
        checkpoint = runtime.to_checkpoint()
        if defer_checkpoint:
            return Outcome("applied", None, runtime.id, outputs, checkpoint)
        await self.write_checkpoint(checkpoint)
        return Outcome("applied", None, runtime.id, outputs)

    async def _keep_prior(self, runtime: StreamRuntime, outcome: Outcome, defer_checkpoint: bool) -> Outcome:
        """Checkpoint a new stream's cloud, still its prior, when its first record was refused.

        The record stays consumed on its partition; without a checkpoint the lost-state guard
        would take it, after a restart, as proof that the stream was advanced and lost its
        state, and hold a stream that never had any. The checkpoint holds what the service
        holds in memory (the prior cloud and its random-number state), so the stream goes
        on from it exactly as an uninterrupted service would."""
        checkpoint = runtime.to_checkpoint()
        if defer_checkpoint:
            outcome.checkpoint = checkpoint
        else:
            await self.write_checkpoint(checkpoint)
        return outcome

    async def _guard_lost_state(self, runtime: StreamRuntime, record: Record) -> tuple[StreamRuntime, bool]:
        """Never start a stream from its prior when it was advanced before and lost its state.

        A stream without a checkpoint is new only if no valid observation of it was
        consumed before this record on the same partition. Otherwise it is held: its
        records become dead letters ``needs_recovery`` (bytes kept; a rebuild from the
        input applies them) until an operator rebuilds or resets it, which the
        service notices at the stream's next record. Returns the stream's runtime and
        whether it was just found new.
        """
        sid = runtime.id
        if runtime.held is not None:
            reloaded = await asyncio.to_thread(self.registry.reload, sid)
            if reloaded is None:
                raise _Reject("needs_recovery", f"stream {sid!r} is held: {runtime.held}", sid)
            self.metrics.needs_recovery.labels(sid).set(0)
            log.warning("stream %s: a checkpoint appeared (step %s); its records are applied again", sid, reloaded.filter.step_count)
            return reloaded, False
        evidence = await self._earlier_observation(sid, record) if self.earlier is not None else None
        if evidence is None:
            runtime.fresh = False
            return runtime, True
        runtime.held = (
            f"its observation at {evidence.topic}[{evidence.partition}] offset {evidence.offset} was consumed before, "
            "but the stream has no checkpoint: its state was lost. Rebuild it from its history "
            "(casecloud stream rebuild) or start it from the prior on purpose (casecloud stream reset); "
            "see the runbook, CasecloudStreamNeedsRecovery"
        )
        self.metrics.needs_recovery.labels(sid).set(1)
        log.error("stream %s held: %s", sid, runtime.held)
        raise _Reject("needs_recovery", f"stream {sid!r} is held: {runtime.held}", sid)

    async def _earlier_observation(self, sid: str, record: Record) -> Record | None:
        """The first valid observation of stream ``sid`` before ``record`` on its partition, if any.

        The partition is read once, incrementally: what was read for one stream's
        first record (the first valid observation of every stream seen) answers the
        next ones, so a new fleet of streams does not re-read the partition per stream.
        """
        assert self.earlier is not None
        where = (record.topic, record.partition)
        read_to, first = self._first_seen.get(where, (0, {}))
        if record.offset > read_to:
            try:
                async for old in self.earlier(record.topic, record.partition, record.offset, read_to):
                    stream = self._observation_stream(old)
                    if stream is not None and stream not in first:
                        first[stream] = old
            except NotImplementedError as exc:
                log.warning("stream %s has no checkpoint and its input cannot be read again (%s): taken as new", sid, exc)
                return None
            self._first_seen[where] = (record.offset, first)
        found = first.get(sid)
        return found if found is not None and found.offset < record.offset else None

    @staticmethod
    def _observation_stream(record: Record) -> str | None:
        """The stream a record is a valid observation of, or None."""
        try:
            raw = orjson.loads(record.value)
        except orjson.JSONDecodeError:
            return None
        if not isinstance(raw, dict) or not isinstance(raw.get("stream"), str):
            return None
        if record.key is not None and record.key != raw["stream"].encode():
            return None
        try:
            ObservationMessage.model_validate(raw)
        except ValidationError:
            return None
        return raw["stream"]

    async def write_checkpoint(self, checkpoint: Checkpoint) -> CheckpointInfo:
        """Write in a worker thread; count failures and re-raise them (the offset must then not be committed)."""
        try:
            info = await asyncio.to_thread(self.store.write, checkpoint)
        except Exception:
            self.metrics.checkpoint_failures.labels(checkpoint.stream_id).inc()
            raise
        self.metrics.checkpoint_seconds.observe(info.seconds or 0.0)
        self.metrics.checkpoint_bytes.labels(checkpoint.stream_id).set(info.size_bytes)
        return info

    # ------------------------------------------------------------- validation
    def _parse(self, record: Record) -> tuple[ObservationMessage, StreamRuntime]:
        """The record as an observation message of a configured stream, and that stream."""
        limit = self.config.service.max_message_bytes
        if len(record.value) > limit:
            raise _Reject("oversized", f"record is {len(record.value)} bytes; at most {limit} allowed")
        try:
            raw = orjson.loads(record.value)
        except orjson.JSONDecodeError as exc:
            raise _Reject("malformed_json", f"not valid JSON: {exc}") from None
        stream_hint = raw.get("stream") if isinstance(raw, dict) and isinstance(raw.get("stream"), str) else None
        try:
            message = ObservationMessage.model_validate(raw)
        except ValidationError as exc:
            reason, text = _classify(exc)
            raise _Reject(reason, text, stream_hint) from None
        runtime = self.registry.get(message.stream)
        if runtime is None:
            raise _Reject(
                "unknown_stream",
                f"stream {message.stream!r} is not configured; configured: {sorted(self.registry.streams)}",
                message.stream,
            )
        return message, runtime

    def _check(self, record: Record, message: ObservationMessage, runtime: StreamRuntime) -> None:
        """What the message must satisfy for its stream: series it observes, periods in range,
        values of each series' kind."""
        known = {s.name for s in runtime.model.series}
        concentrations = {k: v for k, v in (message.concentrations or {}).items() if v is not None}
        unknown = sorted((set(message.counts) | set(concentrations)) - known)
        if unknown:
            raise _Reject("unknown_series", f"series {unknown} are not observed by stream {message.stream!r}; allowed: {sorted(known)}", message.stream)
        date = parse_period(message.period)
        if date < runtime.config.start:
            raise _Reject("bad_period", f"period {message.period} is before the stream's start {runtime.config.start}", message.stream)
        horizon = self.today() + dt.timedelta(days=self.config.service.max_future_days)
        if date > horizon:
            raise _Reject("future", f"period {message.period} ends after {horizon} (today plus {self.config.service.max_future_days} days)", message.stream)
        gap = runtime.day_of(date) - (runtime.last_day if runtime.last_day is not None else 0)
        if gap > self.config.service.max_gap_days:
            raise _Reject("bad_period", f"period {message.period} is {gap} days after the stream's latest period; at most {self.config.service.max_gap_days} allowed", message.stream)
        tests = {k: v for k, v in (message.tests or {}).items() if v is not None}
        kinds = {s.name: getattr(s, "kind", None) for s in runtime.model.series}
        for name in sorted(message.counts):
            if kinds[name] == "concentration":
                raise _Reject("series_kind", f"counts.{name}: {name!r} is a concentration series; send its samples in 'concentrations' as {{\"value\": ..., \"lod\": ...}}, not as a count", message.stream)
        for name in sorted(concentrations):
            if kinds[name] != "concentration":
                raise _Reject("series_kind", f"concentrations.{name}: {name!r} is a {kinds[name]} series of whole-number counts; send it in 'counts'", message.stream)
        try:
            runtime.model.check_observation(Observation(
                0, {k: message.values()[k] for k in concentrations},
                limits={k: c.lod for k, c in concentrations.items()}, flows={k: c.flow for k, c in concentrations.items()},
            ))
        except ObservationError as exc:
            raise _Reject("bad_concentration", f"concentrations: {exc}", message.stream) from None
        for name in sorted(set(tests) | set(message.counts)):
            positivity = kinds.get(name) == "positivity"
            if name in tests and not positivity:
                raise _Reject("bad_tests", f"tests.{name}: {tests[name]} tests given, but {name!r} is not a positivity series of stream {message.stream!r}; tests belong to positivity series only", message.stream)
            if positivity and message.counts.get(name) is not None:
                n, y = tests.get(name), message.counts[name]
                if not n:  # missing, null or zero: the share positive would be y / 0
                    raise _Reject("bad_tests", f"tests.{name}: given {n!r}; series {name!r} is a positivity series and needs the number of tests behind its {y} positives, at least 1", message.stream)
                if y > n:  # type: ignore[operator]
                    raise _Reject("bad_tests", f"counts.{name}: {y} positives out of tests.{name} = {n} tests; positives cannot exceed tests", message.stream)
        try:
            runtime.model.check_observation(Observation(0, dict(message.counts), tests))
        except ObservationError as exc:
            raise _Reject("bad_count", str(exc), message.stream) from None
        weekly_period = "W" in message.period
        for name, value in message.values().items():
            series = runtime.model.series_named(name)
            if value is not None and series.weekly != weekly_period:  # null: not reported, whatever its cadence
                want = "an ISO week YYYY-Www" if series.weekly else "a day YYYY-MM-DD"
                raise _Reject(
                    "cadence",
                    f"series {name!r} is {'weekly' if series.weekly else 'daily'}: its period must be {want}; given {message.period!r}",
                    message.stream,
                )
        repeated = _repeated_key(record.value)
        if repeated is not None:
            raise _Reject("duplicate_series", f"key {repeated!r} is given twice in one JSON object; send each series once per message", message.stream)
        if message.as_of is not None:
            as_of = dt.date.fromisoformat(message.as_of)
            first_day = date - dt.timedelta(days=6) if weekly_period else date
            if as_of < first_day:
                raise _Reject("bad_as_of", f"as_of {message.as_of} is before period {message.period} begins ({first_day}); nothing can be known of it yet", message.stream)
            if as_of > horizon:
                raise _Reject("bad_as_of", f"as_of {message.as_of} is after {horizon} (today plus {self.config.service.max_future_days} days)", message.stream)

    def _plan(self, runtime: StreamRuntime, message: ObservationMessage) -> _Plan:
        """Sort each series value of a message: new, late, a revision, a duplicate or an older vintage.

        Raises _Reject for values that must not be applied (the whole message then
        becomes one dead letter, so no part of it is applied twice on a re-send).
        """
        model, sid = runtime.model, runtime.id
        day = runtime.day_of(parse_period(message.period))
        as_of = runtime.day_of(dt.date.fromisoformat(message.as_of)) if message.as_of is not None else None
        now = runtime.last_day
        time = day if now is None else max(now, day)
        plan = _Plan(day=day, time=time, reports=[], updates={}, skipped=[])
        values = message.values()
        if now is not None and day <= now and all(v is None for v in values.values()):
            # Nothing reported: an empty message can only move the cloud forward.
            if day == now:
                plan.skipped.append("duplicate_period")
                return plan
            raise _Reject("late", f"period {message.period} is older than the stream's latest period {runtime.last_period} and carries no value", sid)
        for name, value in values.items():
            if value is None:
                continue
            series = model.series_named(name)
            if now is not None and now - day > model.window_days:
                raise _Reject(
                    "late",
                    f"period {message.period} is {now - day} days older than the stream's latest period {runtime.last_period}; "
                    f"values up to {model.window_days} days old are assimilated (assimilation window)",
                    sid,
                )
            if now is not None and day < now and series.kind in ("prevalence", "positivity"):
                raise _Reject("late", f"series {name!r} is a {series.kind} snapshot: only the latest period ({runtime.last_period}) can be assimilated", sid)
            known = runtime.known.get(name, {}).get(day)
            if known is None:
                trials = (message.tests or {}).get(name) if series.kind == "positivity" else None
                sample = (message.concentrations or {}).get(name)
                plan.reports.append(Report(name, day, float(value), as_of if series.event_dated else None,
                                           trials=None if trials is None else float(trials),
                                           lod=sample.lod if sample else None, flow=sample.flow if sample else None))
                plan.updates[name] = (float(value), as_of)
                continue
            total, known_as_of = known
            if float(value) == total and series.kind == "positivity":
                # the same positives out of another number of tests are another observation
                before, now_tests = runtime.tests.get(name, {}).get(day), (message.tests or {}).get(name)
                if before is not None and now_tests is not None and float(now_tests) != before:
                    raise _Reject(
                        "not_revisable",
                        f"series {name!r} is dated by report: {total:g} positives out of {before:g} tests were assimilated "
                        f"for {message.period}, now {value} positives out of {now_tests} tests; a period's positives and "
                        "tests are final on arrival",
                        sid,
                    )
            if float(value) == total and series.kind == "concentration":
                # the same level at another flow or limit of detection is another measurement
                before, sample = runtime.samples.get(name, {}).get(day), (message.concentrations or {}).get(name)
                now_sample = (sample.lod, sample.flow) if sample is not None else None
                if before is not None and now_sample is not None and tuple(before) != now_sample:
                    raise _Reject(
                        "not_revisable",
                        f"series {name!r}: a sample of {total:g} with (lod, flow) = {tuple(before)} was assimilated for "
                        f"{message.period}, now {value} with (lod, flow) = {now_sample}; a period's sample is final on arrival",
                        sid,
                    )
            if float(value) == total:
                plan.skipped.append("duplicate_period")
            elif not series.event_dated:
                raise _Reject(
                    "not_revisable",
                    f"series {name!r} is dated by report: {total:g} was assimilated for {message.period}, now {value}; "
                    "a series whose counts rise as reports arrive must be declared dated_by = \"event\" with a reporting_delay",
                    sid,
                )
            elif _vintage(as_of) < _vintage(known_as_of):
                plan.skipped.append("stale_vintage")
            elif _vintage(as_of) == _vintage(known_as_of):
                raise _Reject("conflicting_vintage", f"series {name!r} {message.period}: {value} as of {message.as_of or 'final'}, but {total:g} is already known as of the same date", sid)
            elif value < total:
                raise _Reject("lower_total", f"series {name!r} {message.period}: total {value} as of {message.as_of or 'final'} is below the {total:g} already assimilated; totals are never lowered", sid)
            else:
                plan.reports.append(Report(name, day, float(value), as_of, total, known_as_of))
                plan.updates[name] = (float(value), as_of)
        return plan

    async def _dead_letter(self, record: Record, rej: _Reject, publish) -> Outcome:
        letter = DeadLetter(
            reason=rej.reason,  # type: ignore[arg-type]
            message=rej.message,
            stream=rej.stream,
            source=SourcePosition(topic=record.topic, partition=record.partition, offset=record.offset),
            original_base64=base64.b64encode(record.value).decode("ascii"),
        )
        event_id = str(uuid.uuid5(EVENT_NAMESPACE, f"dead_letter|{record.topic}|{record.partition}|{record.offset}"))
        out = OutRecord(
            "dead_letters",
            record.key,
            orjson.dumps(letter.model_dump(mode="json")),
            _headers("dead_letter", event_id, rej.stream, rej.reason),
        )
        await publish([out])
        self.metrics.dead_lettered.labels(rej.reason).inc()
        log.info("dead letter %s at %s:%s@%s: %s", rej.reason, record.topic, record.partition, record.offset, rej.message)
        return Outcome("dead_letter", rej.reason, rej.stream, [out])

    # ------------------------------------------------------------------ apply
    async def _apply(self, runtime: StreamRuntime, message: ObservationMessage, plan: _Plan, record: Record) -> list[OutRecord]:
        started = time.perf_counter()
        result, exceedance, latest, block, growth, nowcasts, predictive = await asyncio.to_thread(self._step, runtime, message, plan)
        self.metrics.step_seconds.labels(runtime.id).observe(time.perf_counter() - started)
        day = plan.day
        if runtime.last_day is None or day >= runtime.last_day:
            runtime.last_period = message.period
        runtime.last_day = plan.time
        runtime.positions[f"{record.topic}|{record.partition}"] = record.offset
        m, sid = self.metrics, runtime.id
        m.processed.labels(sid).inc()
        m.ess.labels(sid).set(result.ess)
        m.ess_ratio.labels(sid).set(result.ess / runtime.filter.config.n_particles)
        if result.log_evidence_increment is not None:
            m.log_evidence.labels(sid).set(result.log_evidence_increment)
        if result.resampled:
            m.resamples.labels(sid).inc()
        if result.collapsed:
            m.collapses.labels(sid).inc()
        m.mark_updated(sid)
        paths = runtime.filter.distinct_paths()
        m.distinct_paths.labels(sid).set(paths)
        m.distinct_paths_ratio.labels(sid).set(paths / runtime.filter.config.n_particles)
        late = sum(1 for r in plan.reports if r.time < plan.time)
        if late:
            m.late_values.labels(sid).inc(late)
        revisions = sum(1 for r in plan.reports if r.previous_as_of is not None or r.previous)
        if revisions:
            m.revisions.labels(sid).inc(revisions)
        summary = result.summary
        assert summary is not None
        estimate = EstimateMessage(
            id=_event_id("estimate", sid, message.period, result.step),
            stream=sid,
            period=message.period,
            day=day,
            step=result.step,
            model=runtime.model.spec.name,
            model_fingerprint=runtime.model.fingerprint(),
            particles=runtime.filter.config.n_particles,
            ess=result.ess,
            resampled=result.resampled,
            collapsed=result.collapsed,
            log_evidence_increment=result.log_evidence_increment,
            cloud_day=plan.time,
            distinct_paths=paths,
            quantities=summary.as_dict(),
            exceedance=exceedance,
            growth_probability=growth,
            forecast=block,
            nowcast=nowcasts,
            predictive=predictive,
            source=SourcePosition(topic=record.topic, partition=record.partition, offset=record.offset),
        )
        key = sid.encode()
        outputs = [
            OutRecord("estimates", key, orjson.dumps(estimate.model_dump(mode="json")), _headers("estimate", estimate.id, sid, message.period))
        ]
        for rule in runtime.config.alerts:
            state = runtime.alerts.get(rule.name, AlertState())
            decision = decide(rule, state, exceedance[rule.name].probability, sid, message.period)
            runtime.alerts[rule.name] = decision.state
            if decision.status is None:
                continue
            alert = AlertMessage(
                id=decision.state.alert_id or "",
                event_id=_event_id("alert", sid, message.period, result.step, rule.name),
                stream=sid,
                rule=rule.name,
                status=decision.status,
                period=message.period,
                step=result.step,
                cloud_day=plan.time,
                series=rule.series,
                threshold=rule.threshold,
                horizon_days=rule.horizon_days,
                probability=exceedance[rule.name].probability,
                raise_level=rule.raise_level,
                clear_level=rule.clear_level,
                latest_mean=latest.get(rule.series),
            )
            outputs.append(OutRecord("alerts", key, orjson.dumps(alert.model_dump(mode="json")), _headers("alert", alert.event_id, sid, message.period)))
            m.alerts.labels(sid, rule.name, decision.status).inc()
        return outputs

    def _step(self, runtime: StreamRuntime, message: ObservationMessage, plan: _Plan):
        """CPU work (runs in a worker thread): assimilate, summarise, nowcast, forecast."""
        pf, cfg = runtime.filter, runtime.config
        result = pf.assimilate(plan.time, plan.reports, predictive=pf.config.summary_probs if cfg.publish_predictive else None)
        predictive = self._predictive(message, result)
        if not result.collapsed:
            for name, entry in plan.updates.items():
                runtime.known.setdefault(name, {})[plan.day] = entry
                tests = (message.tests or {}).get(name)
                if tests is not None and getattr(runtime.model.series_named(name), "kind", None) == "positivity":
                    runtime.tests.setdefault(name, {})[plan.day] = float(tests)
                sample = (message.concentrations or {}).get(name)
                if sample is not None:
                    runtime.samples.setdefault(name, {})[plan.day] = (sample.lod, sample.flow)
        oldest = pf.time - runtime.model.window_days
        for days in [*runtime.known.values(), *runtime.tests.values(), *runtime.samples.values()]:
            for d in [d for d in days if d < oldest]:
                del days[d]
        weights = pf.weights()
        nowcasts = self._nowcasts(runtime, weights)
        latest = {s.name: float(weights @ runtime.model.expected(pf.particles, s.name)) for s in runtime.model.series}
        exceedance: dict[str, Exceedance] = {}
        block = growth = None
        if cfg.alerts or cfg.publish_forecast:
            horizon = max([cfg.forecast_horizon_days, *(r.horizon_days for r in cfg.alerts)])
            fc = forecast(runtime.model, pf.particles, weights, pf.time, horizon, cfg.forecast_trajectories, pf.rng)
            for r in cfg.alerts:
                first = fc.first_exceedance(r.series, r.threshold, r.horizon_days)
                exceedance[r.name] = Exceedance(
                    series=r.series,
                    threshold=r.threshold,
                    horizon_days=r.horizon_days,
                    probability=first.probability,
                    expected_first_day=first.mean_day,
                )
            if cfg.publish_forecast:
                block = fc.to_message_block()
                growth = block.get("growth_probability")
        return result, exceedance, {k: v for k, v in latest.items() if np.isfinite(v)}, block, growth, nowcasts, predictive

    @staticmethod
    def _predictive(message: ObservationMessage, result) -> dict[str, SeriesPredictive] | None:
        """Each value of the step against its one-step-ahead predictive (None: the model offers none)."""
        if not result.predictive:
            return None
        out = {}
        for report, p in result.predictive:
            out[report.series] = SeriesPredictive(
                period=message.period,
                as_of=message.as_of if report.as_of is not None else None,
                observed=p.observed,
                tests=None if report.trials is None else int(report.trials),
                lod=report.lod,
                flow=report.flow,
                mean=p.mean,
                quantiles={f"{q:g}": v for q, v in p.quantiles.items()},
                pit=p.pit,
                p_below_lod=p.p_below_lod,
            )
        return out

    def _nowcasts(self, runtime: StreamRuntime, weights: np.ndarray) -> dict[str, list[NowcastPeriod]] | None:
        """Reported-so-far against the eventual counts, for every event-dated series (None if it has none)."""
        model, pf = runtime.model, runtime.filter
        if not any(s.event_dated for s in model.series):
            return None
        probs = pf.config.summary_probs
        out: dict[str, list[NowcastPeriod]] = {s.name: [] for s in model.series if s.event_dated}
        for e in nowcast(model, pf.particles, weights, runtime.known, pf.time, pf.rng, probs):
            end = runtime.config.start + dt.timedelta(days=e.time)
            weekly = model.series_named(e.series).weekly
            year, week, _ = end.isocalendar()
            out[e.series].append(
                NowcastPeriod(
                    period=f"{year}-W{week:02d}" if weekly else end.isoformat(),
                    reported=int(e.reported),
                    as_of=None if e.as_of is None else (runtime.config.start + dt.timedelta(days=e.as_of)).isoformat(),
                    eventual=QuantitySummary(mean=e.mean, quantiles={f"{p:g}": v for p, v in e.quantiles.items()}),
                    share_pending=e.share_pending,
                )
            )
        return out
