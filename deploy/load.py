#!/usr/bin/env python3
"""Sustained throughput of 1 and 2 casecloud replicas, and recovery after a
replica is killed, against a local single-node Kafka broker.

    .venv/bin/python deploy/load.py [--streams 8] [--days 40] [--particles 5000] [--json]
    .venv/bin/python deploy/load.py --bootstrap 127.0.0.1:9092      # an already running local broker

Everything stays on this machine: the broker is started from
the packaged launcher (service.broker, `casecloud broker run`) on 127.0.0.1 (or --bootstrap must be a loopback
address), the replicas are ``casecloud serve`` child processes sharing one
checkpoint directory, and every wait has a deadline. Needs the casecloud
package importable by this interpreter (run it with the project's venv).

Scenarios (each on a fresh input topic with ``--partitions`` partitions):

throughput-1 / throughput-2
    every observation (streams x days, one record per stream and day) is
    produced first, then 1 or 2 replicas in one consumer group drain the
    backlog. Throughput = records applied / seconds from the first applied
    record to the last (start-up and group join excluded).
recovery-sigkill / recovery-sigterm
    2 replicas apply the first half of the days; one replica (one that owns
    partitions) is killed with SIGKILL (or stopped with SIGTERM), the second
    half is produced at once, and the survivor must take over. Reported, in
    seconds from the kill: reassigned = the survivor logs the new assignment
    (its partitions plus the killed replica's); first moved record applied =
    the first new checkpoint of a stream from the killed replica's partitions
    (the survivor may first work through its own partitions' backlog);
    complete = every stream has every day. After SIGKILL the group only notices when the session
    times out (session_timeout_ms); SIGTERM leaves the group at once.

Replicas share a checkpoint directory here, as scale-out requires (deploy/README.md,
"Scaling out"). On a 2-core machine the two replicas and the broker compete
for the same cores: read the 2-replica figure as "what one more process
adds here", not as cluster scaling.
"""

from __future__ import annotations

import argparse
import asyncio
import datetime as dt
import ipaddress
import json
import os
import re
import signal
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path

START = dt.date(2025, 9, 1)
SESSION_TIMEOUT_MS = 6000


def _broker_module():
    from service.broker import launcher

    return launcher


def _loopback_only(bootstrap: str) -> str:
    for address in bootstrap.split(","):
        host = address.strip().rpartition(":")[0].strip("[]")
        if host != "localhost" and not ipaddress.ip_address(host).is_loopback:
            raise SystemExit(f"--bootstrap {bootstrap!r}: only loopback addresses (127.0.0.0/8, ::1, localhost) are allowed")
    return bootstrap


def season_feed(streams: list[str], days: int, seed: int) -> dict[str, list[bytes]]:
    """Per stream, one observation message per day of a simulated season (two-band SEIR)."""
    import numpy as np

    from filters import CompartmentalModel, simulate_season
    from schemas import example_model_path, load_model_spec

    model = CompartmentalModel(load_model_spec(example_model_path("seir_two_band")))
    feed = {}
    for i, stream in enumerate(streams):
        truth = simulate_season(model, days, np.random.default_rng(seed + i))
        feed[stream] = [
            json.dumps({
                "stream": stream,
                "period": (START + dt.timedelta(days=o.time)).isoformat(),
                "counts": {k: int(v) for k, v in o.values.items()},
            }).encode()
            for o in truth.observations
        ]
    return feed


async def _produce(bootstrap: str, topic: str, records: list[tuple[str, bytes]]) -> dict[str, int]:
    """Send in order with acks=all; return the partition each stream landed on."""
    from aiokafka import AIOKafkaProducer

    producer = AIOKafkaProducer(bootstrap_servers=bootstrap, acks="all", linger_ms=5)
    await producer.start()
    partitions: dict[str, int] = {}
    try:
        futures = [(key, await producer.send(topic, value=value, key=key.encode())) for key, value in records]
        for key, future in futures:
            partitions[key] = (await future).partition
    finally:
        await producer.stop()
    return partitions


def produce(bootstrap: str, topic: str, records: list[tuple[str, bytes]]) -> dict[str, int]:
    return asyncio.run(_produce(bootstrap, topic, records))


def day_slice(feed: dict[str, list[bytes]], lo: int, hi: int) -> list[tuple[str, bytes]]:
    """Days lo..hi-1 of every stream, day by day, as a daily feed would send them."""
    return [(s, feed[s][d]) for d in range(lo, hi) for s in sorted(feed)]


