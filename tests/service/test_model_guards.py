"""A model error stops the stream loudly and publishes nothing.

A spec whose recovery rate is written ``gamma * log(t - 5)`` (NaN before day 5) used to load,
run and publish 11 estimates in which nobody recovered and R_eff read 8e11, with only a numpy
warning on stderr. Now the first update raises the model's guard: the record becomes a dead
letter ``model_error`` naming the flow, the expression, the group, the day and one particle's
parameters; later records of the stream are kept as dead letters too; no estimate, alert or
checkpoint is written for it; ``/readyz`` and ``casecloud_stream_model_error`` say so; other
streams go on.
"""

from __future__ import annotations

import asyncio
import base64
import datetime as dt

import orjson
from prometheus_client import CollectorRegistry

from schemas import DeadLetter, DeploymentConfig, example_model_path
from service.runtime.app import Service
from service.runtime.metrics import Metrics
from service.transports import MemoryTransport

START = dt.date(2026, 1, 1)


def obs(stream: str, day: int) -> bytes:
    return orjson.dumps({"stream": stream, "period": (START + dt.timedelta(days=day)).isoformat(), "counts": {"cases": 4}})


def test_a_nan_rate_stops_the_stream_and_publishes_nothing(tmp_path):
    bad_spec = tmp_path / "sir_typo.toml"
    text = example_model_path("sir").read_text(encoding="utf-8")
    bad_spec.write_text(text.replace('name = "sir"', 'name = "sir_typo"').replace('rate = "gamma"', 'rate = "gamma * log(t - 5)"'), encoding="utf-8")
    config = DeploymentConfig.model_validate(
        {
            "service": {"seed": 1, "checkpoint_dir": str(tmp_path / "ckpt")},
            "metrics": {"enabled": False},
            "streams": [
                {"id": "typo", "model": str(bad_spec), "start": START.isoformat(), "particles": 50, "forecast_trajectories": 10},
                {"id": "fine", "model": "sir", "start": START.isoformat(), "particles": 50, "forecast_trajectories": 10},
            ],
        }
    )
    records = [obs("typo", 1), obs("fine", 1), obs("typo", 2), obs("fine", 2)]
    transport = MemoryTransport(records)
    metrics = Metrics(registry=CollectorRegistry())
    service = Service(config, transport, metrics=metrics, today=lambda: dt.date(2026, 3, 1), pipeline=False)
    counts = asyncio.run(service.run(until_exhausted=True))  # no numpy warning escapes (warnings are errors here)
    assert counts == {"applied": 2, "skipped": 0, "dead_letter": 2}
    estimates = [orjson.loads(r.value) for r in transport.published["estimates"]]
    assert {e["stream"] for e in estimates} == {"fine"}
    letters = [DeadLetter.model_validate(orjson.loads(r.value)) for r in transport.published["dead_letters"]]
    assert [(x.stream, x.reason) for x in letters] == [("typo", "model_error"), ("typo", "model_error")]
    first = letters[0].message
    assert "flow 'recovery'" in first and "'gamma * log(t - 5)'" in first and "group 'all'" in first
    assert "is nan" in first and "on day 0" in first and "'gamma': 0.25" in first
    assert "until its spec is fixed" in letters[1].message
    assert base64.b64decode(letters[1].original_base64) == records[2]
    assert not (tmp_path / "ckpt" / "typo").exists()  # no checkpoint of a broken cloud
    assert metrics.registry.get_sample_value("casecloud_stream_model_error", {"stream": "typo"}) == 1.0
    service.ready = True
    assert service.readiness() == (False, "not ready: streams stopped on a model error: typo")


def test_calibrate_refuses_a_spec_with_a_bad_rate(tmp_path, capsys):
    # Bug caught: PMMH quietly treating NaN rates as zero flows.
    import numpy as np

    from filters import CompartmentalModel, simulate_season
    from schemas import load_model_spec
    from service.cli import main

    bad_spec = tmp_path / "sir_typo.toml"
    text = example_model_path("sir").read_text(encoding="utf-8")
    bad_spec.write_text(text.replace('name = "sir"', 'name = "sir_typo"').replace('rate = "gamma"', 'rate = "gamma * log(t - 5)"'), encoding="utf-8")
    season = simulate_season(CompartmentalModel(load_model_spec(example_model_path("sir"))), 12, np.random.default_rng(1))
    history = tmp_path / "counts.csv"
    history.write_text("period,cases\n" + "".join(
        f"{(START + dt.timedelta(days=o.time)).isoformat()},{int(o.values['cases'])}\n" for o in season.observations
    ))
    code = main([
        "calibrate", "--model", str(bad_spec), "--history", str(history), "--start", START.isoformat(),
        "--particles", "20", "--chains", "1", "--iterations", "5", "--noise-repeats", "2", "--out", str(tmp_path / "cal"),
    ])
    err = capsys.readouterr().err
    assert code != 0
    assert "flow 'recovery'" in err and "'gamma * log(t - 5)'" in err and "is nan" in err


