"""A stream whose model is individual-based (a spec file with kind = "individual")
runs through the service like a compartmental one: estimates with R_eff and the
people in each stage, forecasts and exceedance alerts, late values, and a
restart from the checkpoint that is bit-identical to an uninterrupted run.
"""

from __future__ import annotations

import asyncio
import datetime as dt
from pathlib import Path

import orjson
from prometheus_client import CollectorRegistry

from filters import IndividualModel
from schemas import DeploymentConfig
from service.runtime.app import Service
from service.runtime.metrics import Metrics
from service.runtime.streams import StreamRegistry
from service.state import LocalCheckpointStore
from service.transports import MemoryTransport

STREAM = "hamlet.ed"
START = dt.date(2026, 1, 5)
TODAY = dt.date(2026, 3, 1)

TOWN = """
name = "hamlet"
seed = 77
size = 1500
bands = [{ name = "child", share = 0.25 }, { name = "adult", share = 0.75 }]
[households]
size = { dist = "discrete", values = [1, 2, 3, 4], weights = [0.3, 0.35, 0.2, 0.15] }
head_bands = ["adult"]
[[settings]]
name = "school"
size = 120
members = { child = 0.95 }
"""

MODEL = """
kind = "individual"
name = "hamlet_flu"
population = "hamlet_town.toml"
window_days = 4
[transmission]
household = "beta_home"
community = "beta"
importation = 0.3
settings = { school = 0.4 }
[disease]
latent = { dist = "discrete", days = [1, 2], weights = [0.5, 0.5] }
infectious = { dist = "gamma", mean = 3.0, sd = 1.0, max_days = 7 }
asymptomatic = 0.3
asymptomatic_infectiousness = 0.5
[parameters.beta]
kind = "drifting"
prior = { dist = "lognormal", mean_log = -1.4, sd_log = 0.3 }
volatility = 0.05
[parameters.beta_home]
kind = "static"
prior = { dist = "lognormal", mean_log = -0.7, sd_log = 0.3 }
[parameters.rho]
kind = "static"
prior = { dist = "beta", a = 6.0, b = 14.0 }
[initial]
exposed = { dist = "uniform", low = 2, high = 8 }
infectious = 2
[[series]]
name = "ed"
kind = "incidence"
flow = "onset"
reporting = "rho"
delay = { dist = "gamma", mean = 1.5, sd = 1.0, max_days = 4 }
noise = { dist = "poisson" }
"""


def _config(root: Path, checkpoints: Path) -> DeploymentConfig:
    (root / "hamlet_town.toml").write_text(TOWN)
    (root / "hamlet_flu.toml").write_text(MODEL)
    return DeploymentConfig.model_validate({
        "service": {"seed": 5, "checkpoint_dir": str(checkpoints), "keep_checkpoints": 50},
        "metrics": {"enabled": False},
        "streams": [{
            "id": STREAM, "model": str(root / "hamlet_flu.toml"), "start": START.isoformat(),
            "particles": 60, "forecast_trajectories": 30, "forecast_horizon_days": 14,
            "alerts": [{"name": "ed_high", "series": "ed", "threshold": 3, "horizon_days": 7}],
        }],
    })


def _records() -> list[bytes]:
    out = []
    for day in range(1, 12):
        period = (START + dt.timedelta(days=day)).isoformat()
        out.append(orjson.dumps({"stream": STREAM, "period": period, "counts": {"ed": [0, 1, 0, 2, 1, 3][day % 6]}}))
    # day 13, then a late value for day 12 (inside the assimilation window)
    out.append(orjson.dumps({"stream": STREAM, "period": (START + dt.timedelta(days=13)).isoformat(), "counts": {"ed": 2}}))
    out.append(orjson.dumps({"stream": STREAM, "period": (START + dt.timedelta(days=12)).isoformat(), "counts": {"ed": 1}}))
    return out


def _run(config: DeploymentConfig, records: list[bytes]) -> tuple[Service, MemoryTransport, dict]:
    transport = MemoryTransport(records)
    service = Service(config, transport, metrics=Metrics(registry=CollectorRegistry()), today=lambda: TODAY, pipeline=True)
    counts = asyncio.run(service.run(until_exhausted=True))
    return service, transport, counts


def test_the_registry_builds_an_individual_model_from_its_kind(tmp_path):
    """Bug caught: the registry compiling every spec as compartmental."""
    config = _config(tmp_path, tmp_path / "ck")
    registry = StreamRegistry(config, LocalCheckpointStore(tmp_path / "ck"))
    model = registry.models[STREAM]
    assert isinstance(model, IndividualModel) and model.people == 1500
    shipped = config.model_copy(update={"streams": [config.streams[0].model_copy(update={"model": "pellingwold_flu", "alerts": []})]})
    assert isinstance(StreamRegistry(shipped, LocalCheckpointStore(tmp_path / "ck2")).models[STREAM], IndividualModel)


