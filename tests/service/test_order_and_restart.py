"""Order of periods, re-delivery and restarts.

- a re-sent period is skipped and counted, the cloud untouched;
- a gap of several days is propagated over (the cloud's day jumps);
- a record whose offset the stream has already applied is skipped;
- a service restarted on the same checkpoint directory resumes right after
  the last applied record and ends bit-identical to an uninterrupted run;
- a crash between publishing and checkpointing re-publishes byte-identical
  outputs with the same event ids (DESIGN.md, "Data flow of one observation").
"""

from __future__ import annotations

import asyncio
from pathlib import Path

import numpy as np
import orjson
from prometheus_client import CollectorRegistry

from service.runtime.app import Service
from service.state import LocalCheckpointStore
from service.runtime.metrics import Metrics
from service.transports import MemoryTransport, Record


class RecordingTransport(MemoryTransport):
    """A MemoryTransport that remembers where it started and what it delivered."""

    def __init__(self, inputs) -> None:
        super().__init__(inputs)
        self.started_at: int | None = None
        self.delivered: list[int] = []

    async def start(self, on_assign=None, on_revoke=None) -> None:
        await super().start(on_assign)
        self.started_at = self.position

    async def receive(self, timeout: float = 1.0):
        record = await super().receive(timeout)
        if record is not None:
            self.delivered.append(record.offset)
        return record


def _service(kit, checkpoint_dir: Path, records, pipeline: bool = True, **config):
    transport = RecordingTransport(records)
    registry = CollectorRegistry()
    service = Service(
        kit.make_config(checkpoint_dir, **config),
        transport,
        metrics=Metrics(registry=registry),
        today=lambda: kit.TODAY,
        pipeline=pipeline,
    )
    return service, transport, registry


def _feed(kit, days=range(2, 10)):
    return [kit.obs(d, cases=3 + (d * 7) % 11) for d in days]


def test_duplicate_period_is_skipped_and_counted(harness, kit):
    h = harness([kit.obs(4, 5), kit.obs(5, 8), kit.obs(5, 8), kit.obs(6, 9)])
    assert h.run() == {"applied": 3, "skipped": 1, "dead_letter": 0}
    dup = h.trace[2]
    assert (dup["outcome"].status, dup["outcome"].reason) == ("skipped", "duplicate_period")
    assert dup["committed"] == 3
    assert dup["cloud"] == h.trace[1]["cloud"] and dup["files"] == h.trace[1]["files"]
    assert h.sample("casecloud_messages_skipped_total", {"stream": kit.STREAM, "reason": "duplicate_period"}) == 1.0
    assert h.sample("casecloud_messages_processed_total", {"stream": kit.STREAM}) == 3.0
    assert h.transport.published["dead_letters"] == []
    periods = [orjson.loads(r.value)["period"] for r in h.transport.published["estimates"]]
    assert periods == [kit.period(4), kit.period(5), kit.period(6)]


def test_gap_of_several_days_propagates(harness, kit):
    h = harness([kit.obs(4), kit.obs(5), kit.obs(12), kit.obs(13)])
    assert h.run() == {"applied": 4, "skipped": 0, "dead_letter": 0}
    estimates = [orjson.loads(r.value) for r in h.transport.published["estimates"]]
    assert [e["day"] for e in estimates] == [4, 5, 12, 13]
    assert [e["step"] for e in estimates] == [1, 2, 3, 4]  # one step per message, not per day
    after_gap = h.trace[2]["cloud"]
    assert after_gap["header"]["time"] == 12
    assert (after_gap["last_day"], after_gap["last_period"]) == (12, kit.period(12))
    runtime = h.service.registry.runtimes[kit.STREAM]
    assert (runtime.filter.time, runtime.last_day) == (13, 13)
    # the particles really moved over the missing days: the susceptibles kept falling
    s_mean = [e["quantities"]["S[all]"]["mean"] for e in estimates]
    assert s_mean[2] < s_mean[1]


