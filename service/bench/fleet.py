"""``casecloud bench`` section ``fleet``: a county-level country's daily round
on one machine, through the service over Kafka.

Workload: ``streams`` streams (default 3,000) of the reference spec
(``seir_two_band``) with ``stream_particles`` particles each (default 2,000),
500 forecast trajectories and one exceedance-alert rule, fed one daily
observation each per round. Every stream's counts come from one of 16
simulated seasons.

How the work is spread over the cores: ``replicas`` (default 2) ``casecloud
serve`` processes in one consumer group share an input topic of
``partitions`` partitions (default 12, so the streams' keys spread evenly);
each process steps its own streams in its own worker thread, so two processes
use both cores (the broker's JVM shares them). The processes share one
checkpoint directory, as scaling out needs (deploy/README.md, "Scaling out").

Each round: the round's N records are produced at once; the round's time runs
from the first record produced to the last stream's estimate read back from
the estimates topic. Round 1 is each stream's first record (its cloud is drawn
from the prior, and the lost-state guard reads its partition back to make sure
the stream is new); later rounds are the daily routine, and the last one is the
figure the target is judged on. Also reported: records per second, peak
resident memory (VmHWM) per replica and of the broker, each replica's CPU
seconds in the timed round, checkpoint bytes per stream and in total, and the
bound ``keep_checkpoints`` puts on them. With fewer than 3,000 streams the
round time and the replicas' memory are also scaled linearly to 3,000 streams
(labelled as such); the targets are judged on those. Memory is scaled above
the resident size of a ``serve`` process with one stream (measured too,
``serve_one_stream_rss_bytes``), linearly in the fleet, which overstates it: a
replica keeps only the clouds of its own partitions' streams.
"""

from __future__ import annotations

import asyncio
import datetime as dt
import os
import re
import signal
import statistics
import subprocess
import sys
import tempfile
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from filters import CompartmentalModel, simulate_season
from schemas import example_model_path, load_model_spec

from .common import SectionResult, Target

__all__ = ["bench_fleet", "FLEET_STREAMS", "ROUND_SECONDS_MAX", "RSS_BYTES_MAX"]

FLEET_STREAMS = 3_000  # a county-level country
ROUND_SECONDS_MAX = 300.0  # the daily round of FLEET_STREAMS streams
RSS_BYTES_MAX = 2 * 1024**3  # per process
SEASONS = 16
START = dt.date(2025, 9, 1)
SPEC = "seir_two_band"


def _stream_id(i: int) -> str:
    return f"fleet-{i:05d}"


def _config_text(root: Path, bootstrap: str, topic: str, streams: int, particles: int, trajectories: int, keep: int) -> str:
    blocks = "".join(
        f"""
[[streams]]
id = "{_stream_id(i)}"
model = "{SPEC}"
start = "{START.isoformat()}"
particles = {particles}
forecast_trajectories = {trajectories}

[[streams.alerts]]
name = "surge"
series = "ed_child"
threshold = 40
horizon_days = 7
"""
        for i in range(streams)
    )
    return f"""# written by casecloud bench (fleet)
transport = "kafka"

[service]
seed = 20261201
checkpoint_dir = "{root / 'checkpoints'}"
keep_checkpoints = {keep}

[metrics]
enabled = false

[kafka]
bootstrap_servers = "{bootstrap}"
group_id = "{topic}"
input_topic = "{topic}"
estimates_topic = "{topic}.estimates"
alerts_topic = "{topic}.alerts"
dead_letter_topic = "{topic}.dead-letters"
session_timeout_ms = 30000
{blocks}"""


def _seasons(days: int) -> list[list[dict[str, int]]]:
    model = CompartmentalModel(load_model_spec(example_model_path(SPEC)))
    out = []
    for s in range(SEASONS):
        truth = simulate_season(model, days, np.random.default_rng(1000 + s))
        by_day = {o.time: {k: int(v) for k, v in o.values.items()} for o in truth.observations}
        out.append([by_day[d] for d in range(1, days + 1)])
    return out


