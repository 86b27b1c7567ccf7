"""The service loop: receive a record, process it, commit, repeat."""

from __future__ import annotations

import asyncio
import datetime as dt
import logging
from collections.abc import Callable, Sequence

from schemas import DeploymentConfig

from ..state import CheckpointStore, build_checkpoint_store
from ..transports.base import OutRecord, Record, Transport
from .http import HealthServer
from .metrics import Metrics
from .processor import Outcome, RecordProcessor
from .streams import StreamRegistry

__all__ = ["Service"]

log = logging.getLogger("casecloud.service")


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
        self.processor = RecordProcessor(config, self.registry, self.store, self.metrics, today, earlier=transport.earlier)
        self.on_outcome = on_outcome
        self.pipeline = pipeline
        self.ready = False
        self.http: HealthServer | None = None
        self.counts = {"applied": 0, "skipped": 0, "dead_letter": 0}
        self._pending: tuple[Record, asyncio.Future] | None = None

    def readiness(self) -> tuple[bool, str]:
        """Ready when connected and no stream is held for lost state (the reason when not)."""
        if not self.ready:
            return False, "not ready: starting or stopping"
        held, broken = self.registry.held(), self.registry.broken()
        if held or broken:
            parts = []
            if held:
                parts.append(f"streams held for lost state: {', '.join(held)}")
            if broken:
                parts.append(f"streams stopped on a model error: {', '.join(broken)}")
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

    async def _publish(self, records: list[OutRecord]) -> None:
        if records:
            await self.transport.publish(records)

    async def _settle(self) -> None:
        """Finish the deferred checkpoint write of the previous record, then commit it."""
        if self._pending is None:
            return
        record, task = self._pending
        self._pending = None
        await task
        await self.transport.commit(record)

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
        m = self.config.metrics
        if m.enabled:
            self.http = HealthServer(self.metrics.registry, self.readiness, m.host, m.port)
            await self.http.start()
            log.info("metrics on http://%s:%s/metrics", m.host, self.http.port)
        self.metrics.watch_lag(self.transport.lag)
        lock = getattr(self.transport, "processing", None) or asyncio.Lock()
        self._pending = None
        failed = False
        try:
            # Fail fast on unusable saved state (e.g. a checkpoint of another model).
            await asyncio.to_thread(self.registry.preload)
            self._count_fallbacks()
            # Seed the update age from the checkpoints, so a stream whose feed
            # stopped before a restart still shows as stale.
            for stream, runtime in self.registry.runtimes.items():
                if runtime.saved_at is not None:
                    self.metrics.last_update.setdefault(stream, runtime.saved_at)
            await self.transport.start(on_assign=self._on_assign, on_revoke=self._settle)
            self.ready = True
            while not stop.is_set():
                record = await self.transport.receive(timeout=0.5)
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
                        await self.transport.commit(record)
                self.counts[outcome.status] += 1
                if self.on_outcome is not None:
                    self.on_outcome(outcome)
        except BaseException:
            failed = True
            raise
        finally:
            self.ready = False
            try:
                if self._pending is not None:
                    if failed:
                        # Let the write finish (it is a complete, valid state) but
                        # do not commit: the record is re-read on restart.
                        await asyncio.gather(self._pending[1], return_exceptions=True)
                        self._pending = None
                    else:
                        await self._settle()
            finally:
                await self.transport.stop()
                if self.http is not None:
                    await self.http.stop()
                close = getattr(self.store, "close", None)
                if self._owns_store and close is not None:
                    await asyncio.to_thread(close)
        return dict(self.counts)
