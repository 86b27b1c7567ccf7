"""The service against a real Apache Kafka broker (single-node KRaft, started
by the suite): crash consistency under SIGKILL, rebalancing between two
processes in one consumer group, and a round trip with kcat as an
independent client."""

from __future__ import annotations

import base64
import random
import shutil
import subprocess
from collections import defaultdict

import orjson
import pytest

from kafka_helpers import (
    ServiceProcess,
    newest_step,
    produce,
    read_all,
    season_messages,
    wait_for,
    write_config,
)

pytestmark = pytest.mark.integration


def _by_id(records) -> dict[str, set[bytes]]:
    out: dict[str, set[bytes]] = defaultdict(set)
    for r in records:
        out[orjson.loads(r.value)["id"]].add(r.value)
    return out


def _newest_file(checkpoint_dir, stream):
    from service.state import LocalCheckpointStore

    return LocalCheckpointStore(checkpoint_dir).list(stream)[0].path.read_bytes()


def test_sigkill_at_random_points_resumes_bit_identically(kafka_broker, tmp_path):
    """Kill the service (SIGKILL) at random points while it consumes 120
    observations, restart it each time; the final checkpoint is bit-identical
    to an uninterrupted run's, and the published estimate ids are the same set
    with identical content (duplicates allowed)."""
    bootstrap = kafka_broker.bootstrap_servers
    stream, days = "harbourside-ili", 120
    topic = "crash.observations"
    kafka_broker.create_topic(topic, 1)
    produce(bootstrap, topic, [(stream.encode(), m) for m in season_messages(stream, days, seed=5)])

    ref_dir = tmp_path / "ref-ckpt"
    ref_cfg = write_config(tmp_path / "ref.toml", bootstrap, topic, "ref", ref_dir, [stream], out_prefix="crash.ref")
    ref = ServiceProcess(ref_cfg, tmp_path / "ref.log").start()
    wait_for(lambda: newest_step(ref_dir, stream) == days, 180, "reference run to finish", ref)
    assert ref.terminate() == 0, ref.log_tail()

    run_dir = tmp_path / "run-ckpt"
    run_cfg = write_config(tmp_path / "run.toml", bootstrap, topic, "run", run_dir, [stream], out_prefix="crash.run")
    rng = random.Random(20261201)
    targets = sorted(rng.sample(range(5, days - 5), 5))
    killed_at = []
    for i, target in enumerate(targets):
        proc = ServiceProcess(run_cfg, tmp_path / f"run-{i}.log").start()
        wait_for(lambda: newest_step(run_dir, stream) >= target, 180, f"step {target}", proc, interval=0.01)
        proc.kill()
        killed_at.append(newest_step(run_dir, stream))
    final = ServiceProcess(run_cfg, tmp_path / "run-final.log").start()
    wait_for(lambda: newest_step(run_dir, stream) == days, 180, "interrupted run to finish", final)
    assert final.terminate() == 0, final.log_tail()
    print(f"killed at checkpoint steps {killed_at} of {days}")
    assert len(set(killed_at)) >= 3 and all(0 < k < days for k in killed_at)

    assert _newest_file(run_dir, stream) == _newest_file(ref_dir, stream)

    ref_est = _by_id(read_all(bootstrap, "crash.ref.estimates"))
    run_est = _by_id(read_all(bootstrap, "crash.run.estimates"))
    assert len(ref_est) == days
    assert set(run_est) == set(ref_est)
    for event_id, values in run_est.items():
        assert values == ref_est[event_id], f"estimate {event_id} was published with different content"