def test_changed_count_of_a_report_dated_series_is_a_dead_letter(harness, kit):
    # A different total for a period already assimilated (the sir example's "cases" is dated by
    # report, so final on arrival) is neither skipped silently nor applied twice.
    h = harness([kit.obs(4, 5), kit.obs(5, 8), kit.obs(5, 30), kit.obs(6, 9)])
    assert h.run() == {"applied": 3, "skipped": 0, "dead_letter": 1}
    assert (h.trace[2]["outcome"].status, h.trace[2]["outcome"].reason) == ("dead_letter", "not_revisable")
    assert h.trace[2]["cloud"] == h.trace[1]["cloud"]


def test_weekly_period_lands_on_its_sunday(harness, kit):
    # 2026-W03 ends on Sunday 2026-01-18, model day 17; a weekly period for the daily series is refused
    h = harness([kit.obs(4), kit.obs("2026-W03")])
    assert h.run() == {"applied": 1, "skipped": 0, "dead_letter": 1}
    assert h.trace[1]["outcome"].reason == "cadence"


def test_offset_already_applied_is_skipped(tmp_path, kit):
    good = _feed(kit, range(2, 5))
    # offset 1 again (a re-delivery): by period alone it would be "late"
    redelivered = Record(value=good[1], topic="input", partition=0, offset=1)
    records = [Record(value=v, topic="input", partition=0, offset=i) for i, v in enumerate(good)] + [redelivered]
    # unpipelined, so the third record's checkpoint is on disk when its outcome is reported
    service, transport, registry = _service(kit, tmp_path / "ck", records, pipeline=False)
    before_files = None
    seen = []

    def on_outcome(outcome):
        nonlocal before_files
        seen.append((outcome.status, outcome.reason))
        if len(seen) == 3:
            before_files = kit.checkpoint_files(tmp_path / "ck")

    service.on_outcome = on_outcome
    assert asyncio.run(service.run(until_exhausted=True)) == {"applied": 3, "skipped": 1, "dead_letter": 0}
    assert seen[-1] == ("skipped", "already_applied")
    assert registry.get_sample_value("casecloud_messages_skipped_total", {"stream": kit.STREAM, "reason": "already_applied"}) == 1.0
    assert transport.published["dead_letters"] == [] and len(transport.published["estimates"]) == 3
    assert kit.checkpoint_files(tmp_path / "ck") == before_files


def test_redelivery_after_restart_from_an_older_offset_is_skipped(tmp_path, kit):
    """The broker's committed offset lags the checkpoint (commit lost in a crash):
    the records it re-delivers are skipped, not applied twice."""
    records = _feed(kit, range(2, 8))
    first, _, _ = _service(kit, tmp_path / "ck", records[:4])
    asyncio.run(first.run(until_exhausted=True))
    # a transport that ignores the assignment hook and starts from offset 2
    again = RecordingTransport(records)

    async def start(on_assign=None, on_revoke=None):
        again.position = again.started_at = 2

    again.start = start
    service = Service(kit.make_config(tmp_path / "ck"), again, metrics=Metrics(registry=CollectorRegistry()), today=lambda: kit.TODAY)
    counts = asyncio.run(service.run(until_exhausted=True))
    assert counts == {"applied": 2, "skipped": 2, "dead_letter": 0}
    assert [orjson.loads(r.value)["source"]["offset"] for r in again.published["estimates"]] == [4, 5]


def _newest(store: LocalCheckpointStore, stream: str):
    loaded = store.load_latest(stream, expected_fingerprint=None)
    assert loaded is not None and not loaded.skipped
    return loaded