class Replica:
    def __init__(self, name: str, config: Path, log: Path) -> None:
        self.name, self.log = name, log
        self._out = open(log, "wb")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--config", str(config)],
            stdout=self._out, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
            env=dict(os.environ, PYTHONUNBUFFERED="1"),
        )

    def assigned(self) -> list[int]:
        """Partitions of the latest assignment, from the log."""
        found = re.findall(r"partitions assigned: \[(.*?)\]\n", self.log.read_text(errors="replace"))
        return [int(p) for p in re.findall(r"', (\d+)\)", found[-1])] if found else []

    def assigned_after(self, wall_time: float) -> float | None:
        """Wall-clock time of the first new partition assignment logged after ``wall_time``."""
        for stamp, ms in re.findall(r"^(\d{4}-\d\d-\d\d \d\d:\d\d:\d\d),(\d{3}) INFO casecloud\.kafka: partitions assigned: \[\(",
                                    self.log.read_text(errors="replace"), re.M):
            at = time.mktime(time.strptime(stamp, "%Y-%m-%d %H:%M:%S")) + int(ms) / 1000
            if at >= wall_time:
                return at
        return None

    def stop(self, sig: int = signal.SIGTERM, timeout: float = 60) -> int | None:
        if self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(30)
        self._out.close()
        return self.proc.returncode


def _write_config(path: Path, bootstrap: str, topic: str, ckpt: Path, streams: list[str], particles: int) -> Path:
    blocks = "".join(
        f'\n[[streams]]\nid = "{s}"\nmodel = "seir_two_band"\nstart = "{START}"\nparticles = {particles}\n'
        f'forecast_trajectories = 200\n\n[[streams.alerts]]\nname = "child_surge"\nseries = "ed_child"\n'
        f"threshold = 40\nhorizon_days = 7\nraise_level = 0.7\nclear_level = 0.4\n"
        for s in streams
    )
    path.write_text(
        f'transport = "kafka"\n\n[service]\nseed = 3\ncheckpoint_dir = "{ckpt}"\n\n[metrics]\nenabled = false\n\n'
        f'[kafka]\nbootstrap_servers = "{bootstrap}"\ngroup_id = "load-{topic}"\ninput_topic = "{topic}"\n'
        f'estimates_topic = "{topic}.estimates"\nalerts_topic = "{topic}.alerts"\n'
        f'dead_letter_topic = "{topic}.dead-letters"\nsession_timeout_ms = {SESSION_TIMEOUT_MS}\n' + blocks
    )
    return path


class Progress:
    """Polls the shared checkpoint directory: newest step per stream, and when each step first appeared."""

    def __init__(self, ckpt: Path, streams: list[str]) -> None:
        from service.state import LocalCheckpointStore

        self.store = LocalCheckpointStore(ckpt)
        self.streams = streams
        self.seen: dict[tuple[str, int], float] = {}

    def poll(self) -> dict[str, int]:
        now = time.monotonic()
        steps = {}
        for s in self.streams:
            infos = self.store.list(s)
            steps[s] = infos[0].step if infos else 0
            for info in infos:
                self.seen.setdefault((s, info.step), now)
        return steps

    def wait(self, target: dict[str, int] | int, timeout: float, replicas: list[Replica], what: str) -> float:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            steps = self.poll()
            goal = target if isinstance(target, dict) else {s: target for s in self.streams}
            if all(steps[s] >= goal[s] for s in self.streams):
                return time.monotonic()
            if not any(r.proc.poll() is None for r in replicas):
                raise SystemExit(f"every replica exited while waiting for {what}")
            time.sleep(0.05)
        raise SystemExit(f"timed out after {timeout:.0f}s waiting for {what}: {self.poll()}")


def throughput(bootstrap, broker, root, feed, replicas_n, partitions, particles, say, timeout) -> dict:
    topic = f"load-tp{replicas_n}-{uuid.uuid4().hex[:6]}"
    if broker is not None:
        broker.create_topic(topic, partitions)
    streams = sorted(feed)
    days = len(next(iter(feed.values())))
    mapping = produce(bootstrap, topic, day_slice(feed, 0, days))
    ckpt = root / f"{topic}-ckpt"
    config = _write_config(root / f"{topic}.toml", bootstrap, topic, ckpt, streams, particles)
    progress = Progress(ckpt, streams)
    say(f"throughput with {replicas_n} replica(s): {len(streams) * days} records on {partitions} partitions")
    replicas = [Replica(f"r{i}", config, root / f"{topic}-r{i}.log") for i in range(replicas_n)]
    try:
        done = progress.wait(days, timeout, replicas, f"{replicas_n} replica(s) to apply every record")
        assignments = {r.name: r.assigned() for r in replicas}
    finally:
        codes = [r.stop() for r in replicas]
    first = min(progress.seen[(s, 1)] for s in streams)
    records = len(streams) * days
    return {
        "replicas": replicas_n,
        "records": records,
        "seconds": round(done - first, 2),
        "records_per_second": round((records - 1) / (done - first), 2),
        "streams_per_partition": {str(p): sum(1 for s in streams if mapping[s] == p) for p in range(partitions)},
        "assignments": assignments,
        "exit_codes": codes,
    }


