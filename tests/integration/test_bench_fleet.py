"""The plumbing of ``casecloud bench --sections fleet`` on a tiny fleet (4 streams of
50 particles, two replicas over two partitions, two rounds) against the session's
broker. Its figures are not judged here: speed and memory are the benchmark's
business (DESIGN.md, Conventions), this checks that the section runs the fleet
through the service and reports what it measured."""

from __future__ import annotations

import pytest

from service.bench.command import SECTIONS

pytestmark = pytest.mark.integration


def test_the_fleet_section_runs_a_tiny_fleet_through_two_replicas(kafka_broker):
    result = SECTIONS["fleet"](
        streams=4, stream_particles=50, trajectories=20, rounds=2, replicas=2, partitions=2,
        keep_checkpoints=3, bootstrap=kafka_broker.bootstrap_servers,
    )
    f = result.figures
    assert f["workload"]["streams"] == 4 and f["workload"]["replicas"] == 2
    assert len(f["round_seconds"]) == 2 and all(s > 0 for s in f["round_seconds"])
    assert f["daily_round_seconds"] == f["round_seconds"][-1]
    assert sorted(f["replica_partitions"]) == [1, 1]  # both processes took part
    assert len(f["replica_peak_rss_bytes"]) == 2 and all(b > 0 for b in f["replica_peak_rss_bytes"])
    assert f["serve_one_stream_rss_bytes"] > 0
    # every stream was checkpointed once per round, within keep_checkpoints
    assert f["streams_with_checkpoints"] == 4
    assert f["checkpoint_files_per_stream_max"] == 2
    assert 0 < f["checkpoint_bytes_total"] <= f["checkpoint_bytes_bound"]
    assert {t.name for t in result.targets} == {"daily_round_seconds", "peak_rss_bytes", "checkpoint_files"}