def test_estimates_forecasts_and_alerts_of_an_individual_based_stream(tmp_path):
    """Bug caught: a quantity the service reads (series, R_eff, forecast draws) missing
    for this family, so estimates or alerts are not published."""
    _, transport, counts = _run(_config(tmp_path, tmp_path / "ck"), _records())
    assert counts == {"applied": 13, "skipped": 0, "dead_letter": 0}
    estimates = [orjson.loads(r.value) for r in transport.published["estimates"]]
    last = estimates[-1]
    assert last["model"] == "hamlet_flu"
    q = last["quantities"]
    assert {"R_eff", "S[child]", "I[adult]", "infections_7d.school", "beta", "rho"} <= set(q)
    assert abs(sum(q[f"{c}[{b}]"]["mean"] for c in "SEIR" for b in ("child", "adult")) - 1500) < 1e-6
    assert last["forecast"]["series"]["ed"]["quantiles"] and last["exceedance"]["ed_high"]["probability"] >= 0
    assert set(last["forecast"]["latent"]) == {"infections", "susceptibles", "R_eff"}
    assert last["growth_probability"] is not None
    assert sum(1 for r in transport.published["alerts"] if orjson.loads(r.value)["status"] == "raised") == 1
    # the late value (day 12 after day 13) was weighed against each particle's own path
    assert estimates[-1]["cloud_day"] == 13 and estimates[-1]["day"] == 12


def test_restart_from_the_checkpoint_is_bit_identical(tmp_path):
    """Bug caught: state the checkpoint does not carry (the towns, their history, the
    generator, the running statistics of the learned household rate) so a resumed
    stream drifts from an uninterrupted one."""
    records = _records()
    _, straight, _ = _run(_config(tmp_path, tmp_path / "straight"), records)
    _, first, _ = _run(_config(tmp_path, tmp_path / "split"), records[:6])
    _, second, counts = _run(_config(tmp_path, tmp_path / "split"), records)
    assert counts["applied"] == len(records) - 6
    a = LocalCheckpointStore(tmp_path / "straight").load_latest(STREAM, expected_fingerprint=None)
    b = LocalCheckpointStore(tmp_path / "split").load_latest(STREAM, expected_fingerprint=None)
    assert a.path.read_bytes() == b.path.read_bytes()
    assert a.checkpoint.arrays["states"].dtype.str == "|u1"
    assert a.checkpoint.arrays["stats"].shape[1] == 2  # contacts and exposure of beta_home
    assert second.published["alerts"], "the comparison should cover alerts published after the restart"
    split = first.published["estimates"] + second.published["estimates"]
    assert [r.value for r in split] == [r.value for r in straight.published["estimates"]]
    assert [r.value for r in first.published["alerts"] + second.published["alerts"]] == [r.value for r in straight.published["alerts"]]


WASTEWATER = """
[parameters.ww_scale]
kind = "static"
prior = { dist = "lognormal", mean_log = 8.0, sd_log = 0.3 }
[[series]]
name = "ww_hamlet"
kind = "concentration"
flow = "infection"
shedding = { dist = "gamma", mean = 5.0, sd = 2.5, max_days = 14 }
scale = "ww_scale"
catchment = 0.8
reference_flow = 2.0e6
noise = { dist = "lognormal", sd = 0.3 }
"""


def test_a_town_stream_applies_wastewater_samples_and_forecasts_them(tmp_path):
    """Through the service: concentration messages for an individual-based stream (samples with a
    flow, one below the lab's limit) are applied, and estimates carry the series' forecast and the
    one-step-ahead predictive of each sample. Bad input: a sample for a count series is a dead
    letter `series_kind` with its bytes, the cloud untouched."""
    config = _config(tmp_path, tmp_path / "ck")
    model_path = tmp_path / "hamlet_flu.toml"
    model_path.write_text(MODEL + WASTEWATER)
    records = _records()[:8]
    for day, value in ((6, 900.0), (9, None), (10, 2500.0)):  # day 6: a late sample, inside the window
        period = (START + dt.timedelta(days=day)).isoformat()
        sample = {"value": value, "lod": 400.0, "flow": 2.5e6}
        records.append(orjson.dumps({"stream": STREAM, "period": period, "counts": {}, "concentrations": {"ww_hamlet": sample}}))
    records.append(orjson.dumps({"stream": STREAM, "period": (START + dt.timedelta(days=11)).isoformat(),
                                 "counts": {}, "concentrations": {"ed": {"value": 5.0}}}))
    _, transport, counts = _run(config, records)
    assert counts == {"applied": 11, "skipped": 0, "dead_letter": 1}
    dead = orjson.loads(transport.published["dead_letters"][0].value)
    assert dead["reason"] == "series_kind" and "ed" in dead["message"]
    estimates = [orjson.loads(r.value) for r in transport.published["estimates"]]
    assert "ww_hamlet" in estimates[-1]["forecast"]["series"]
    predicted = [e["predictive"]["ww_hamlet"] for e in estimates if "ww_hamlet" in (e.get("predictive") or {})]
    assert len(predicted) == 3