def test_over_the_file_transport_nothing_is_published_for_a_broken_spec(tmp_path, capsys):
    # The same guard through `casecloud replay` (file transport, a real process's code path).
    from service.cli import main

    bad_spec = tmp_path / "sir_typo.toml"
    text = example_model_path("sir").read_text(encoding="utf-8")
    bad_spec.write_text(text.replace('rate = "gamma"', 'rate = "-gamma"'), encoding="utf-8")
    (tmp_path / "feed.ndjson").write_bytes(b"".join(obs("typo", d) + b"\n" for d in range(1, 6)))
    (tmp_path / "deploy.toml").write_text(
        f'[service]\ncheckpoint_dir = "ckpt"\n[metrics]\nenabled = false\n'
        f'[[streams]]\nid = "typo"\nmodel = "{bad_spec}"\nstart = "{START.isoformat()}"\nparticles = 50\nforecast_trajectories = 10\n'
    )
    code = main(["replay", "--config", str(tmp_path / "deploy.toml"), "--input", str(tmp_path / "feed.ndjson"), "--out", str(tmp_path / "out")])
    assert code == 0
    assert (tmp_path / "out" / "estimates.ndjson").read_bytes() == b""
    letters = [orjson.loads(x) for x in (tmp_path / "out" / "dead_letters.ndjson").read_bytes().splitlines()]
    assert [x["reason"] for x in letters] == ["model_error"] * 5
    assert "is -0.25" in letters[0]["message"] and "'-gamma'" in letters[0]["message"]


def test_an_internal_error_stops_only_its_stream_and_keeps_its_records(tmp_path, monkeypatch, caplog):
    """A defect of casecloud's own in one stream's step (here: an exception raised inside the
    filter for stream "struck" from its second record on) must not stop the service: other
    streams go on; the record and the stream's later ones become dead letters ``internal_error``
    with their bytes; nothing more is published or checkpointed for the stream (its cloud may be
    half-updated); ``/readyz``, ``casecloud_stream_internal_error`` and a logged traceback say
    so. Bug caught (it was there): the exception escaped the record loop and the service exited,
    and on restart met the same record again."""
    from filters import ParticleFilter

    config = DeploymentConfig.model_validate(
        {
            "service": {"seed": 1, "checkpoint_dir": str(tmp_path / "ckpt")},
            "metrics": {"enabled": False},
            "streams": [
                {"id": "struck", "model": "sir", "start": START.isoformat(), "particles": 60, "forecast_trajectories": 10},
                {"id": "fine", "model": "sir", "start": START.isoformat(), "particles": 50, "forecast_trajectories": 10},
            ],
        }
    )
    original = ParticleFilter.assimilate

    def flawed(self, time, reports, *args, **kwargs):
        if self.step_count >= 1 and self.particles.size == 60:  # the stream "struck", from its second record
            raise IndexError("index 1499 is out of bounds for axis 0 with size 19")
        return original(self, time, reports, *args, **kwargs)

    monkeypatch.setattr(ParticleFilter, "assimilate", flawed)
    records = [obs("struck", 1), obs("fine", 1), obs("struck", 2), obs("fine", 2), obs("struck", 3), obs("fine", 3)]
    transport = MemoryTransport(records)
    metrics = Metrics(registry=CollectorRegistry())
    service = Service(config, transport, metrics=metrics, today=lambda: dt.date(2026, 3, 1), pipeline=False)
    counts = asyncio.run(service.run(until_exhausted=True))
    assert counts == {"applied": 4, "skipped": 0, "dead_letter": 2}
    estimates = [orjson.loads(r.value) for r in transport.published["estimates"]]
    assert [(e["stream"], e["day"]) for e in estimates] == [("struck", 1), ("fine", 1), ("fine", 2), ("fine", 3)]
    letters = [DeadLetter.model_validate(orjson.loads(r.value)) for r in transport.published["dead_letters"]]
    assert [(x.stream, x.reason) for x in letters] == [("struck", "internal_error"), ("struck", "internal_error")]
    assert "IndexError: index 1499" in letters[0].message and "until the service is restarted" in letters[1].message
    assert [base64.b64decode(x.original_base64) for x in letters] == [records[2], records[4]]
    struck = sorted(p.name for p in (tmp_path / "ckpt").rglob("*.ckpt") if "struck" in str(p))
    assert struck == ["000000000001.ckpt"]  # the checkpoint before the failure, nothing after
    assert metrics.registry.get_sample_value("casecloud_stream_internal_error", {"stream": "struck"}) == 1.0
    assert "Traceback" in caplog.text or any(r.exc_info for r in caplog.records)
    service.ready = True
    assert service.readiness() == (False, "not ready: streams stopped on an internal error: struck")
