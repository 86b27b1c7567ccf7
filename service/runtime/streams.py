"""Per-stream runtime state and the registry that creates or restores it."""

from __future__ import annotations

import datetime as dt
import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from filters import CompartmentalModel, FilterConfig, IndividualModel, ParticleFilter, build_model, stream_generator
from schemas import (
    DeploymentConfig,
    IndividualModelSpec,
    ModelSpec,
    SpecError,
    StreamConfig,
    load_named_spec,
)

from ..errors import ConfigError
from ..state import Checkpoint, CheckpointStore
from .alerts import AlertState

__all__ = ["StreamRuntime", "StreamRegistry", "load_stream_model"]

log = logging.getLogger("casecloud.streams")


def load_stream_model(stream: StreamConfig) -> ModelSpec | IndividualModelSpec:
    """The stream's spec: a TOML path (either model family, by the file's top-level
    ``kind``), or the name of a shipped example."""
    return load_named_spec(stream.model)


@dataclass
class StreamRuntime:
    """Everything one stream carries from message to message."""

    config: StreamConfig
    model: CompartmentalModel | IndividualModel
    filter: ParticleFilter
    last_day: int | None = None
    last_period: str | None = None
    positions: dict[str, int] = field(default_factory=dict)  # "topic|partition" -> last applied offset
    # series -> event day -> (total assimilated, model day it was known as of, None: final), inside the window
    known: dict[str, dict[int, tuple[float, int | None]]] = field(default_factory=dict)
    # positivity series -> day -> the tests behind the positives assimilated, inside the window
    tests: dict[str, dict[int, float]] = field(default_factory=dict)
    # concentration series -> event day -> (lod, flow) of the sample assimilated, inside the window
    samples: dict[str, dict[int, tuple[float | None, float | None]]] = field(default_factory=dict)
    alerts: dict[str, AlertState] = field(default_factory=dict)
    saved_at: float | None = None  # when the checkpoint it was restored from was written (file time)
    # Lost-state guard: ``fresh`` until the first record shows whether the stream is new;
    # ``held`` says why its records are not applied (it was advanced before but has no checkpoint).
    fresh: bool = False
    held: str | None = None
    operations: list[dict] = field(default_factory=list)  # operator actions (rebuild, reset), oldest first
    broken: str | None = None  # a model error stopped the stream (in memory only: a restart with a fixed spec clears it)
    # why: "model_error" (the spec cannot run on this cloud) or "internal_error" (a defect of casecloud's own)
    broken_reason: str = "model_error"

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
                # what the particles mean, so an operator can later move them to a revised spec
                "spec": self.model.spec.model_dump(mode="json", by_alias=True),
                "window_days": getattr(self.model, "window_days", None),
                "last_day": self.last_day,
                "last_period": self.last_period,
                "positions": dict(self.positions),
                "alerts": {k: v.to_json() for k, v in self.alerts.items()},
                **({"operations": list(self.operations)} if self.operations else {}),
                "known": {
                    series: {str(day): [total, as_of] for day, (total, as_of) in sorted(days.items())}
                    for series, days in sorted(self.known.items())
                },
                **({"tests": {series: {str(day): n for day, n in sorted(days.items())} for series, days in sorted(self.tests.items()) if days}}
                   if any(self.tests.values()) else {}),
                **({"samples": {series: {str(day): list(s) for day, s in sorted(days.items())} for series, days in sorted(self.samples.items()) if days}}
                   if any(self.samples.values()) else {}),
            },
            arrays=arrays,
        )


