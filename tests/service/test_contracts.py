"""The published contract, checked independently of the code that produces it.

Every estimate (with its forecast block, weekly totals and peaks), alert and dead letter that a
service run produces here is validated against the exported JSON Schemas in ``schemas/json/`` with
the ``jsonschema`` library (Draft 2020-12; a second implementation of JSON Schema, not pydantic).
Negative controls: the same messages, each altered in one way a consumer would notice, must fail.
(tests/conftest.py applies the same validation to every message the service produces in any test.)
"""

from __future__ import annotations

import asyncio
import copy
import datetime as dt
import json
from pathlib import Path

import jsonschema
import orjson
import pytest
from pydantic import ValidationError

import schemas
from schemas import DeploymentConfig, EstimateMessage
from schemas._messages import ForecastBlock
from service.runtime.app import Service
from service.transports import MemoryTransport

SCHEMA_DIR = Path(schemas.__file__).parent / "json"
WEEKLY_SPEC = Path(__file__).resolve().parents[1] / "filters" / "specs" / "seir_weekly.toml"
START = dt.date(2026, 1, 1)  # a Thursday: ISO week 2026-W01 ends on Sunday 4 January (model day 3)
STREAM = "east.onsets"


def validator(name: str) -> jsonschema.Draft202012Validator:
    schema = json.loads((SCHEMA_DIR / f"{name}.json").read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def _day(d: int) -> str:
    return (START + dt.timedelta(days=d)).isoformat()


@pytest.fixture(scope="module")
def published(tmp_path_factory):
    """One service run: daily and weekly counts of seir_weekly, an alert rule low enough to be
    raised, and records that must become dead letters of several kinds."""
    root = tmp_path_factory.mktemp("contracts")
    config = DeploymentConfig.model_validate({
        "service": {"seed": 3, "checkpoint_dir": str(root / "checkpoints")},
        "metrics": {"enabled": False},
        "streams": [{
            "id": STREAM, "model": str(WEEKLY_SPEC), "start": START.isoformat(), "particles": 300,
            "forecast_trajectories": 60, "forecast_horizon_days": 21,
            "alerts": [{"name": "onsets_high", "series": "daily_onsets", "threshold": 5, "horizon_days": 7,
                        "raise_level": 0.5, "clear_level": 0.2}],
        }],
    })  # fmt: skip
    records = []
    for d in range(1, 22):
        records.append(orjson.dumps({"stream": STREAM, "period": _day(d), "counts": {"daily_onsets": 8 + d}}))
        if (START + dt.timedelta(days=d)).isoweekday() == 7:
            year, week, _ = (START + dt.timedelta(days=d)).isocalendar()
            records.append(orjson.dumps({"stream": STREAM, "period": f"{year}-W{week:02d}", "counts": {"weekly_onsets": 90}}))
    records += [
        b'{"stream": "east.onsets", "period": ',  # malformed JSON
        orjson.dumps({"stream": "nowhere", "period": _day(22), "counts": {"daily_onsets": 1}}),  # unknown stream
        orjson.dumps({"stream": STREAM, "period": _day(22), "counts": {"icu": 1}}),  # unknown series
        orjson.dumps({"stream": STREAM, "period": _day(22), "counts": {"daily_onsets": -3}}),  # bad count
        orjson.dumps({"stream": STREAM, "period": _day(22), "counts": {}}),  # schema: no counts
    ]
    transport = MemoryTransport(records)
    asyncio.run(Service(config, transport, today=lambda: dt.date(2026, 3, 1)).run(until_exhausted=True))
    return {kind: [json.loads(r.value) for r in transport.published[kind]] for kind in ("estimates", "alerts", "dead_letters")}


def test_every_published_message_validates_against_the_exported_schemas(published):
    estimates, alerts, letters = published["estimates"], published["alerts"], published["dead_letters"]
    # The run produced every kind and every optional part of the forecast block.
    assert len(estimates) == 24 and all(e["forecast"] is not None for e in estimates)
    last = estimates[-1]["forecast"]
    assert set(last["series"]) == {"daily_onsets", "weekly_onsets"}
    assert "weekly" in last["series"]["weekly_onsets"] and "weekly" not in last["series"]["daily_onsets"]
    assert set(last["latent"]) == {"infections", "susceptibles", "R_eff"} and "peak" in last["latent"]["infections"]
    assert last["growth_probability"] is not None
    assert {a["status"] for a in alerts} >= {"raised"}
    assert {d["reason"] for d in letters} == {"malformed_json", "unknown_stream", "unknown_series", "bad_count", "schema"}
    for name, messages in (("estimate", estimates), ("alert", alerts), ("dead_letter", letters)):
        v = validator(name)
        for m in messages:
            errors = [f"{list(e.path)}: {e.message[:120]}" for e in v.iter_errors(m)]
            assert not errors, (name, errors[:5])


def _set(doc: dict, path: list, value) -> dict:
    out = copy.deepcopy(doc)
    node = out
    for key in path[:-1]:
        node = node[key]
    if value is _DELETE:
        del node[path[-1]]
    else:
        node[path[-1]] = value
    return out


_DELETE = object()

BROKEN_ESTIMATES = [
    ("forecast block with an unknown key", ["forecast", "extra"], 1),
    ("quantile that is a string", ["forecast", "series", "daily_onsets", "quantiles", 0, 0], "12.5"),
    ("series forecast without its peak", ["forecast", "series", "daily_onsets", "peak"], _DELETE),
    ("weekly totals without their end days", ["forecast", "series", "weekly_onsets", "weekly", "ends"], _DELETE),
    ("latent entry with an unknown key", ["forecast", "latent", "R_eff", "median"], [1.0]),
    ("horizon that is not an integer", ["forecast", "horizon"], 21.5),
    ("forecast that is a list", ["forecast"], []),
    ("estimate without its id", ["id"], _DELETE),
    ("exceedance probability as text", ["exceedance", "onsets_high", "probability"], "high"),
]


@pytest.mark.parametrize("label, path, value", BROKEN_ESTIMATES, ids=[b[0] for b in BROKEN_ESTIMATES])
def test_altered_estimates_fail_the_schema(published, label, path, value):
    good = published["estimates"][-1]
    v = validator("estimate")
    assert v.is_valid(good)
    assert not v.is_valid(_set(good, path, value)), label


@pytest.mark.parametrize(
    "kind, path, value",
    [("alert", ["status"], "maybe"), ("alert", ["probability"], None), ("dead_letter", ["reason"], "nope"),
     ("dead_letter", ["original_base64"], _DELETE)],
    ids=["alert-status", "alert-probability", "dead-letter-reason", "dead-letter-bytes"],
)
def test_altered_alerts_and_dead_letters_fail_the_schema(published, kind, path, value):
    good = published["alerts" if kind == "alert" else "dead_letters"][0]
    v = validator(kind)
    assert v.is_valid(good)
    assert not v.is_valid(_set(good, path, value))


def test_the_service_side_model_refuses_a_malformed_forecast_block(published):
    """pydantic (what the service runs) agrees with the schema, and also checks what JSON Schema
    cannot say: every quantile row has one value per day ahead and there is one row per level."""
    good = published["estimates"][-1]
    assert EstimateMessage.model_validate(good).forecast == good["forecast"]  # kept as published
    with pytest.raises(ValidationError, match="invalid forecast block"):
        EstimateMessage.model_validate(_set(good, ["forecast", "series", "daily_onsets", "peak"], _DELETE))
    short_row = _set(good, ["forecast", "series", "daily_onsets", "quantiles", 3], [1.0, 2.0])
    assert validator("estimate").is_valid(short_row)  # the schema cannot see row lengths...
    with pytest.raises(ValidationError, match="series.daily_onsets: mean and every quantile row must have 21 values"):
        ForecastBlock.model_validate(short_row["forecast"])  # ...the model can