def test_restart_resumes_after_last_applied_and_is_bit_identical(tmp_path, kit):
    records = _feed(kit)
    n, total = 4, len(records)

    # uninterrupted
    straight, straight_t, _ = _service(kit, tmp_path / "straight", records, alerts=True)
    assert asyncio.run(straight.run(until_exhausted=True))["applied"] == total

    # interrupted after n records, then a brand-new service on the same directory
    first, first_t, _ = _service(kit, tmp_path / "split", records[:n], alerts=True)
    assert asyncio.run(first.run(until_exhausted=True))["applied"] == n
    second, second_t, _ = _service(kit, tmp_path / "split", records, alerts=True)
    assert asyncio.run(second.run(until_exhausted=True)) == {"applied": total - n, "skipped": 0, "dead_letter": 0}

    # the assignment hook resumed at offset n: the first record processed is the next one
    assert second_t.started_at == n
    assert second_t.delivered == list(range(n, total))

    # the clouds are bit-identical
    a = _newest(LocalCheckpointStore(tmp_path / "straight"), kit.STREAM)
    b = _newest(LocalCheckpointStore(tmp_path / "split"), kit.STREAM)
    assert a.checkpoint.step == b.checkpoint.step == total
    kit.assert_same_arrays(b.checkpoint.arrays, a.checkpoint.arrays)
    assert b.checkpoint.header == a.checkpoint.header  # RNG state, positions, alert state included
    assert b.path.read_bytes() == a.path.read_bytes()

    # and so is everything published after the restart
    split_out = first_t.published["estimates"] + second_t.published["estimates"]
    assert [r.value for r in split_out] == [r.value for r in straight_t.published["estimates"]]
    assert [r.headers for r in split_out] == [r.headers for r in straight_t.published["estimates"]]
    split_alerts = first_t.published["alerts"] + second_t.published["alerts"]
    assert second_t.published["alerts"], "the comparison should cover alerts published after the restart"
    assert [r.value for r in split_alerts] == [r.value for r in straight_t.published["alerts"]]


def test_crash_between_publish_and_checkpoint_republishes_identical_outputs(tmp_path, kit):
    records = _feed(kit)
    k = 4  # the record whose checkpoint is "lost" (it also publishes an alert update)
    ck = tmp_path / "ck"
    first, first_t, _ = _service(kit, ck, records[: k + 1], alerts=True)
    asyncio.run(first.run(until_exhausted=True))
    estimate_k = first_t.published["estimates"][k]
    assert orjson.loads(estimate_k.value)["source"]["offset"] == k
    alerts_k = [r for r in first_t.published["alerts"] if orjson.loads(r.value)["step"] == k + 1]
    assert len(alerts_k) == 1

    # the crash: outputs of record k were published, its checkpoint never landed
    store = LocalCheckpointStore(ck)
    newest = store.list(kit.STREAM)[0]
    assert newest.step == k + 1
    newest.path.unlink()
    assert _newest(store, kit.STREAM).checkpoint.step == k

    again, again_t, _ = _service(kit, ck, records[: k + 1], alerts=True)
    assert asyncio.run(again.run(until_exhausted=True)) == {"applied": 1, "skipped": 0, "dead_letter": 0}
    assert again_t.delivered == [k]
    (republished,) = again_t.published["estimates"]
    assert republished.value == estimate_k.value
    assert republished.headers == estimate_k.headers
    assert dict(republished.headers)["ce_id"] == orjson.loads(estimate_k.value)["id"].encode()
    assert [(r.value, r.headers) for r in again_t.published["alerts"]] == [(r.value, r.headers) for r in alerts_k]
    # the exceedance probability (a forecast drawn from the stream's RNG) is part of the bytes compared
    assert orjson.loads(republished.value)["exceedance"].keys() == {"cases_high"}
    # and the checkpoint written this time is the one the first run wrote
    assert _newest(store, kit.STREAM).checkpoint.step == k + 1


def test_restart_checkpoint_arrays_match_in_memory_cloud(tmp_path, kit):
    """What is saved is exactly what was in memory (no lossy round trip)."""
    service, _, _ = _service(kit, tmp_path / "ck", _feed(kit, range(2, 5)))
    asyncio.run(service.run(until_exhausted=True))
    header, arrays = service.registry.runtimes[kit.STREAM].filter.state()
    saved = _newest(LocalCheckpointStore(tmp_path / "ck"), kit.STREAM).checkpoint
    kit.assert_same_arrays(saved.arrays, arrays)
    assert saved.header["filter"] == orjson.loads(orjson.dumps(header))
    assert np.isfinite(arrays["log_weights"]).all()
