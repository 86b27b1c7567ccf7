"""Lost state over a real Kafka broker: a partition moves to a replica whose disk never held
the stream's checkpoints. Bug caught: that replica restarting the stream from the prior (the
behaviour before the lost-state guard) and publishing estimates from it.

The replica holds the stream instead (dead letters ``needs_recovery``, no estimate), an
operator rebuilds the stream from the input topic read from its beginning, and the replica
goes on from there: the final cloud equals an uninterrupted run's and no record is lost.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import orjson
import pytest

from kafka_helpers import ServiceProcess, newest_step, produce, read_all, season_messages, wait_for, write_config

pytestmark = pytest.mark.integration


def _cloud(checkpoint_dir, stream):
    from service.state import LocalCheckpointStore

    loaded = LocalCheckpointStore(checkpoint_dir).load_latest(stream, None)
    assert loaded is not None
    return loaded.checkpoint


def test_a_partition_moved_to_a_replica_without_checkpoints_is_held_then_rebuilt(kafka_broker, tmp_path):
    bootstrap = kafka_broker.bootstrap_servers
    stream, topic = "marsh-end-ili", "lost.observations"
    kafka_broker.create_topic(topic, 1)
    season = season_messages(stream, 40, seed=8)
    produce(bootstrap, topic, [(stream.encode(), m) for m in season[:30]])

    # replica A serves the first 30 days, then its node goes away with its disk
    disk_a, disk_b = tmp_path / "disk-a", tmp_path / "disk-b"
    cfg_a = write_config(tmp_path / "a.toml", bootstrap, topic, "lost", disk_a, [stream], out_prefix="lost.out")
    a = ServiceProcess(cfg_a, tmp_path / "a.log").start()
    wait_for(lambda: newest_step(disk_a, stream) == 30, 180, "replica A to apply 30 days", a)
    assert a.terminate() == 0, a.log_tail()

    # replica B takes the partition over (same group) with an empty disk; 5 more days arrive
    produce(bootstrap, topic, [(stream.encode(), m) for m in season[30:35]])
    cfg_b = write_config(tmp_path / "b.toml", bootstrap, topic, "lost", disk_b, [stream], out_prefix="lost.out")
    b = ServiceProcess(cfg_b, tmp_path / "b.log").start()

    def held_letters():
        return [orjson.loads(r.value) for r in read_all(bootstrap, "lost.out.dead-letters", timeout=5)]

    wait_for(lambda: len(held_letters()) == 5, 120, "replica B to hold the 5 new records", b)
    assert b.terminate() == 0, b.log_tail()
    letters = held_letters()
    assert {x["reason"] for x in letters} == {"needs_recovery"}
    assert sorted(x["source"]["offset"] for x in letters) == list(range(30, 35))
    assert len(read_all(bootstrap, "lost.out.estimates")) == 30  # nothing published from a prior
    assert newest_step(disk_b, stream) == 0

    # the operator rebuilds the stream from the input topic onto B's disk
    dry = subprocess.run(
        [sys.executable, "-m", "service.cli", "stream", "rebuild", "--config", str(cfg_b), "--stream", stream, "--dry-run"],
        capture_output=True, text=True, timeout=120,
    )
    assert dry.returncode == 0, dry.stderr
    assert "would replay 35 record(s) from the input topic lost.observations" in dry.stderr
    done = subprocess.run(
        [sys.executable, "-m", "service.cli", "stream", "rebuild", "--config", str(cfg_b), "--stream", stream],
        capture_output=True, text=True, timeout=300,
    )
    assert done.returncode == 0, done.stderr
    assert "applied 35" in done.stderr and newest_step(disk_b, stream) == 35

    # B goes on with new days; the held records are not applied twice
    produce(bootstrap, topic, [(stream.encode(), m) for m in season[35:]])
    b = ServiceProcess(cfg_b, tmp_path / "b2.log").start()
    wait_for(lambda: newest_step(disk_b, stream) == 40, 180, "replica B to reach day 40", b)
    assert b.terminate() == 0, b.log_tail()

    # an uninterrupted run over the same 40 days (own group, own disk) for comparison
    disk_ref = tmp_path / "disk-ref"
    cfg_ref = write_config(tmp_path / "ref.toml", bootstrap, topic, "lost-ref", disk_ref, [stream], out_prefix="lost.ref")
    ref = ServiceProcess(cfg_ref, tmp_path / "ref.log").start()
    wait_for(lambda: newest_step(disk_ref, stream) == 40, 180, "reference run", ref)
    assert ref.terminate() == 0, ref.log_tail()

    got, want = _cloud(disk_b, stream), _cloud(disk_ref, stream)
    for name in want.arrays:
        np.testing.assert_array_equal(got.arrays[name], want.arrays[name], err_msg=name)
    assert got.header["filter"]["rng"] == want.header["filter"]["rng"]
    assert got.header["positions"] == want.header["positions"] == {f"{topic}|0": 39}
    assert [op["action"] for op in got.header["operations"]] == ["rebuild"]
