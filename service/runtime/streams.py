"""Per-stream runtime state and the registry that creates or restores it."""

from __future__ import annotations

import datetime as dt
import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from filters import CompartmentalModel, FilterConfig, ParticleFilter, stream_generator
from schemas import (
    DeploymentConfig,
    ModelSpec,
    SpecError,
    StreamConfig,
    example_model_path,
    load_model_spec,
)

from ..errors import ConfigError
from ..state import Checkpoint, CheckpointStore
from .alerts import AlertState

__all__ = ["StreamRuntime", "StreamRegistry", "load_stream_model"]

log = logging.getLogger("casecloud.streams")


def load_stream_model(stream: StreamConfig) -> ModelSpec:
    """The stream's spec: a TOML path, or the name of a shipped example."""
    source = stream.model
    path = Path(source) if source.endswith(".toml") else example_model_path(source)
    return load_model_spec(path)


@dataclass
class StreamRuntime:
    """Everything one stream carries from message to message."""

    config: StreamConfig
    model: CompartmentalModel
    filter: ParticleFilter
    last_day: int | None = None
    last_period: str | None = None
    positions: dict[str, int] = field(default_factory=dict)  # "topic|partition" -> last applied offset
    # series -> event day -> (total assimilated, model day it was known as of, None: final), inside the window
    known: dict[str, dict[int, tuple[float, int | None]]] = field(default_factory=dict)
    alerts: dict[str, AlertState] = field(default_factory=dict)
    saved_at: float | None = None  # when the checkpoint it was restored from was written (file time)

    @property
    def id(self) -> str:
        return self.config.id

    def day_of(self, date: dt.date) -> int:
        return (date - self.config.start).days

    def to_checkpoint(self) -> Checkpoint:
        header, arrays = self.filter.state()
        return Checkpoint(
            stream_id=self.id,
            step=self.filter.step_count,
            header={
                "filter": header,
                "model": self.model.spec.name,
                "last_day": self.last_day,
                "last_period": self.last_period,
                "positions": dict(self.positions),
                "alerts": {k: v.to_json() for k, v in self.alerts.items()},
                "known": {
                    series: {str(day): [total, as_of] for day, (total, as_of) in sorted(days.items())}
                    for series, days in sorted(self.known.items())
                },
            },
            arrays=arrays,
        )


def _file_time(path: Path) -> float | None:
    try:
        return path.stat().st_mtime
    except OSError:  # a store without files (e.g. a Kafka topic)
        return None


class StreamRegistry:
    """Stream configs by id; runtimes created on first sight or restored from
    the newest valid checkpoint (lazily), models compiled once at start-up."""

    def __init__(self, config: DeploymentConfig, store: CheckpointStore) -> None:
        self.config = config
        self.store = store
        self.streams = {s.id: s for s in config.streams}
        self.models: dict[str, CompartmentalModel] = {}
        for s in config.streams:
            try:
                self.models[s.id] = CompartmentalModel(load_stream_model(s), window_days=s.assimilation_window_days)
            except (SpecError, ValueError) as exc:
                raise ConfigError(f"stream {s.id!r}: model {s.model!r} is unusable: {exc}", stream=s.id) from exc
            names = {series.name for series in self.models[s.id].series}
            for rule in s.alerts:
                if rule.series not in names:
                    raise ConfigError(
                        f"stream {s.id!r}: alert rule {rule.name!r} watches series {rule.series!r}, "
                        f"which the model does not observe; allowed: {sorted(names)}",
                        stream=s.id,
                    )
        self.runtimes: dict[str, StreamRuntime] = {}
        self.fallbacks: list[tuple[str, list[tuple[str, str]]]] = []  # not yet counted in metrics
        self._reported: set[tuple[str, str]] = set()

    def get(self, stream_id: str) -> StreamRuntime | None:
        """The stream's runtime, or None if the stream is not configured."""
        runtime = self.runtimes.get(stream_id)
        if runtime is None and stream_id in self.streams:
            runtime = self._load_or_create(stream_id)
            self.runtimes[stream_id] = runtime
        return runtime

    def _filter_config(self, s: StreamConfig) -> FilterConfig:
        return FilterConfig(
            n_particles=s.particles,
            resample_threshold=s.resample_threshold,
            scheme=s.scheme,
            liu_west_discount=s.liu_west_discount,
        )

    def _load_or_create(self, stream_id: str) -> StreamRuntime:
        s, model = self.streams[stream_id], self.models[stream_id]
        loaded = self.store.load_latest(stream_id, expected_fingerprint=model.fingerprint())
        if loaded is None:
            rng = stream_generator(self.config.service.seed, stream_id)
            pf = ParticleFilter(model, self._filter_config(s), rng, time=0)
            return StreamRuntime(s, model, pf)
        fresh = [(p, r) for p, r in loaded.skipped if (stream_id, str(p)) not in self._reported]
        if fresh:
            self._reported.update((stream_id, str(p)) for p, _ in fresh)
            log.warning("stream %s: skipped corrupt checkpoints %s; using %s", stream_id, loaded.skipped, loaded.path)
            self.fallbacks.append((stream_id, [(str(p), r) for p, r in fresh]))
        cp = loaded.checkpoint
        pf = ParticleFilter.from_state(model, cp.header["filter"], {k: np.asarray(v) for k, v in cp.arrays.items()})
        return StreamRuntime(
            s,
            model,
            pf,
            last_day=cp.header.get("last_day"),
            last_period=cp.header.get("last_period"),
            positions={k: int(v) for k, v in cp.header.get("positions", {}).items()},
            alerts={k: AlertState.from_json(v) for k, v in cp.header.get("alerts", {}).items()},
            known={
                series: {int(day): (float(total), None if as_of is None else int(as_of)) for day, (total, as_of) in days.items()}
                for series, days in cp.header.get("known", {}).items()
            },
            saved_at=_file_time(loaded.path),
        )

    def preload(self) -> None:
        """Load (or create) every configured stream now; raises on unusable checkpoints."""
        for stream_id in self.streams:
            self.get(stream_id)

    def resume_offsets(self, assigned: list[tuple[str, int]]) -> dict[tuple[str, int], int]:
        """Where to resume each assigned partition: after the oldest position any
        checkpointed stream recorded on it. Runtimes are reloaded from the store,
        since another replica may have advanced them while we did not own them."""
        self.runtimes.clear()
        wanted = {f"{t}|{p}": (t, p) for t, p in assigned}
        resume: dict[tuple[str, int], int] = {}
        for stream_id in self.streams:
            runtime = self.get(stream_id)
            assert runtime is not None
            for key, offset in runtime.positions.items():
                if key in wanted:
                    pair = wanted[key]
                    resume[pair] = min(resume.get(pair, offset + 1), offset + 1)
        return resume