def samples_from_header(header: dict, keep: set[str] | None = None) -> dict[str, dict[int, tuple[float | None, float | None]]]:
    """The (lod, flow) of the concentration samples a checkpoint header holds (``keep``: only these series)."""
    return {
        series: {int(day): (lod, flow) for day, (lod, flow) in days.items()}
        for series, days in header.get("samples", {}).items()
        if keep is None or series in keep
    }


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
        self.models: dict[str, CompartmentalModel | IndividualModel] = {}
        for s in config.streams:
            try:
                self.models[s.id] = build_model(load_stream_model(s), window_days=s.assimilation_window_days)
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
        self.config_drift: dict[tuple[str, str], tuple[object, object]] = {}  # (stream, key) -> (checkpoint, config)
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
            return self.from_prior(stream_id, fresh=True)
        fresh = [(p, r) for p, r in loaded.skipped if (stream_id, str(p)) not in self._reported]
        if fresh:
            self._reported.update((stream_id, str(p)) for p, _ in fresh)
            log.warning("stream %s: skipped corrupt checkpoints %s; using %s", stream_id, loaded.skipped, loaded.path)
            self.fallbacks.append((stream_id, [(str(p), r) for p, r in fresh]))
        cp = loaded.checkpoint
        pf = ParticleFilter.from_state(model, cp.header["filter"], {k: np.asarray(v) for k, v in cp.arrays.items()})
        self._report_config_drift(stream_id, pf.config)
        return StreamRuntime(
            s,
            model,
            pf,
            last_day=cp.header.get("last_day"),
            last_period=cp.header.get("last_period"),
            positions={k: int(v) for k, v in cp.header.get("positions", {}).items()},
            alerts={k: AlertState.from_json(v) for k, v in cp.header.get("alerts", {}).items()},
            operations=list(cp.header.get("operations", [])),
            known={
                series: {int(day): (float(total), None if as_of is None else int(as_of)) for day, (total, as_of) in days.items()}
                for series, days in cp.header.get("known", {}).items()
            },
            tests={series: {int(day): float(n) for day, n in days.items()} for series, days in cp.header.get("tests", {}).items()},
            samples=samples_from_header(cp.header),
            saved_at=_file_time(loaded.path),
        )

    def from_prior(self, stream_id: str, fresh: bool = False) -> StreamRuntime:
        """A new cloud drawn from the stream's prior, seeded from (deployment seed, stream id)."""
        s, model = self.streams[stream_id], self.models[stream_id]
        rng = stream_generator(self.config.service.seed, stream_id)
        pf = ParticleFilter(model, self._filter_config(s), rng, time=0)
        return StreamRuntime(s, model, pf, fresh=fresh)

    def reload(self, stream_id: str) -> StreamRuntime | None:
        """The stream from its newest checkpoint if it has one now (after a rebuild or a
        reset by an operator), replacing the runtime in memory; None if it still has none."""
        runtime = self._load_or_create(stream_id)
        if runtime.fresh:
            return None
        self.runtimes[stream_id] = runtime
        return runtime

    def held(self) -> list[str]:
        """Streams whose records are held back until an operator restores their state."""
        return sorted(sid for sid, r in self.runtimes.items() if r.held is not None)

    def broken(self, reason: str | None = None) -> list[str]:
        """Streams stopped on a model error (NaN, negative or infinite rates and the like) or on an
        internal error (``reason``: only those stopped for it)."""
        return sorted(
            sid for sid, r in self.runtimes.items() if r.broken is not None and (reason is None or r.broken_reason == reason)
        )

    def _report_config_drift(self, stream_id: str, saved: FilterConfig) -> None:
        """Filter settings in the config that differ from the checkpoint's: the checkpoint's
        are used (they shaped the cloud); each difference is logged once and kept in
        :attr:`config_drift` for the metrics."""
        wanted = self._filter_config(self.streams[stream_id])
        for key in ("n_particles", "resample_threshold", "scheme", "liu_west_discount"):
            have, want = getattr(saved, key), getattr(wanted, key)
            if have != want and (stream_id, key) not in self.config_drift:
                self.config_drift[(stream_id, key)] = (have, want)
                name = "particles" if key == "n_particles" else key
                log.warning(
                    "stream %s: config sets %s = %r but its checkpoint holds %r; the checkpoint's value is used "
                    "(a reset or rebuild applies the new one)", stream_id, name, want, have,
                )

    def preload(self) -> dict[str, float]:
        """Check every configured stream's saved state now (raises on an unusable checkpoint)
        and say when each checkpoint was written. The clouds are not kept: a replica holds only
        the streams of its partitions (:meth:`resume_offsets`), others load when first needed."""
        saved: dict[str, float] = {}
        for stream_id in self.streams:
            runtime = self.runtimes.get(stream_id) or self._load_or_create(stream_id)
            if runtime.saved_at is not None:
                saved[stream_id] = runtime.saved_at
        return saved

    def resume_offsets(self, assigned: list[tuple[str, int]]) -> dict[tuple[str, int], int]:
        """Where to resume each assigned partition: after the oldest position any
        checkpointed stream recorded on it. Runtimes are reloaded from the store,
        since another replica may have advanced them while we did not own them."""
        self.runtimes.clear()
        wanted = {f"{t}|{p}": (t, p) for t, p in assigned}
        resume: dict[tuple[str, int], int] = {}
        for stream_id in self.streams:
            runtime = self._load_or_create(stream_id)
            mine = False
            for key, offset in runtime.positions.items():
                if key in wanted:
                    pair = wanted[key]
                    resume[pair] = min(resume.get(pair, offset + 1), offset + 1)
                    mine = True
            if mine:  # keep only this replica's clouds in memory; the rest load if ever needed
                self.runtimes[stream_id] = runtime
        return resume
