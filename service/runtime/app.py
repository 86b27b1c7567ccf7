"""The service loop: receive a record, process it, commit, repeat.

Broker outages (the transport raises :class:`~service.errors.TransportUnavailable`,
or its :meth:`~service.transports.base.Transport.check_connection` probe fails)
do not end the loop: the operation that failed (receive, publish or commit) is
tried again with a backoff of 0.5 s doubling to 15 s, ``/readyz`` answers 503
with the reason and ``casecloud_broker_reachable`` is 0 until the broker answers
again. Nothing is committed meanwhile: a record's offset is committed only after
its outputs were acknowledged and its checkpoint is durable. A stop request
during an outage ends the wait; the record in flight is then processed again at
the next start (same checkpoint, same outputs). Errors that cannot pass by
waiting (refused credentials, a record the broker refuses) still end ``run``.
"""

from __future__ import annotations

import asyncio
import datetime as dt
import logging
import time
from collections.abc import Awaitable, Callable, Sequence
from typing import TypeVar

from schemas import DeploymentConfig

from ..errors import TransportUnavailable
from ..state import CheckpointStore, build_checkpoint_store
from ..transports.base import OutRecord, Record, Transport
from .http import HealthServer
from .metrics import Metrics
from .processor import Outcome, RecordProcessor
from .streams import StreamRegistry

__all__ = ["Service"]

log = logging.getLogger("casecloud.service")

T = TypeVar("T")
RETRY_FIRST_SECONDS = 0.5  # first wait after an operation found the broker away; doubles each time
RETRY_MAX_SECONDS = 15.0
PROBE_SECONDS = 2.0  # how often the transport's connection is checked


class _StoppedWhileAway(Exception):
    """A stop was asked for while an operation waited for the broker."""