def _round_records(streams: int, day: int, seasons: list[list[dict[str, int]]]) -> list[tuple[bytes, bytes]]:
    period = (START + dt.timedelta(days=day)).isoformat()
    return [
        (_stream_id(i).encode(), orjson.dumps({"stream": _stream_id(i), "period": period, "counts": seasons[i % SEASONS][day - 1]}))
        for i in range(streams)
    ]


def _proc_status(pid: int) -> dict[str, int]:
    """VmRSS and VmHWM in bytes from /proc (empty where /proc is not there)."""
    out = {}
    try:
        text = Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return out
    for key in ("VmRSS", "VmHWM"):
        m = re.search(rf"^{key}:\s+(\d+) kB", text, re.M)
        if m:
            out[key] = int(m.group(1)) * 1024
    return out


def _cpu_seconds(pid: int) -> float:
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return float("nan")
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")  # utime + stime


class _Replica:
    def __init__(self, index: int | str, config: Path, root: Path) -> None:
        self.log = root / f"replica-{index}.log"
        self._out = open(self.log, "ab")
        env = dict(os.environ, PYTHONUNBUFFERED="1")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--config", str(config)],
            stdout=self._out, stderr=subprocess.STDOUT, env=env, stdin=subprocess.DEVNULL,
        )

    def assigned(self) -> int | None:
        """Partitions of the latest assignment the replica logged (None before one)."""
        lines = [ln for ln in self.log.read_text(errors="replace").splitlines() if "partitions assigned:" in ln]
        if not lines:
            return None
        return lines[-1].count("(")

    def check_alive(self) -> None:
        if self.proc.poll() is not None:
            tail = "\n".join(self.log.read_text(errors="replace").splitlines()[-20:])
            raise RuntimeError(f"fleet replica {self.proc.args} exited with {self.proc.returncode}:\n{tail}")

    def stop(self, timeout: float = 120.0) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(30)
        self._out.close()


def _checkpoint_usage(root: Path) -> dict[str, Any]:
    files_per_stream, newest, total = [], [], 0
    if root.is_dir():
        for d in sorted(p for p in root.iterdir() if p.is_dir()):
            ckpts = sorted(d.glob("*.ckpt"))
            if not ckpts:
                continue
            sizes = [p.stat().st_size for p in ckpts]
            files_per_stream.append(len(ckpts))
            newest.append(sizes[-1])
            total += sum(sizes)
    return {"streams": len(newest), "files_per_stream_max": max(files_per_stream, default=0),
            "bytes_per_stream": statistics.mean(newest) if newest else 0.0, "bytes_total": total}


async def _run_rounds(bootstrap: str, topic: str, streams: int, rounds: int, replicas: list[_Replica],
                      say: Callable[[str], None], timeout: float) -> list[dict[str, float]]:
    from aiokafka import AIOKafkaConsumer, AIOKafkaProducer, TopicPartition

    seasons = _seasons(rounds)
    producer = AIOKafkaProducer(bootstrap_servers=bootstrap, acks="all", linger_ms=20)
    reader = AIOKafkaConsumer(bootstrap_servers=bootstrap, group_id=None, enable_auto_commit=False,
                              max_partition_fetch_bytes=16 * 1024 * 1024, fetch_max_bytes=64 * 1024 * 1024)
    await producer.start()
    await reader.start()
    out = []
    try:
        tp = TopicPartition(f"{topic}.estimates", 0)
        reader.assign([tp])
        await reader.seek_to_end(tp)
        for day in range(1, rounds + 1):
            records = _round_records(streams, day, seasons)
            period = (START + dt.timedelta(days=day)).isoformat()
            cpu0 = [_cpu_seconds(r.proc.pid) for r in replicas]
            t0 = time.perf_counter()
            futures = [await producer.send(topic, value=v, key=k) for k, v in records]
            await asyncio.gather(*futures)
            produced = time.perf_counter() - t0
            seen: set[bytes] = set()
            last = t0
            while len(seen) < streams:
                if time.perf_counter() - t0 > timeout:
                    raise RuntimeError(f"round {day}: {len(seen)} of {streams} estimates after {timeout:.0f} s")
                for r in replicas:
                    r.check_alive()
                batch = await reader.getmany(tp, timeout_ms=200, max_records=5000)
                for m in batch.get(tp, []):
                    if m.key not in seen and orjson.loads(m.value)["period"] == period:
                        seen.add(m.key)
                        last = time.perf_counter()
                say(f"fleet: round {day}: {len(seen)}/{streams} streams estimated")
            seconds = last - t0
            cpu = [_cpu_seconds(r.proc.pid) - c for r, c in zip(replicas, cpu0)]
            out.append({"day": day, "seconds": seconds, "produce_seconds": produced, "replica_cpu_seconds": cpu})
    finally:
        await reader.stop()
        await producer.stop()
    return out