def recovery(bootstrap, broker, root, feed, partitions, particles, sig, say, timeout) -> dict:
    name = "sigkill" if sig == signal.SIGKILL else "sigterm"
    topic = f"load-rec-{name}-{uuid.uuid4().hex[:6]}"
    if broker is not None:
        broker.create_topic(topic, partitions)
    streams = sorted(feed)
    days = len(next(iter(feed.values())))
    half = days // 2
    ckpt = root / f"{topic}-ckpt"
    config = _write_config(root / f"{topic}.toml", bootstrap, topic, ckpt, streams, particles)
    progress = Progress(ckpt, streams)
    say(f"recovery after {name.upper()}: 2 replicas, {half} days, then one replica goes and {days - half} more days arrive")
    replicas = [Replica(f"r{i}", config, root / f"{topic}-r{i}.log") for i in range(2)]
    try:
        mapping = produce(bootstrap, topic, day_slice(feed, 0, half))
        progress.wait(half, timeout, replicas, "the first half")
        deadline = time.monotonic() + timeout  # both replicas hold partitions (the group has settled)
        while not all(r.assigned() for r in replicas) and time.monotonic() < deadline:
            time.sleep(0.1)
        victim, survivor = replicas[0], replicas[1]
        lost = victim.assigned()
        orphaned = [s for s in streams if mapping[s] in lost]
        t_kill, wall_kill = time.monotonic(), time.time()
        victim.proc.send_signal(sig)
        produce(bootstrap, topic, day_slice(feed, half, days))
        takeover = progress.wait({s: (half + 1 if s in orphaned else 0) for s in streams}, timeout, [survivor],
                                 "the survivor to take over") if orphaned else float("nan")
        complete = progress.wait(days, timeout, [survivor], "every record after the kill")
    finally:
        codes = [r.stop() for r in replicas]
    reassigned = survivor.assigned_after(wall_kill)
    return {
        "signal": name.upper(),
        "partitions_lost": lost,
        "streams_moved": len(orphaned),
        "reassigned_seconds": None if reassigned is None else round(reassigned - wall_kill, 2),
        "first_moved_record_applied_seconds": round(takeover - t_kill, 2),
        "complete_seconds": round(complete - t_kill, 2),
        "session_timeout_seconds": SESSION_TIMEOUT_MS / 1000,
        "exit_codes": codes,
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--streams", type=int, default=8)
    parser.add_argument("--days", type=int, default=40)
    parser.add_argument("--particles", type=int, default=5000)
    parser.add_argument("--partitions", type=int, default=4)
    parser.add_argument("--bootstrap", help="a running broker on a loopback address (default: start one)")
    parser.add_argument("--timeout", type=float, default=600, help="deadline of every wait, seconds")
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args(argv)
    if not (1 <= args.streams <= 200 and 2 <= args.days <= 400 and 2 <= args.partitions <= 32):
        parser.error("allowed: 1 <= --streams <= 200, 2 <= --days <= 400, 2 <= --partitions <= 32")
    say = (lambda _m: None) if args.json else (lambda m: print(f"load: {m}", file=sys.stderr, flush=True))
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    streams = [f"district-{i:02d}-ed" for i in range(args.streams)]
    say(f"simulating {args.streams} seasons of {args.days} days")
    feed = season_feed(streams, args.days, seed=17)
    results: dict = {"workload": {"streams": args.streams, "days": args.days, "particles": args.particles,
                                  "partitions": args.partitions, "model": "seir_two_band", "forecast_trajectories": 200,
                                  "cpus": os.cpu_count()}}
    with tempfile.TemporaryDirectory(prefix="casecloud-load-") as tmp:
        root = Path(tmp)
        broker = None
        bootstrap = _loopback_only(args.bootstrap) if args.bootstrap else None
        if bootstrap is None:
            say("starting a local Kafka broker")
            broker = _broker_module().KafkaBroker(root / "broker")
            broker.start(timeout=180)
            bootstrap = broker.bootstrap_servers
        try:
            for n in (1, 2):
                results[f"throughput_{n}"] = throughput(bootstrap, broker, root, feed, n, args.partitions, args.particles, say, args.timeout)
                say(f"  {results[f'throughput_{n}']}")
            for sig in (signal.SIGKILL, signal.SIGTERM):
                key = f"recovery_{'sigkill' if sig == signal.SIGKILL else 'sigterm'}"
                results[key] = recovery(bootstrap, broker, root, feed, args.partitions, args.particles, sig, say, args.timeout)
                say(f"  {results[key]}")
        finally:
            if broker is not None:
                broker.stop()
    print(json.dumps(results, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
