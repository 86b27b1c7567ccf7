"""Broker outages and a producer that cannot publish, with a real Kafka broker.

What the service must do (service/runtime/app.py): while the broker is away it
stays up, waits and retries (receive, publish, commit), answers /readyz with 503
and the reason, exports ``casecloud_broker_reachable 0``, and commits nothing;
when the broker is back it goes on where it was. A publish the broker refuses
for good (a record larger than the topic allows) ends the service without
committing the record. Bugs caught: ``run`` ending on the first aiokafka error
during an outage (a crash loop under Kubernetes); an idempotent producer whose
batches expired during the outage being refused for good afterwards
(OutOfOrderSequenceNumber); aiokafka logging tens of thousands of lines per
outage; a commit of a record whose outputs were not acknowledged.

The comparison with an uninterrupted run is the SIGKILL test's
(test_service_kafka.py): the newest checkpoint is bit-identical and the
published estimate ids are the same set with identical bytes.
"""

from __future__ import annotations

import asyncio
import socket
import time
import urllib.error
import urllib.request
from collections import defaultdict

import orjson
import pytest
from aiokafka import AIOKafkaConsumer, TopicPartition
from aiokafka.admin import AIOKafkaAdminClient
from aiokafka.admin.config_resource import ConfigResource, ConfigResourceType

from kafka_helpers import ServiceProcess, newest_step, produce, read_all, season_messages, wait_for, write_config

pytestmark = pytest.mark.integration

# A publish counts as failed after 2 s (the default is 40 s), so a 10 s outage
# also takes the path where the producer's batches expire.
FAST = "publish_timeout_ms = 2000"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _get(port: int, path: str) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=5) as r:
            return r.status, r.read().decode()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read().decode()
    except OSError as exc:  # not listening yet
        return 0, str(exc)


def _metric(port: int, name: str, **labels: str) -> float | None:
    """A sample's value from /metrics (labels in any order), None if absent."""
    status, text = _get(port, "/metrics")
    for line in text.splitlines() if status == 200 else ():
        head, _, value = line.rpartition(" ")
        if head == name or (head.startswith(name + "{") and all(f'{k}="{v}"' in head for k, v in labels.items())):
            return float(value)
    return None


def _by_id(records) -> dict[str, set[bytes]]:
    out: dict[str, set[bytes]] = defaultdict(set)
    for r in records:
        out[orjson.loads(r.value)["id"]].add(r.value)
    return out


def _newest_file(checkpoint_dir, stream) -> bytes:
    from service.state import LocalCheckpointStore

    return LocalCheckpointStore(checkpoint_dir).list(stream)[0].path.read_bytes()


def _committed(bootstrap: str, group: str, topic: str) -> int | None:
    async def go():
        consumer = AIOKafkaConsumer(bootstrap_servers=bootstrap, group_id=group, enable_auto_commit=False)
        await consumer.start()
        try:
            return await consumer.committed(TopicPartition(topic, 0))
        finally:
            await consumer.stop()

    return asyncio.run(go())


def _admin(bootstrap: str, action):
    async def go():
        admin = AIOKafkaAdminClient(bootstrap_servers=bootstrap)
        await admin.start()
        try:
            return await action(admin)
        finally:
            await admin.close()

    return asyncio.run(go())


def _reference(broker, tmp_path, topic, stream, days) -> tuple:
    """An uninterrupted run over the same input: its checkpoint directory and estimates topic."""
    ref_dir = tmp_path / "ref-ckpt"
    cfg = write_config(tmp_path / "ref.toml", broker.bootstrap_servers, topic, "ref", ref_dir, [stream], out_prefix=f"{topic}.ref")
    ref = ServiceProcess(cfg, tmp_path / "ref.log").start()
    wait_for(lambda: newest_step(ref_dir, stream) == days, 180, "reference run to finish", ref)
    assert ref.terminate() == 0, ref.log_tail()
    return ref_dir, f"{topic}.ref.estimates"


