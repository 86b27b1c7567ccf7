"""What happens to one input record: validate, step, publish, checkpoint, commit.

Bad records never raise and never touch a cloud: they become dead letters
carrying a reason code, a readable message and the original bytes.
"""

from __future__ import annotations

import asyncio
import base64
import datetime as dt
import logging
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import orjson
from pydantic import ValidationError

from filters import Observation, ObservationError, forecast
from schemas import (
    AlertMessage,
    DeadLetter,
    DeploymentConfig,
    EstimateMessage,
    Exceedance,
    ObservationMessage,
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


def _event_id(kind: str, stream: str, period: str, step: int, extra: str = "") -> str:
    return str(uuid.uuid5(EVENT_NAMESPACE, f"{kind}|{stream}|{period}|{step}|{extra}"))


def _headers(kind: str, event_id: str, stream: str | None, subject: str | None) -> tuple[tuple[str, bytes], ...]:
    """CloudEvents 1.0 attributes for the Kafka binary content mode (no wall clock, so re-publishing is byte-identical)."""
    h = [
        ("ce_specversion", b"1.0"),
        ("ce_id", event_id.encode()),
        ("ce_source", f"/casecloud/streams/{stream or 'unknown'}".encode()),
        ("ce_type", f"org.casecloud.{kind}.v1".encode()),
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
    ) -> None:
        self.config, self.registry, self.store, self.metrics, self.today = config, registry, store, metrics, today

    # ------------------------------------------------------------------ entry
    async def handle(
        self, record: Record, publish: Callable[[list[OutRecord]], Any], defer_checkpoint: bool = False
    ) -> Outcome:
        """Process one record; ``publish`` is awaited before the checkpoint is written.

        With ``defer_checkpoint`` the checkpoint is not written here: the
        outcome carries a snapshot for the caller to write (and only then
        commit), so the write can overlap the next record's step.
        """
        try:
            message, runtime = self._validate(record)
        except _Reject as rej:
            return await self._dead_letter(record, rej, publish)
        key = f"{record.topic}|{record.partition}"
        if key in runtime.positions and record.offset <= runtime.positions[key]:
            self.metrics.skipped.labels(runtime.id, "already_applied").inc()
            return Outcome("skipped", "already_applied", runtime.id)
        day = runtime.day_of(parse_period(message.period))
        if runtime.last_day is not None and day == runtime.last_day:
            self.metrics.skipped.labels(runtime.id, "duplicate_period").inc()
            return Outcome("skipped", "duplicate_period", runtime.id)
        if runtime.last_day is not None and day < runtime.last_day:
            rej = _Reject("late", f"period {message.period} is older than the stream's latest period {runtime.last_period}; late data is not applied to a cloud that has moved on", runtime.id)
            return await self._dead_letter(record, rej, publish)
        outputs = await self._apply(runtime, message, day, record)
        started = time.perf_counter()
        await publish(outputs)
        self.metrics.publish_seconds.observe(time.perf_counter() - started)
        checkpoint = runtime.to_checkpoint()
        if defer_checkpoint:
            return Outcome("applied", None, runtime.id, outputs, checkpoint)
        await self.write_checkpoint(checkpoint)
        return Outcome("applied", None, runtime.id, outputs)

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
    def _validate(self, record: Record) -> tuple[ObservationMessage, StreamRuntime]:
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
        known = {s.name for s in runtime.model.series}
        unknown = sorted(set(message.counts) - known)
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
        try:
            runtime.model.check_observation(Observation(0, dict(message.counts)))
        except ObservationError as exc:
            raise _Reject("bad_count", str(exc), message.stream) from None
        return message, runtime

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
    async def _apply(self, runtime: StreamRuntime, message: ObservationMessage, day: int, record: Record) -> list[OutRecord]:
        started = time.perf_counter()
        result, exceedance, latest, block, growth = await asyncio.to_thread(self._step, runtime, message, day)
        self.metrics.step_seconds.labels(runtime.id).observe(time.perf_counter() - started)
        runtime.last_day, runtime.last_period = day, message.period
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
            quantities=summary.as_dict(),
            exceedance=exceedance,
            growth_probability=growth,
            forecast=block,
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

    def _step(self, runtime: StreamRuntime, message: ObservationMessage, day: int):
        """CPU work (runs in a worker thread): step, summarise, forecast."""
        pf, cfg = runtime.filter, runtime.config
        result = pf.step(Observation(day, dict(message.counts)))
        weights = pf.weights()
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
        return result, exceedance, {k: v for k, v in latest.items() if np.isfinite(v)}, block, growth
