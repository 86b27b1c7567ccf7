"""Prometheus metrics of the service (``casecloud_`` prefix, base units)."""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram
from prometheus_client.core import GaugeMetricFamily

__all__ = ["Metrics", "STEP_BUCKETS"]

# Filter steps take milliseconds to seconds depending on particles and model.
STEP_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)
WRITE_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5)


class _AgeCollector:
    """Seconds since each stream's last update, computed at scrape time, labelled
    with the stream's cadence (how often it is expected to be updated)."""

    def __init__(self, last_update: dict[str, float], clock: Callable[[], float], cadence: dict[str, str]) -> None:
        self.last_update, self.clock, self.cadence = last_update, clock, cadence

    def collect(self):
        family = GaugeMetricFamily(
            "casecloud_stream_update_age_seconds",
            "Seconds since the stream's cloud was last updated (cadence: daily if any series of its model is daily, else weekly)",
            labels=["stream", "cadence"],
        )
        now = self.clock()
        for stream, at in sorted(self.last_update.items()):
            family.add_metric([stream, self.cadence.get(stream, "daily")], max(0.0, now - at))
        yield family


class _LagCollector:
    def __init__(self, source: Callable[[], dict[tuple[str, int], int]]) -> None:
        self.source = source

    def collect(self):
        family = GaugeMetricFamily(
            "casecloud_consumer_lag_records", "Input records not yet consumed", labels=["topic", "partition"]
        )
        for (topic, partition), lag in sorted(self.source().items()):
            family.add_metric([topic, str(partition)], lag)
        yield family


class Metrics:
    def __init__(self, registry: CollectorRegistry | None = None, clock: Callable[[], float] = time.time) -> None:
        self.registry = registry if registry is not None else CollectorRegistry()
        r = self.registry
        self.processed = Counter("casecloud_messages_processed", "Observations assimilated", ["stream"], registry=r)
        self.skipped = Counter("casecloud_messages_skipped", "Records skipped (duplicate period, already applied)", ["stream", "reason"], registry=r)
        self.dead_lettered = Counter("casecloud_messages_dead_lettered", "Records sent to the dead-letter topic", ["reason"], registry=r)
        self.step_seconds = Histogram("casecloud_step_duration_seconds", "Filter step, forecast and summary time", ["stream"], buckets=STEP_BUCKETS, registry=r)
        self.publish_seconds = Histogram("casecloud_publish_duration_seconds", "Time to publish and be acknowledged", buckets=WRITE_BUCKETS, registry=r)
        self.checkpoint_seconds = Histogram("casecloud_checkpoint_write_duration_seconds", "Checkpoint write time (fsync included)", buckets=WRITE_BUCKETS, registry=r)
        self.checkpoint_bytes = Gauge("casecloud_checkpoint_size_bytes", "Size of the stream's newest checkpoint", ["stream"], registry=r)
        self.checkpoint_failures = Counter("casecloud_checkpoint_failures", "Checkpoint writes or reads that failed", ["stream"], registry=r)
        self.checkpoint_fallbacks = Counter("casecloud_checkpoint_fallbacks", "Loads that skipped a corrupt newest checkpoint", ["stream"], registry=r)
        self.ess = Gauge("casecloud_effective_sample_size", "Effective sample size after the latest update", ["stream"], registry=r)
        self.ess_ratio = Gauge("casecloud_effective_sample_size_ratio", "Effective sample size divided by particle count", ["stream"], registry=r)
        self.log_evidence = Gauge("casecloud_log_evidence_increment", "Log-evidence increment of the latest update", ["stream"], registry=r)
        self.resamples = Counter("casecloud_resamples", "Resampling events", ["stream"], registry=r)
        self.collapses = Counter("casecloud_collapses", "Updates where no particle explained the data", ["stream"], registry=r)
        self.distinct_paths = Gauge(
            "casecloud_distinct_paths", "Distinct particle ancestors at the oldest day of the assimilation window", ["stream"], registry=r
        )
        self.distinct_paths_ratio = Gauge(
            "casecloud_distinct_paths_ratio", "Distinct ancestors at the oldest day of the window divided by particle count", ["stream"], registry=r
        )
        self.needs_recovery = Gauge(
            "casecloud_stream_needs_recovery", "1 while a stream that lost its state is held for an operator", ["stream"], registry=r
        )
        self.model_errors = Gauge(
            "casecloud_stream_model_error", "1 while a stream is stopped on a model error (its records are kept as dead letters)", ["stream"], registry=r
        )
        self.internal_errors = Gauge(
            "casecloud_stream_internal_error",
            "1 while a stream is stopped on an internal error of casecloud (its records are kept as dead letters)",
            ["stream"],
            registry=r,
        )
        self.config_ignored = Gauge(
            "casecloud_stream_config_ignored",
            "1 where a filter setting in the config differs from the stream's checkpoint (the checkpoint's is used)",
            ["stream", "key"],
            registry=r,
        )
        self.broker_reachable = Gauge(
            "casecloud_broker_reachable",
            "1 while the transport reaches its broker; 0 during an outage (records wait, nothing is committed)",
            registry=r,
        )
        self.late_values = Counter("casecloud_late_values", "Series values assimilated for a past period (inside the window)", ["stream"], registry=r)
        self.revisions = Counter("casecloud_revisions", "Revised totals whose increment was assimilated", ["stream"], registry=r)
        self.alerts = Counter("casecloud_alert_events", "Alert messages published", ["stream", "rule", "status"], registry=r)
        self.last_update: dict[str, float] = {}
        self.cadence: dict[str, str] = {}  # stream -> "daily" | "weekly" (see set_cadence)
        self.clock = clock
        r.register(_AgeCollector(self.last_update, clock, self.cadence))
        self._lag_source: Callable[[], dict[tuple[str, int], int]] = dict
        r.register(_LagCollector(lambda: self._lag_source()))

    def watch_lag(self, source: Callable[[], dict[tuple[str, int], int]]) -> None:
        self._lag_source = source

    def set_cadence(self, stream: str, weekly_series: Sequence[bool]) -> None:
        """The stream's cadence label from its model's series: ``daily`` if any series is
        daily (an update a day is expected), ``weekly`` if every series is weekly."""
        self.cadence[stream] = "weekly" if weekly_series and all(weekly_series) else "daily"

    def mark_updated(self, stream: str) -> None:
        self.last_update[stream] = self.clock()