def test_a_broker_outage_is_waited_out_and_ends_as_an_uninterrupted_run(own_broker, tmp_path):
    """Stop the test's own broker mid-run for 10 s (longer than the 6 s session
    timeout and the 2 s publish timeout), start it again on the same port and data."""
    bootstrap = own_broker.bootstrap_servers
    stream, days, topic = "saltmarsh-ili", 50, "outage.observations"
    own_broker.create_topic(topic, 1)
    produce(bootstrap, topic, [(stream.encode(), m) for m in season_messages(stream, days, seed=21)])
    ref_dir, ref_topic = _reference(own_broker, tmp_path, topic, stream, days)

    run_dir, port = tmp_path / "run-ckpt", _free_port()
    cfg = write_config(tmp_path / "run.toml", bootstrap, topic, "run", run_dir, [stream], metrics_port=port,
                       out_prefix=f"{topic}.run", kafka_extra=FAST)
    run = ServiceProcess(cfg, tmp_path / "run.log").start()
    wait_for(lambda: _get(port, "/readyz")[0] == 200, 60, "the service to be ready", run)
    wait_for(lambda: newest_step(run_dir, stream) >= 12, 120, "step 12", run, interval=0.01)

    own_broker.stop()
    down_at = time.monotonic()
    stopped_at = newest_step(run_dir, stream)
    status, body = wait_for(lambda: (lambda r: r if r[0] == 503 else None)(_get(port, "/readyz")), 30, "/readyz 503", run)
    noticed = time.monotonic() - down_at
    assert "broker has been unreachable" in body, body
    assert _metric(port, "casecloud_broker_reachable") == 0.0
    time.sleep(max(0.0, 10.0 - (time.monotonic() - down_at)))
    assert run.alive(), run.log_tail()
    assert _get(port, "/readyz")[0] == 503
    # at most the record whose checkpoint was being written when the broker went away
    assert newest_step(run_dir, stream) <= stopped_at + 1

    own_broker.start()
    up_at = time.monotonic()
    wait_for(lambda: _get(port, "/readyz")[0] == 200, 120, "/readyz 200 after the broker is back", run)
    ready_after = time.monotonic() - up_at
    wait_for(lambda: newest_step(run_dir, stream) == days, 180, "the run to finish after the outage", run)
    done_after = time.monotonic() - up_at
    wait_for(lambda: _metric(port, "casecloud_consumer_lag_records", topic=topic, partition="0") == 0.0, 60,
             "lag back to 0", run)
    assert _metric(port, "casecloud_broker_reachable") == 1.0
    assert run.terminate() == 0, run.log_tail()
    print(f"outage at step {stopped_at}: /readyz 503 after {noticed:.1f} s; after the restart, /readyz 200 in "
          f"{ready_after:.1f} s and day {days} in {done_after:.1f} s")

    assert _newest_file(run_dir, stream) == _newest_file(ref_dir, stream)
    ref_est = _by_id(read_all(bootstrap, ref_topic))
    run_est = _by_id(read_all(bootstrap, f"{topic}.run.estimates"))
    assert len(ref_est) == days
    assert set(run_est) == set(ref_est)
    for event_id, values in run_est.items():
        assert values == ref_est[event_id], f"estimate {event_id} was published with different content"
    log = run.log.read_text()
    assert "the broker is unreachable" in log and "the broker answers again" in log
    assert log.count("\n") < 300, "the log is flooded during the outage"