def test_two_processes_share_partitions_without_loss_or_double_application(kafka_broker, tmp_path):
    """Two service processes in one consumer group over a two-partition topic:
    partitions move when the second joins and again when the first stops;
    every observation is applied exactly once and the final state equals a
    single-process run's."""
    bootstrap = kafka_broker.bootstrap_servers
    topic = "rebalance.observations"
    kafka_broker.create_topic(topic, 2)
    streams = [f"ward-{c}" for c in "abcdef"]
    days = 60
    seasons = {s: season_messages(s, days, seed=i) for i, s in enumerate(streams)}

    def day_slice(lo, hi):
        return [(s.encode(), seasons[s][d]) for d in range(lo, hi) for s in streams]

    shared = tmp_path / "shared-ckpt"
    cfg = write_config(tmp_path / "group.toml", bootstrap, topic, "pair", shared, streams, particles=300)
    a = ServiceProcess(cfg, tmp_path / "a.log").start()
    produce(bootstrap, topic, day_slice(0, 20))
    wait_for(lambda: all(newest_step(shared, s) == 20 for s in streams), 180, "first 20 days", a)
    b = ServiceProcess(cfg, tmp_path / "b.log").start()
    wait_for(lambda: "partitions assigned: [(" in b.log.read_text(), 60, "second process to get partitions", b)
    produce(bootstrap, topic, day_slice(20, 40))
    wait_for(lambda: all(newest_step(shared, s) == 40 for s in streams), 180, "days 20-40", b)
    produce(bootstrap, topic, day_slice(40, days))
    assert a.terminate() == 0, a.log_tail()
    wait_for(lambda: all(newest_step(shared, s) == days for s in streams), 180, "all days after first stops", b)
    assert b.terminate() == 0, b.log_tail()
    assert "partitions assigned: [(" in a.log.read_text()

    # A single process over the same input, for comparison.
    single_dir = tmp_path / "single-ckpt"
    single_cfg = write_config(tmp_path / "single.toml", bootstrap, topic, "single", single_dir, streams, particles=300, out_prefix="rebalance.single")
    one = ServiceProcess(single_cfg, tmp_path / "single.log").start()
    wait_for(lambda: all(newest_step(single_dir, s) == days for s in streams), 240, "single-process run", one)
    assert one.terminate() == 0, one.log_tail()

    for s in streams:
        assert _newest_file(shared, s) == _newest_file(single_dir, s), f"stream {s} differs from the single-process run"
    estimates = read_all(bootstrap, f"{topic}.estimates")
    periods: dict[str, dict[str, set[bytes]]] = defaultdict(lambda: defaultdict(set))
    for r in estimates:
        e = orjson.loads(r.value)
        periods[e["stream"]][e["period"]].add(r.value)
    for s in streams:
        assert len(periods[s]) == days, f"stream {s}: {len(periods[s])} periods estimated, expected {days}"
        assert all(len(v) == 1 for v in periods[s].values()), f"stream {s}: a period was estimated twice differently"


def test_kcat_round_trip_with_dead_letter(kafka_broker, tmp_path):
    """kcat (an independent Kafka client) produces observations and a malformed
    record; kcat reads back estimates carrying CloudEvents headers, and the
    dead letter carries the original bytes."""
    kcat = shutil.which("kcat")
    assert kcat, "kcat is not installed: run `apt-get install -y kcat` (the CI script does)"
    bootstrap = kafka_broker.bootstrap_servers
    topic = "kcat.observations"
    stream = "millbrook-ed"
    kafka_broker.create_topic(topic, 1)
    lines = [stream.encode() + b"|" + m for m in season_messages(stream, 10, seed=3)]
    garbage = b'{"stream": "millbrook-ed", "period": "2025-09-12", "counts": {"onsets": 4'
    payload = b"\n".join(lines + [stream.encode() + b"|" + garbage]) + b"\n"
    subprocess.run([kcat, "-P", "-b", bootstrap, "-t", topic, "-K", "|"], input=payload, check=True, timeout=60)

    ckpt = tmp_path / "ckpt"
    cfg = write_config(tmp_path / "kcat.toml", bootstrap, topic, "kcat", ckpt, [stream])
    proc = ServiceProcess(cfg, tmp_path / "kcat.log").start()
    wait_for(lambda: newest_step(ckpt, stream) == 10, 120, "10 observations applied", proc)

    def consume(t: str, expected: int) -> list[dict]:
        out = subprocess.run(
            [kcat, "-C", "-b", bootstrap, "-t", t, "-o", "beginning", "-e", "-J"],
            capture_output=True, check=True, timeout=60,
        ).stdout
        return [orjson.loads(line) for line in out.splitlines() if line.strip()]

    estimates = wait_for(lambda: (lambda r: r if len(r) >= 10 else None)(consume(f"{topic}.estimates", 10)), 60, "estimates via kcat", proc)
    for record in estimates:
        body = orjson.loads(record["payload"])
        headers = dict(zip(record["headers"][::2], record["headers"][1::2]))
        assert record["key"] == stream
        assert headers["ce_id"] == body["id"]
        assert headers["ce_specversion"] == "1.0"
        assert headers["ce_type"] == "invalid.casecloud.estimate.v1"  # reverse-DNS of the .invalid schema domain
        assert headers["content-type"] == "application/json"
        assert body["stream"] == stream and body["quantities"]["I[all]"]["quantiles"]
    dead = wait_for(lambda: consume(f"{topic}.dead-letters", 1), 60, "dead letter via kcat", proc)
    assert proc.terminate() == 0, proc.log_tail()
    assert len(dead) == 1
    letter = orjson.loads(dead[0]["payload"])
    assert letter["reason"] == "malformed_json"
    assert base64.b64decode(letter["original_base64"]) == garbage
    assert letter["source"]["offset"] == 10
