"""A stream whose state was lost is held, never restarted from the prior behind anyone's back.

Over the file transport (the input file can be read again): a stream served for
30 days loses its checkpoint directory and 5 more days arrive. Bug caught: the
service restarting it from the prior, bridging the "gap" by simulation and
publishing estimates as if nothing happened. Instead its records become dead
letters ``needs_recovery`` (bytes kept), ``/readyz`` and a metric say so; an
operator rebuilds it from the input (the held records included) and the final
cloud equals an uninterrupted run's, bit for bit; or resets it on purpose.
"""

from __future__ import annotations

import asyncio
import datetime as dt
import shutil
from pathlib import Path

import numpy as np
import orjson
import pytest
from prometheus_client import CollectorRegistry

from schemas import DeadLetter, DeploymentConfig
from service.runtime.app import Service
from service.runtime.metrics import Metrics
from service.runtime.recovery import rebuild_stream, reset_stream
from service.state import LocalCheckpointStore
from service.transports import FileTransport

STREAM = "fenwick.ed"
START = dt.date(2026, 1, 1)
TODAY = dt.date(2026, 4, 1)


def line(day: int) -> bytes:
    period = (START + dt.timedelta(days=day)).isoformat()
    return orjson.dumps({"stream": STREAM, "period": period, "counts": {"cases": 2 + (day * 5) % 9}}) + b"\n"