class Service:
    """Composes transport, registry, processor, checkpoints and metrics.

    ``run`` returns when ``stop`` is set (after finishing the record in
    flight) or, with ``until_exhausted``, when a finite input is used up.
    """

    def __init__(
        self,
        config: DeploymentConfig,
        transport: Transport,
        store: CheckpointStore | None = None,
        metrics: Metrics | None = None,
        today: Callable[[], dt.date] = dt.date.today,
        on_outcome: Callable[[Outcome], None] | None = None,
        pipeline: bool = True,
    ) -> None:
        self.config = config
        self.transport = transport
        self._owns_store = store is None  # a store built here is closed by run()
        self.store = store if store is not None else build_checkpoint_store(config)
        self.metrics = metrics or Metrics()
        self.registry = StreamRegistry(config, self.store)
        for sid, model in self.registry.models.items():
            self.metrics.set_cadence(sid, [s.weekly for s in model.series])
        self.processor = RecordProcessor(config, self.registry, self.store, self.metrics, today, earlier=transport.earlier)
        self.on_outcome = on_outcome
        self.pipeline = pipeline
        self.ready = False
        self.http: HealthServer | None = None
        self.counts = {"applied": 0, "skipped": 0, "dead_letter": 0}
        self._pending: tuple[Record, asyncio.Future] | None = None
        self._stop: asyncio.Event | None = None
        # Why the broker looks away, by source ("probe", "operation"): (since, reason).
        self._away: dict[str, tuple[float, str]] = {}
        self._probe_ok = asyncio.Event()  # set while the connection probe succeeds

    def readiness(self) -> tuple[bool, str]:
        """Ready when connected, the broker answers and no stream is held for lost state (the reason when not)."""
        if not self.ready:
            return False, "not ready: starting or stopping"
        if self._away:
            since, reason = min(self._away.values())
            return False, (
                f"not ready: the broker has been unreachable for {time.monotonic() - since:.0f} s ({reason}); "
                "waiting for it, nothing is committed meanwhile"
            )
        held, broken = self.registry.held(), self.registry.broken("model_error")
        failed = self.registry.broken("internal_error")
        if held or broken or failed:
            parts = []
            if held:
                parts.append(f"streams held for lost state: {', '.join(held)}")
            if broken:
                parts.append(f"streams stopped on a model error: {', '.join(broken)}")
            if failed:
                parts.append(f"streams stopped on an internal error: {', '.join(failed)}")
            return False, "not ready: " + "; ".join(parts)
        return True, "ready"

    async def _on_assign(self, assigned: Sequence[tuple[str, int]]):
        resume = await asyncio.to_thread(self.registry.resume_offsets, list(assigned))
        self._count_fallbacks()
        log.info("resuming partitions at %s", resume)
        return resume

    def _count_fallbacks(self) -> None:
        for stream, _ in self.registry.fallbacks:
            self.metrics.checkpoint_fallbacks.labels(stream).inc()
        self.registry.fallbacks.clear()
        for stream, key in self.registry.config_drift:
            self.metrics.config_ignored.labels(stream, "particles" if key == "n_particles" else key).set(1)

    # ------------------------------------------------------------ outages
    def _set_away(self, source: str, reason: str | None) -> None:
        """Record (reason) or clear (None) one source's view that the broker is away; log the transitions."""
        was_away = bool(self._away)
        if source == "probe":
            (self._probe_ok.clear if reason else self._probe_ok.set)()
        if reason is None:
            if source in self._away:
                since, _ = self._away.pop(source)
                if was_away and not self._away:
                    log.warning("the broker answers again after %.1f s; going on", time.monotonic() - since)
        elif source not in self._away:
            self._away[source] = (time.monotonic(), reason)
            if not was_away:
                log.warning("the broker is unreachable (%s): waiting and retrying; nothing is committed meanwhile", reason)
        self.metrics.broker_reachable.set(0 if self._away else 1)

    async def _watch_broker(self) -> None:
        """Check the transport's connection every PROBE_SECONDS (readiness and the metric follow it)."""
        while True:
            try:
                reason = await self.transport.check_connection()
            except Exception as exc:  # a probe that breaks says the broker is not known to answer
                reason = f"connection check failed: {type(exc).__name__}: {exc}"
            self._set_away("probe", reason)
            await asyncio.sleep(PROBE_SECONDS)

    async def _stopped_while_away(self) -> None:
        """Returns once a stop was asked for and the broker is away: only then is an
        operation in flight abandoned (with the broker up, a stop finishes it)."""
        assert self._stop is not None
        await self._stop.wait()
        while not self._away:
            await asyncio.sleep(0.1)

    async def _unless_stopped(self, operation: Awaitable[T], what: str) -> T:
        if self._stop is None:
            return await operation
        task = asyncio.ensure_future(operation)
        stopper = asyncio.ensure_future(self._stopped_while_away())
        try:
            await asyncio.wait({task, stopper}, return_when=asyncio.FIRST_COMPLETED)
        except BaseException:
            task.cancel()  # we were cancelled: take the operation with us
            raise
        finally:
            stopper.cancel()
        if task.done():
            return task.result()
        task.cancel()
        await asyncio.gather(task, return_exceptions=True)
        raise _StoppedWhileAway(what)

    async def _backoff(self, delay: float) -> None:
        """Wait ``delay`` seconds, or less if the probe sees the broker come back meanwhile."""
        if self._probe_ok.is_set():
            await asyncio.sleep(delay)
            return
        try:
            await asyncio.wait_for(self._probe_ok.wait(), delay)
        except asyncio.TimeoutError:
            pass

    async def _retrying(self, what: str, operation: Callable[[], Awaitable[T]]) -> T:
        """``operation()`` until it succeeds; while it raises TransportUnavailable, wait
        RETRY_FIRST_SECONDS doubling to RETRY_MAX_SECONDS and try again. A stop asked for
        while the broker is away raises _StoppedWhileAway."""
        delay = RETRY_FIRST_SECONDS
        while True:
            try:
                result = await self._unless_stopped(operation(), what)
            except TransportUnavailable as exc:
                self._set_away("operation", f"{what} failed: {exc}")
                log.info("%s failed (%s); trying again in %.1f s", what, exc, delay)
                await self._unless_stopped(self._backoff(delay), what)
                delay = min(2 * delay, RETRY_MAX_SECONDS)
                continue
            self._set_away("operation", None)
            return result

    # ------------------------------------------------------------ the loop
    async def _publish(self, records: list[OutRecord]) -> None:
        if records:
            await self._retrying("publish", lambda: self.transport.publish(records))

    async def _commit(self, record: Record) -> None:
        await self._retrying("commit", lambda: self.transport.commit(record))

    async def _settle(self) -> None:
        """Finish the deferred checkpoint write of the previous record, then commit it."""
        if self._pending is None:
            return
        record, task = self._pending
        self._pending = None
        await task
        await self._commit(record)

    async def run(self, stop: asyncio.Event | None = None, until_exhausted: bool = False) -> dict[str, int]:
        """Process records until ``stop`` is set (or a finite input ends).

        Pipelining: a record's checkpoint is written in a worker thread while
        the next record is validated and stepped; the record's offset is
        committed only once its checkpoint is durable, and checkpoints are
        written in order. Publishing record k+1 before checkpoint k is durable
        is safe: a crash re-processes both from the older checkpoint and
        re-publishes identical bytes.
        """
        stop = stop or asyncio.Event()
        self._stop = stop
        m = self.config.metrics
        if m.enabled:
            self.http = HealthServer(self.metrics.registry, self.readiness, m.host, m.port)
            await self.http.start()
            log.info("metrics on http://%s:%s/metrics", m.host, self.http.port)
        self.metrics.watch_lag(self.transport.lag)
        lock = getattr(self.transport, "processing", None) or asyncio.Lock()
        self._pending = None
        failed = False
        watch: asyncio.Future | None = None
        try:
            # Fail fast on unusable saved state (e.g. a checkpoint of another model).
            saved = await asyncio.to_thread(self.registry.preload)
            self._count_fallbacks()
            # Seed the update age from the checkpoints, so a stream whose feed
            # stopped before a restart still shows as stale.
            for stream, saved_at in saved.items():
                self.metrics.last_update.setdefault(stream, saved_at)
            await self.transport.start(on_assign=self._on_assign, on_revoke=self._settle)
            self.metrics.broker_reachable.set(1)
            watch = asyncio.ensure_future(self._watch_broker())
            self.ready = True
            while not stop.is_set():
                record = await self._retrying("receive", lambda: self.transport.receive(timeout=0.5))
                if record is None:
                    async with lock:
                        await self._settle()
                    if until_exhausted and self.transport.exhausted:
                        break
                    continue
                async with lock:
                    if not self.transport.is_current(record):
                        continue
                    outcome = await self.processor.handle(record, self._publish, defer_checkpoint=True)
                    await self._settle()
                    if outcome.checkpoint is not None:
                        write = self.processor.write_checkpoint(outcome.checkpoint)
                        self._pending = (record, asyncio.ensure_future(write))
                        if not self.pipeline:
                            await self._settle()
                    else:
                        await self._commit(record)
                self.counts[outcome.status] += 1
                if self.on_outcome is not None:
                    self.on_outcome(outcome)
        except _StoppedWhileAway as exc:
            failed = True  # nothing more is committed; the record in flight is read again at the next start
            log.warning("stopped while the broker was unreachable (%s was not finished); "
                        "the next start resumes from the checkpoints", exc)
        except BaseException:
            failed = True
            raise
        finally:
            self.ready = False
            if watch is not None:
                watch.cancel()
                await asyncio.gather(watch, return_exceptions=True)
            try:
                if self._pending is not None:
                    if failed:
                        # Let the write finish (it is a complete, valid state) but
                        # do not commit: the record is re-read on restart.
                        await asyncio.gather(self._pending[1], return_exceptions=True)
                        self._pending = None
                    else:
                        try:
                            await self._settle()
                        except _StoppedWhileAway:
                            log.warning("stopped while the broker was unreachable: the last checkpoint is durable, "
                                        "its offset is not committed (harmless: the checkpoint is the truth)")
            finally:
                await self.transport.stop()
                if self.http is not None:
                    await self.http.stop()
                close = getattr(self.store, "close", None)
                if self._owns_store and close is not None:
                    await asyncio.to_thread(close)
        return dict(self.counts)