def test_a_deleted_output_topic_holds_the_commits_until_it_is_back(kafka_broker_module, tmp_path):
    """Topics are not created on demand here (as in most clusters): with the estimates
    topic deleted the service cannot publish. It stays up, /readyz says why, and
    neither the committed offset nor the checkpoints move on; a SIGTERM ends the wait.
    Once the topic is back, a new start publishes every estimate after the newest
    checkpoint and the run ends as an uninterrupted one."""
    broker = kafka_broker_module.KafkaBroker(tmp_path / "broker", server_properties={"auto.create.topics.enable": "false"})
    broker.start(timeout=120)
    try:
        bootstrap = broker.bootstrap_servers
        stream, days, topic = "fenwick-ed", 30, "nowrite.observations"
        for t in (topic, *(f"{topic}.{p}.{k}" for p in ("ref", "run") for k in ("estimates", "alerts", "dead-letters"))):
            broker.create_topic(t, 1)
        produce(bootstrap, topic, [(stream.encode(), m) for m in season_messages(stream, days, seed=22)])
        ref_dir, ref_topic = _reference(broker, tmp_path, topic, stream, days)

        run_dir, port, estimates = tmp_path / "run-ckpt", _free_port(), f"{topic}.run.estimates"
        cfg = write_config(tmp_path / "run.toml", bootstrap, topic, "run", run_dir, [stream], metrics_port=port,
                           out_prefix=f"{topic}.run", kafka_extra=FAST)
        run = ServiceProcess(cfg, tmp_path / "run.log").start()
        wait_for(lambda: newest_step(run_dir, stream) >= 8, 120, "step 8", run, interval=0.01)
        _admin(bootstrap, lambda a: a.delete_topics([estimates]))

        status, body = wait_for(lambda: (lambda r: r if r[0] == 503 else None)(_get(port, "/readyz")), 60, "/readyz 503", run)
        assert "publish failed" in body, body
        held_step, held_commit = newest_step(run_dir, stream), _committed(bootstrap, "run", topic)
        time.sleep(6)  # three more publish attempts
        assert run.alive(), run.log_tail()
        assert newest_step(run_dir, stream) == held_step < days
        assert _committed(bootstrap, "run", topic) == held_commit
        # A checkpoint is written only after its estimate was acknowledged, and the
        # committed offset (the count of records done) never passes the checkpoints.
        assert held_commit is not None and held_commit <= held_step

        # a stop (SIGTERM) while it waits ends the wait; nothing more is committed or written
        assert run.terminate() == 0, run.log_tail()
        assert "stopped while the broker was unreachable (publish was not finished)" in run.log.read_text()
        assert _committed(bootstrap, "run", topic) == held_commit and newest_step(run_dir, stream) == held_step

        broker.create_topic(estimates, 1)
        run = ServiceProcess(cfg, tmp_path / "run-2.log").start()
        wait_for(lambda: newest_step(run_dir, stream) == days, 180, "the run to finish once the topic is back", run)
        wait_for(lambda: _get(port, "/readyz")[0] == 200, 30, "/readyz 200", run)
        assert run.terminate() == 0, run.log_tail()

        assert _newest_file(run_dir, stream) == _newest_file(ref_dir, stream)
        ref_by_step = {orjson.loads(r.value)["step"]: r.value for r in read_all(bootstrap, ref_topic)}
        again = {orjson.loads(r.value)["step"]: r.value for r in read_all(bootstrap, estimates)}
        # nothing was lost: every estimate after the newest checkpoint of the hold is in the
        # new topic (those up to it were acknowledged by the deleted one), byte-identical
        assert set(range(held_step + 1, days + 1)) <= set(again)
        assert all(value == ref_by_step[step] for step, value in again.items())
    finally:
        broker.stop()


def test_a_publish_the_broker_refuses_for_good_stops_the_service_without_a_commit(kafka_broker, tmp_path):
    """Estimates larger than the topic allows (max.message.bytes lowered mid-run): the
    broker refuses them for good, so waiting cannot help. The service stops with the
    reason (exit 1) and commits nothing after the last estimate that was accepted; with
    the topic fixed, a restart goes on from there."""
    bootstrap = kafka_broker.bootstrap_servers
    stream, topic = "dunmore-ed", "refused.observations"
    estimates = f"{topic}.estimates"
    kafka_broker.create_topic(topic, 1)
    kafka_broker.create_topic(estimates, 1)
    season = season_messages(stream, 15, seed=23)
    produce(bootstrap, topic, [(stream.encode(), m) for m in season[:10]])
    ckpt = tmp_path / "ckpt"
    cfg = write_config(tmp_path / "refused.toml", bootstrap, topic, "refused", ckpt, [stream])
    run = ServiceProcess(cfg, tmp_path / "run-1.log").start()
    wait_for(lambda: newest_step(ckpt, stream) == 10 and _committed(bootstrap, "refused", topic) == 10,
             120, "10 days applied and committed", run)

    def shrink(limit: str):
        return lambda a: a.alter_configs([ConfigResource(ConfigResourceType.TOPIC, estimates, {"max.message.bytes": limit})])

    _admin(bootstrap, shrink("200"))
    produce(bootstrap, topic, [(stream.encode(), m) for m in season[10:]])
    run.proc.wait(120)
    assert run.terminate() == 1, run.log_tail()
    assert "casecloud: Kafka error while trying to publish results: MessageSizeTooLargeError" in run.log.read_text()
    assert _committed(bootstrap, "refused", topic) == 10
    assert newest_step(ckpt, stream) == 10
    assert len(read_all(bootstrap, estimates)) == 10

    _admin(bootstrap, shrink("1048588"))
    again = ServiceProcess(cfg, tmp_path / "run-2.log").start()
    wait_for(lambda: newest_step(ckpt, stream) == 15, 120, "the restart to apply the last 5 days", again)
    assert again.terminate() == 0, again.log_tail()
    periods = {orjson.loads(r.value)["period"] for r in read_all(bootstrap, estimates)}
    assert len(periods) == 15