async def _create_topics(bootstrap: str, specs: list[tuple[str, int]]) -> None:
    from aiokafka.admin import AIOKafkaAdminClient, NewTopic

    admin = AIOKafkaAdminClient(bootstrap_servers=bootstrap)
    await admin.start()
    try:
        await admin.create_topics([NewTopic(name, parts, 1) for name, parts in specs])
    finally:
        await admin.close()


def bench_fleet(
    particles: int = 10_000,
    repeats: int = 5,
    progress: Callable[[str], None] | None = None,
    streams: int = FLEET_STREAMS,
    stream_particles: int = 2_000,
    trajectories: int = 500,
    rounds: int = 2,
    replicas: int = 2,
    partitions: int = 12,
    keep_checkpoints: int = 3,
    bootstrap: str | None = None,
    round_timeout: float = 3_600.0,
) -> SectionResult:
    """The fleet's daily rounds (see the module docstring). ``particles`` and
    ``repeats`` (the other sections' workload) are not used: the fleet has its
    own ``stream_particles``, and each round is timed once."""
    say = progress or (lambda _: None)
    for name, value, low in (("streams", streams, 1), ("stream_particles", stream_particles, 1), ("rounds", rounds, 1),
                             ("replicas", replicas, 1), ("partitions", partitions, 1), ("trajectories", trajectories, 1)):
        if value < low:
            raise ValueError(f"fleet: {name} must be at least {low}, given {value}")
    if partitions < replicas:
        raise ValueError(f"fleet: partitions ({partitions}) must be at least replicas ({replicas}), or a replica idles")
    with tempfile.TemporaryDirectory(prefix="casecloud-fleet-") as tmp:
        root = Path(tmp)
        broker = None
        procs: list[_Replica] = []
        try:
            topic = f"fleet-{uuid.uuid4().hex[:8]}"
            outputs = [(f"{topic}.{k}", 1) for k in ("estimates", "alerts", "dead-letters", "one")]
            if bootstrap is None:
                from ..broker import KafkaBroker

                say("fleet: starting a local Kafka broker")
                broker = KafkaBroker(root / "broker")
                broker.start(timeout=180)
                bootstrap = broker.bootstrap_servers
                for name, parts in [(topic, partitions), *outputs]:
                    broker.create_topic(name, parts)
            else:
                asyncio.run(_create_topics(bootstrap, [(topic, partitions), *outputs]))
            say("fleet: memory of a serve process with one stream")
            one = root / "one.toml"
            one.write_text(_config_text(root / "one", bootstrap, f"{topic}.one", 1, stream_particles, trajectories, keep_checkpoints))
            probe = _Replica("one-stream", one, root)
            try:
                limit = time.monotonic() + 300
                while probe.assigned() is None:
                    probe.check_alive()
                    if time.monotonic() > limit:
                        raise RuntimeError(f"fleet: the one-stream serve process got no partition in 300 s ({probe.log})")
                    time.sleep(0.2)
                time.sleep(1.0)
                one_stream = _proc_status(probe.proc.pid).get("VmRSS", 0)
            finally:
                probe.stop()
            config = root / "fleet.toml"
            config.write_text(_config_text(root, bootstrap, topic, streams, stream_particles, trajectories, keep_checkpoints))
            say(f"fleet: starting {replicas} replicas with {streams} streams configured")
            procs = [_Replica(i, config, root) for i in range(replicas)]
            deadline = time.monotonic() + 600
            while True:
                for r in procs:
                    r.check_alive()
                got = [r.assigned() for r in procs]
                if all(g for g in got) and sum(got) == partitions:  # type: ignore[misc]
                    break
                if time.monotonic() > deadline:
                    raise RuntimeError(f"fleet: replicas hold {got} of {partitions} partitions after 600 s")
                time.sleep(0.5)
            time.sleep(2.0)  # let the group settle (a late rebalance would be timed otherwise)
            idle = [_proc_status(r.proc.pid) for r in procs]
            results = asyncio.run(_run_rounds(bootstrap, topic, streams, rounds, procs, say, round_timeout))
            time.sleep(1.0)  # the last round's checkpoints are written just after its estimates
            status = [_proc_status(r.proc.pid) for r in procs]
            broker_status = _proc_status(broker.proc.pid) if broker is not None and broker.proc is not None else {}
            held = [r.assigned() for r in procs]
        finally:
            for r in procs:
                r.stop()
            if broker is not None:
                broker.stop()
        usage = _checkpoint_usage(root / "checkpoints")

    timed = results[-1]
    scale = FLEET_STREAMS / streams
    peak = [s.get("VmHWM", 0) for s in status]
    base = [s.get("VmRSS", 0) for s in idle]
    # beyond a one-stream process, a replica's memory grows with the configured streams
    # (all loaded at start) and with its share of them (stepped, forecast)
    rss_at_fleet = [one_stream + (p - one_stream) * scale for p in peak]
    round_at_fleet = timed["seconds"] * scale
    bound = keep_checkpoints * usage["bytes_per_stream"] * streams
    figures: dict[str, Any] = {
        "workload": {"spec": SPEC, "streams": streams, "stream_particles": stream_particles,
                     "forecast_trajectories": trajectories, "alert_rules": 1, "rounds": rounds,
                     "replicas": replicas, "partitions": partitions, "keep_checkpoints": keep_checkpoints,
                     "cpu_count": os.cpu_count()},
        "round_seconds": [r["seconds"] for r in results],
        "first_round_seconds": results[0]["seconds"],
        "daily_round_seconds": timed["seconds"],
        "records_per_second": streams / timed["seconds"],
        "produce_seconds": timed["produce_seconds"],
        "replica_cpu_seconds_daily_round": timed["replica_cpu_seconds"],
        "replica_partitions": held,
        "serve_one_stream_rss_bytes": one_stream,
        "replica_idle_rss_bytes": base,
        "replica_peak_rss_bytes": peak,
        "broker_peak_rss_bytes": broker_status.get("VmHWM"),
        "checkpoint_bytes_per_stream": usage["bytes_per_stream"],
        "checkpoint_bytes_total": usage["bytes_total"],
        "checkpoint_files_per_stream_max": usage["files_per_stream_max"],
        "checkpoint_bytes_bound": bound,
        "checkpoint_bytes_bound_at_3000": keep_checkpoints * usage["bytes_per_stream"] * FLEET_STREAMS,
        "streams_with_checkpoints": usage["streams"],
    }
    scaled = "" if streams == FLEET_STREAMS else f" (measured at {streams} streams, scaled linearly to {FLEET_STREAMS})"
    if (stream_particles, trajectories) != (2_000, 500):
        scaled += f"; NOT comparable: the target assumes 2,000 particles and 500 trajectories per stream, this ran {stream_particles} and {trajectories}"
    if scaled:
        figures["daily_round_seconds_at_3000"] = round_at_fleet
        figures["replica_peak_rss_bytes_at_3000"] = rss_at_fleet
    targets = [
        Target("daily_round_seconds", round_at_fleet, ROUND_SECONDS_MAX, "max",
               f"a daily round of {FLEET_STREAMS} streams{scaled}"),
        Target("peak_rss_bytes", max(rss_at_fleet, default=0.0), float(RSS_BYTES_MAX), "max",
               f"largest replica's peak resident memory{scaled}"),
        Target("checkpoint_files", float(usage["files_per_stream_max"]), float(keep_checkpoints), "max",
               "checkpoint files per stream never exceed keep_checkpoints"),
    ]
    return SectionResult(figures, targets)