class Site:
    """One deployment's files: input feed, outputs, checkpoints."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.feed = root / "feed.ndjson"
        self.out = root / "out"
        self.checkpoints = root / "checkpoints"
        self.feed.parent.mkdir(parents=True, exist_ok=True)
        self.feed.write_bytes(b"")
        self.config = DeploymentConfig.model_validate(
            {
                "transport": "file",
                "file": {"input": str(self.feed), "output_dir": str(self.out)},
                "service": {"seed": 9, "checkpoint_dir": str(self.checkpoints), "keep_checkpoints": 3},
                "metrics": {"enabled": False},
                "streams": [{"id": STREAM, "model": "sir", "start": START.isoformat(), "particles": 200, "forecast_trajectories": 20}],
            }
        )
        self.metrics = Metrics(registry=CollectorRegistry())
        self.service: Service | None = None

    def append(self, days: range) -> None:
        with open(self.feed, "ab") as f:
            f.writelines(line(d) for d in days)

    def serve(self) -> dict[str, int]:
        self.metrics = Metrics(registry=CollectorRegistry())
        self.service = Service(
            self.config, FileTransport(self.feed, self.out), metrics=self.metrics, today=lambda: TODAY
        )
        return asyncio.run(self.service.run(until_exhausted=True))

    def outputs(self, kind: str) -> list[dict]:
        path = self.out / f"{kind}.ndjson"
        return [orjson.loads(x) for x in path.read_bytes().splitlines()] if path.exists() else []

    def cloud(self):
        loaded = LocalCheckpointStore(self.checkpoints).load_latest(STREAM, None)
        assert loaded is not None
        return loaded.checkpoint


def same_cloud(a, b) -> None:
    assert sorted(a.arrays) == sorted(b.arrays)
    for name in a.arrays:
        np.testing.assert_array_equal(a.arrays[name], b.arrays[name], err_msg=name)
    for key in ("time", "step", "rng", "log_evidence"):
        assert a.header["filter"][key] == b.header["filter"][key], key
    assert a.header["last_period"] == b.header["last_period"]


def test_lost_state_is_held_then_rebuilt_to_the_uninterrupted_cloud(tmp_path):
    reference = Site(tmp_path / "reference")
    reference.append(range(1, 38))
    assert reference.serve() == {"applied": 37, "skipped": 0, "dead_letter": 0}

    site = Site(tmp_path / "site")
    site.append(range(1, 31))
    assert site.serve()["applied"] == 30
    estimates_before = len(site.outputs("estimates"))
    shutil.rmtree(site.checkpoints)  # the volume is lost
    site.append(range(31, 36))
    counts = site.serve()

    # held: nothing published from the prior, every new record kept as a dead letter
    assert counts == {"applied": 0, "skipped": 0, "dead_letter": 5}
    assert len(site.outputs("estimates")) == estimates_before
    letters = [DeadLetter.model_validate(x) for x in site.outputs("dead_letters")]
    assert [x.reason for x in letters] == ["needs_recovery"] * 5
    assert "offset 0 was consumed before" in letters[0].message and "casecloud stream rebuild" in letters[0].message
    assert orjson.loads(__import__("base64").b64decode(letters[-1].original_base64)) == orjson.loads(line(35))
    assert site.metrics.registry.get_sample_value("casecloud_stream_needs_recovery", {"stream": STREAM}) == 1.0
    assert site.service.readiness() == (False, "not ready: starting or stopping")  # stopped now
    site.service.ready = True
    assert site.service.readiness() == (False, f"not ready: streams held for lost state: {STREAM}")
    assert not site.checkpoints.exists() or not list(site.checkpoints.rglob("*.ckpt"))

    # a dry run changes nothing
    plan = rebuild_stream(site.config, STREAM, dry_run=True, show_progress=False)
    assert (plan.records, plan.written) == (35, None)
    assert not site.checkpoints.exists() or not list(site.checkpoints.rglob("*.ckpt"))

    report = rebuild_stream(site.config, STREAM, show_progress=False)
    assert (report.records, report.applied, report.step, report.positions) == (35, 35, 35, {"feed.ndjson|0": 34})
    assert site.cloud().header["operations"][0]["action"] == "rebuild"

    # the service goes on from the rebuilt checkpoint: the held records are not applied twice
    site.append(range(36, 38))
    assert site.serve() == {"applied": 2, "skipped": 0, "dead_letter": 0}
    same_cloud(site.cloud(), reference.cloud())


def test_a_held_stream_resumes_without_restart_once_rebuilt(tmp_path):
    # Bug caught: a running service that keeps a held stream held (or keeps its stale
    # in-memory prior) after the operator wrote a checkpoint.
    site = Site(tmp_path / "site")
    site.append(range(1, 11))
    site.serve()
    shutil.rmtree(site.checkpoints)
    site.append(range(11, 13))
    site.serve()
    assert [x["reason"] for x in site.outputs("dead_letters")] == ["needs_recovery"] * 2
    registry = site.service.registry  # the same service object, as if still running
    assert registry.held() == [STREAM]
    rebuild_stream(site.config, STREAM, show_progress=False)
    assert registry.reload(STREAM) is not None and registry.held() == []


def refused_first(kind: str) -> bytes:
    """A first record of the stream that passes the observation schema but is refused for the stream."""
    period = (START + dt.timedelta(days=1)).isoformat()
    value = {
        "unknown_series": {"stream": STREAM, "period": period, "counts": {"visits": 3}},  # the stream observes "cases"
        "future": {"stream": STREAM, "period": (TODAY + dt.timedelta(days=400)).isoformat(), "counts": {"cases": 3}},
        "cadence": {"stream": STREAM, "period": "2026-W02", "counts": {"cases": 3}},  # a daily series
    }[kind]
    return orjson.dumps(value) + b"\n"


@pytest.mark.parametrize("kind", ["unknown_series", "future", "cadence"])
def test_a_new_stream_whose_first_record_is_refused_is_not_held(tmp_path, kind):
    # Bug caught: the refused first record of a new stream (a feed being wired in, its first
    # message wrong) counted as proof that the stream had been advanced, so the stream was
    # held as "lost state" at its next record, in the same run or after a restart, until an
    # operator reset it. The stream never had a cloud: nothing is held, and a restart between
    # the refused record and the next ones ends on the very cloud of an uninterrupted run.
    through = Site(tmp_path / "through")
    through.feed.write_bytes(refused_first(kind))
    through.append(range(2, 8))
    assert through.serve() == {"applied": 6, "skipped": 0, "dead_letter": 1}
    assert [x["reason"] for x in through.outputs("dead_letters")] == [kind]

    restarted = Site(tmp_path / "restarted")
    restarted.feed.write_bytes(refused_first(kind))
    assert restarted.serve() == {"applied": 0, "skipped": 0, "dead_letter": 1}
    kept = restarted.cloud()  # the prior, kept so the restart knows the stream is new
    assert kept.header["filter"]["step"] == 0 and kept.header["positions"] == {}
    restarted.append(range(2, 8))
    assert restarted.serve() == {"applied": 6, "skipped": 0, "dead_letter": 0}
    assert restarted.metrics.registry.get_sample_value("casecloud_stream_needs_recovery", {"stream": STREAM}) in (None, 0.0)
    same_cloud(restarted.cloud(), through.cloud())


def test_reset_archives_and_starts_from_the_prior_with_the_next_record(tmp_path):
    site = Site(tmp_path / "site")
    site.append(range(1, 11))
    site.serve()
    old_steps = sorted(p.name for p in site.checkpoints.rglob("*.ckpt"))
    plan = reset_stream(site.config, STREAM, dry_run=True)
    assert plan["archived_steps"] == [10, 9, 8] and sorted(p.name for p in site.checkpoints.rglob("*.ckpt")) == old_steps

    plan = reset_stream(site.config, STREAM)
    archived = sorted(p.name for p in Path(plan["archive"]).glob("*.ckpt"))
    assert archived == old_steps  # moved, never deleted
    fresh = site.cloud()
    assert fresh.header["filter"]["step"] == 0 and fresh.header["positions"] == {"feed.ndjson|0": 9}
    assert fresh.header["operations"][0]["action"] == "reset"

    site.append(range(11, 13))
    assert site.serve() == {"applied": 2, "skipped": 0, "dead_letter": 0}
    steps = [e["step"] for e in site.outputs("estimates")]
    assert steps[-2:] == [1, 2]  # a new cloud, started on purpose


def test_rebuild_refuses_a_stream_that_has_checkpoints(tmp_path):
    site = Site(tmp_path / "site")
    site.append(range(1, 4))
    site.serve()
    try:
        rebuild_stream(site.config, STREAM, show_progress=False)
    except Exception as exc:  # ServiceError
        assert "already has 3 checkpoint(s)" in str(exc) and "casecloud stream reset" in str(exc)
    else:
        raise AssertionError("rebuild over existing checkpoints must be refused")


def test_config_that_differs_from_the_checkpoint_is_reported(tmp_path, caplog):
    # Bug caught: a changed particle count silently ignored for an existing stream.
    site = Site(tmp_path / "site")
    site.append(range(1, 4))
    site.serve()
    changed = site.config.model_dump()
    changed["streams"][0]["particles"] = 500
    changed["streams"][0]["scheme"] = "stratified"
    site.config = DeploymentConfig.model_validate(changed)
    site.append(range(4, 5))
    with caplog.at_level("WARNING", logger="casecloud.streams"):
        assert site.serve()["applied"] == 1
    text = caplog.text
    assert "config sets particles = 500 but its checkpoint holds 200" in text
    assert "config sets scheme = 'stratified' but its checkpoint holds 'systematic'" in text
    get = site.metrics.registry.get_sample_value
    assert get("casecloud_stream_config_ignored", {"stream": STREAM, "key": "particles"}) == 1.0
    assert get("casecloud_stream_config_ignored", {"stream": STREAM, "key": "scheme"}) == 1.0
    assert get("casecloud_stream_config_ignored", {"stream": STREAM, "key": "resample_threshold"}) is None
    assert site.cloud().arrays["log_weights"].shape == (200,)  # the checkpoint's cloud was kept


def test_resize_draws_the_new_cloud_from_the_weighted_old_one(tmp_path):
    # Bugs caught: a resize that keeps the old count in the filter config (the next load fails
    # or the config report lies), or that ignores the weights (a uniform subset).
    from service.runtime.recovery import resize_stream

    site = Site(tmp_path / "site")
    site.append(range(1, 11))
    site.serve()
    before = site.cloud()
    plan = resize_stream(site.config, STREAM, 500, dry_run=True)
    assert plan["particles"] == [200, 500] and site.cloud().header["filter"]["step"] == before.header["filter"]["step"]
    resize_stream(site.config, STREAM, 500)
    after = site.cloud()
    assert after.arrays["states"].shape[0] == 500 and after.header["filter"]["config"]["n_particles"] == 500
    assert after.header["operations"][-1]["action"] == "resize"
    # every new particle is a copy of an old one, and heavier old particles are copied more often
    old = {row.tobytes(): w for row, w in zip(before.arrays["states"], np.exp(before.arrays["log_weights"]))}
    assert all(row.tobytes() in old for row in after.arrays["states"])
    assert np.all(after.arrays["log_weights"] == 0.0)
    changed = site.config.model_dump()
    changed["streams"][0]["particles"] = 500
    site.config = DeploymentConfig.model_validate(changed)
    site.append(range(11, 13))
    assert site.serve()["applied"] == 2 and site.cloud().arrays["states"].shape[0] == 500


def test_migrate_moves_the_cloud_where_the_spec_maps_and_refuses_where_it_does_not(tmp_path):
    # Bug caught: a migration that silently re-initialises what it cannot map, or maps
    # compartments by position instead of by name.
    from schemas import example_model_path
    from service.errors import ServiceError
    from service.runtime.recovery import migrate_stream

    site = Site(tmp_path / "site")
    site.append(range(1, 11))
    site.serve()
    before = site.cloud()
    # a revised sir: the same compartments, one parameter renamed (gamma -> recovery)
    text = example_model_path("sir").read_text(encoding="utf-8")
    assert "gamma" in text
    revised = tmp_path / "sir_revised.toml"
    revised.write_text(text.replace('name = "sir"', 'name = "sir_revised"').replace("gamma", "recovery"), encoding="utf-8")
    changed = site.config.model_dump()
    changed["streams"][0]["model"] = str(revised)
    site.config = DeploymentConfig.model_validate(changed)
    plan = migrate_stream(site.config, STREAM, dry_run=True)
    assert "recovery" in plan["parameters"]["new (drawn from the prior or fixed)"] and plan["parameters"]["dropped"] == ["gamma"]
    assert plan["refused"] == []
    migrate_stream(site.config, STREAM)
    after = site.cloud()
    np.testing.assert_array_equal(after.arrays["states"], before.arrays["states"])
    assert after.header["model"] == "sir_revised" and after.header["operations"][-1]["action"] == "migrate"
    site.append(range(11, 13))
    assert site.serve()["applied"] == 2

    # another compartment set does not map: refused, nothing written
    seir = DeploymentConfig.model_validate({**changed, "streams": [{**changed["streams"][0], "model": "seir"}]})
    steps = sorted(p.name for p in site.checkpoints.rglob("*.ckpt"))
    try:
        migrate_stream(seir, STREAM)
    except ServiceError as exc:
        assert "compartments differ" in str(exc)
    else:
        raise AssertionError("a migration across compartment sets must be refused")
    assert sorted(p.name for p in site.checkpoints.rglob("*.ckpt")) == steps
