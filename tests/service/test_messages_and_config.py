"""Messages on the wire and the deployment config file.

- the exported JSON Schema files are in sync with the pydantic models;
- a valid observation satisfies the exported schema (the ``jsonschema``
  library, Draft 2020-12, with a negative control; plus pydantic and a check of
  what the schema file declares);
- ``parse_period`` against ``datetime.date.fromisocalendar``;
- ``load_deployment_config``: environment overrides, relative paths, the SASL
  password kept secret, and errors that name file, line and field;
- the stream registry refuses an alert rule on a series the model does not observe.
"""

from __future__ import annotations

import datetime as dt
import json
import re
import shutil
from pathlib import Path

import jsonschema
import pytest
from pydantic import SecretStr, ValidationError

import schemas
from schemas import (
    MESSAGE_MODELS,
    DeploymentConfig,
    ObservationMessage,
    SpecError,
    example_model_path,
    json_schema,
    load_deployment_config,
    parse_period,
)
from service.state import LocalCheckpointStore
from service.errors import ConfigError
from service.runtime.streams import StreamRegistry

SCHEMA_DIR = Path(schemas.__file__).parent / "json"
VALID = {"stream": "region-north.ed", "period": "2026-01-07", "counts": {"cases": 12, "ed_child": None}, "metadata": {"feed": "ed"}}


# --------------------------------------------------------------- JSON Schema
@pytest.mark.parametrize("name", sorted(MESSAGE_MODELS))
def test_json_schema_files_are_in_sync_with_the_models(name):
    path = SCHEMA_DIR / f"{name}.json"
    assert path.is_file(), f"{path} is missing: run `casecloud schemas --out schemas/json`"
    on_disk = json.loads(path.read_text(encoding="utf-8"))
    assert on_disk == json_schema(name), (
        f"{path} is out of date with the pydantic model {MESSAGE_MODELS[name].__name__}: "
        "run `casecloud schemas --out schemas/json`"
    )


def test_no_stray_schema_files():
    assert sorted(p.stem for p in SCHEMA_DIR.glob("*.json")) == sorted(MESSAGE_MODELS)


def test_valid_observation_satisfies_the_exported_schema():
    schema = json.loads((SCHEMA_DIR / "observation.json").read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator.check_schema(schema)
    jsonschema.Draft202012Validator(schema).validate(VALID)
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.Draft202012Validator(schema).validate({**VALID, "counts": {"cases": -1}})
    # always: the file declares the contract the service enforces
    assert schema["type"] == "object"
    assert set(schema["required"]) == {"stream", "period", "counts"}
    assert schema["additionalProperties"] is False
    assert set(schema["properties"]) == {"stream", "period", "counts", "tests", "concentrations", "as_of", "metadata"}
    count = schema["properties"]["counts"]["patternProperties"]
    (series_pattern, spec), = count.items()
    assert {"type": "integer", "minimum": 0, "maximum": schemas.MAX_COUNT} in spec["anyOf"]
    assert {"type": "null"} in spec["anyOf"]
    # JSON Schema patterns are ECMA-262, where \d means [0-9]: re.ASCII gives the same meaning
    for field, value in (("stream", VALID["stream"]), ("period", VALID["period"])):
        assert re.search(schema["properties"][field]["pattern"], value, re.ASCII)
    assert re.search(schema["properties"]["period"]["pattern"], "2026-W05", re.ASCII)
    assert not re.search(schema["properties"]["period"]["pattern"], "2026-1-7", re.ASCII)
    assert all(re.search(series_pattern, k) for k in VALID["counts"])
    # and pydantic (what the service runs) agrees on the example and on its mutations
    assert ObservationMessage.model_validate(VALID).counts == VALID["counts"]
    for field in schema["required"]:
        with pytest.raises(ValidationError):
            ObservationMessage.model_validate({k: v for k, v in VALID.items() if k != field})
    with pytest.raises(ValidationError):
        ObservationMessage.model_validate({**VALID, "extra": 1})


def test_other_messages_round_trip_through_their_models():
    from schemas import DeadLetter, SourcePosition

    letter = DeadLetter(
        reason="bad_count",
        message="counts.cases: negative",
        stream="s1",
        source=SourcePosition(topic="t", partition=0, offset=3),
        original_base64="e30=",
    )
    schema = json.loads((SCHEMA_DIR / "dead_letter.json").read_text(encoding="utf-8"))
    assert set(schema["required"]) <= set(letter.model_dump())
    assert set(schema["properties"]["reason"]["enum"]) == set(DeadLetter.model_fields["reason"].annotation.__args__)
    assert DeadLetter.model_validate_json(letter.model_dump_json()) == letter


# ------------------------------------------------------------------- periods
@pytest.mark.parametrize("text", ["2026-01-01", "2024-02-29", "1999-12-31", "2026-03-03"])
def test_parse_period_dates(text):
    assert parse_period(text) == dt.date.fromisoformat(text)


@pytest.mark.parametrize(
    ("year", "week"), [(2026, 1), (2026, 2), (2026, 53), (2025, 1), (2025, 52), (2020, 53), (2021, 1), (2004, 53)]
)
def test_parse_period_iso_weeks_end_on_sunday(year, week):
    got = parse_period(f"{year}-W{week:02d}")
    assert got == dt.date.fromisocalendar(year, week, 7)
    assert got.isoweekday() == 7 and got.isocalendar()[:2] == (year, week)


def test_parse_period_known_weeks():
    # 2026-W01 runs Monday 2025-12-29 to Sunday 2026-01-04 (ISO 8601: week 1 holds the first Thursday)
    assert parse_period("2026-W01") == dt.date(2026, 1, 4)
    # 2020 had 53 ISO weeks; its last one ends on Sunday 2021-01-03
    assert parse_period("2020-W53") == dt.date(2021, 1, 3)


@pytest.mark.parametrize(
    "bad", ["2025-W53", "2026-W00", "2026-W54", "2026-02-30", "2026-13-01", "٢٠٢٦-W05", "2026/01/01", "next week"]
)
def test_parse_period_rejects(bad):
    with pytest.raises(ValueError, match=re.escape(repr(bad))):
        parse_period(bad)


# -------------------------------------------------------------------- config
CONFIG = """\
transport = "file"

[service]
seed = 3
checkpoint_dir = "state/ckpt"

[metrics]
enabled = false

[kafka]
bootstrap_servers = "file-broker:9092"
security_protocol = "SASL_SSL"
sasl_mechanism = "SCRAM-SHA-512"
sasl_username = "casecloud"
sasl_password = "password-from-file"

[file]
input = "data/observations.ndjson"
output_dir = "/var/tmp/casecloud-out"

[[streams]]
id = "region-north.ed"
model = "models/sir.toml"
start = "2026-01-01"
particles = 200

[[streams]]
id = "region-south.ed"
model = "sir"
start = "2026-01-01"
particles = 200
"""


def _write(tmp_path: Path, text: str) -> Path:
    conf = tmp_path / "etc" / "casecloud.toml"
    conf.parent.mkdir(parents=True, exist_ok=True)
    conf.write_text(text, encoding="utf-8")
    (conf.parent / "models").mkdir(exist_ok=True)
    shutil.copy(example_model_path("sir"), conf.parent / "models" / "sir.toml")
    return conf


def test_config_file_relative_paths_resolve_against_its_directory(tmp_path):
    conf = _write(tmp_path, CONFIG)
    config = load_deployment_config(conf, environ={})
    base = conf.parent
    assert config.service.checkpoint_dir == base / "state" / "ckpt"
    assert config.file.input == base / "data" / "observations.ndjson"
    assert config.file.output_dir == Path("/var/tmp/casecloud-out")  # absolute stays
    assert config.streams[0].model == str(base / "models" / "sir.toml")
    assert config.streams[1].model == "sir"  # an example name is not a path
    assert config.kafka.bootstrap_servers == "file-broker:9092"
    assert config.kafka.sasl_password.get_secret_value() == "password-from-file"


def test_environment_overrides_win(tmp_path):
    conf = _write(tmp_path, CONFIG)
    env = {
        "CASECLOUD_KAFKA_BOOTSTRAP": "broker-1:9093,broker-2:9093",
        "CASECLOUD_KAFKA_GROUP": "casecloud-blue",
        "CASECLOUD_KAFKA_USERNAME": "svc-casecloud",
        "CASECLOUD_KAFKA_PASSWORD": "hunter2-from-env",
        "CASECLOUD_METRICS_HOST": "0.0.0.0",
        "CASECLOUD_METRICS_PORT": "9999",
        "CASECLOUD_CHECKPOINT_DIR": "/srv/casecloud/ckpt",
        "UNRELATED": "x",
    }
    config = load_deployment_config(conf, environ=env)
    assert config.kafka.bootstrap_servers == "broker-1:9093,broker-2:9093"
    assert config.kafka.group_id == "casecloud-blue"
    assert config.kafka.sasl_username == "svc-casecloud"
    assert config.kafka.sasl_password.get_secret_value() == "hunter2-from-env"
    assert (config.metrics.host, config.metrics.port) == ("0.0.0.0", 9999)
    assert config.service.checkpoint_dir == Path("/srv/casecloud/ckpt")
    assert config.kafka.sasl_mechanism == "SCRAM-SHA-512"  # untouched by the environment


def test_environment_relative_path_means_working_directory(tmp_path):
    conf = _write(tmp_path, CONFIG)
    config = load_deployment_config(conf, environ={"CASECLOUD_CHECKPOINT_DIR": "run/ckpt"})
    assert config.service.checkpoint_dir == Path("run/ckpt")


def test_environment_is_read_from_os_environ_by_default(tmp_path, monkeypatch):
    conf = _write(tmp_path, CONFIG)
    monkeypatch.setenv("CASECLOUD_KAFKA_BOOTSTRAP", "from-os-environ:9092")
    assert load_deployment_config(conf).kafka.bootstrap_servers == "from-os-environ:9092"


def test_sasl_password_is_a_secret_and_never_printed(tmp_path):
    conf = _write(tmp_path, CONFIG)
    config = load_deployment_config(conf, environ={"CASECLOUD_KAFKA_PASSWORD": "hunter2-from-env"})
    assert isinstance(config.kafka.sasl_password, SecretStr)
    for text in (repr(config), str(config), repr(config.kafka), str(config.kafka), config.model_dump_json()):
        assert "hunter2" not in text
        assert "password-from-file" not in text


def _expect_spec_error(tmp_path, text, *needles, line: int | None = None):
    conf = _write(tmp_path, text)
    with pytest.raises(SpecError) as info:
        load_deployment_config(conf, environ={})
    message = str(info.value)
    assert str(conf) in message
    if line is not None:
        assert f"{conf}:{line}:" in message, message
    for needle in needles:
        assert needle in message, message
    return message


def test_clear_level_not_below_raise_level_is_refused(tmp_path):
    text = CONFIG + '\n[[streams.alerts]]\nname = "surge"\nseries = "cases"\nthreshold = 30\nraise_level = 0.6\nclear_level = 0.7\n'
    line = text.splitlines().index("[[streams.alerts]]") + 1
    _expect_spec_error(tmp_path, text, "streams[1].alerts[0]", "clear_level (0.7) must be below raise_level (0.6)", line=line)


def test_duplicate_stream_ids_are_refused(tmp_path):
    text = CONFIG.replace('id = "region-south.ed"', 'id = "region-north.ed"')
    _expect_spec_error(tmp_path, text, "stream ids must be unique", "region-north.ed")


def test_unknown_transport_kind_is_refused(tmp_path):
    text = CONFIG.replace('transport = "file"', 'transport = "carrier-pigeon"')
    _expect_spec_error(tmp_path, text, "field transport", "'carrier-pigeon'", "'kafka' or 'file'", line=1)


def test_wrong_type_and_unknown_key_are_refused_with_lines(tmp_path):
    text = CONFIG.replace("seed = 3", 'seed = "three"').replace("enabled = false", "enabled = false\nprot = 1")
    message = _expect_spec_error(tmp_path, text, "field service.seed", "'three'", "field metrics.prot")
    assert f":{CONFIG.splitlines().index('seed = 3') + 1}: field service.seed" in message


def test_section_of_the_wrong_kind_is_a_spec_error(tmp_path):
    # not a crash in the path-resolution step
    _expect_spec_error(tmp_path, CONFIG.replace("[service]\nseed = 3\n", "").replace('transport = "file"', 'transport = "file"\nservice = "x"'), "field service")


def test_invalid_toml_and_missing_file(tmp_path):
    _expect_spec_error(tmp_path, CONFIG + "\n[[streams]\n", "not valid TOML")
    with pytest.raises(SpecError, match="cannot read config"):
        load_deployment_config(tmp_path / "nope.toml", environ={})


def test_registry_refuses_alert_rule_on_unknown_series(tmp_path):
    config = DeploymentConfig.model_validate(
        {
            "service": {"checkpoint_dir": str(tmp_path / "ck")},
            "streams": [
                {
                    "id": "region-north.ed",
                    "model": "sir",
                    "start": "2026-01-01",
                    "particles": 200,
                    "alerts": [{"name": "deaths_high", "series": "deaths", "threshold": 5}],
                }
            ],
        }
    )
    with pytest.raises(ConfigError) as info:
        StreamRegistry(config, LocalCheckpointStore(tmp_path / "ck"))
    message = str(info.value)
    assert "'deaths_high'" in message and "'deaths'" in message and "['cases']" in message
    assert info.value.stream == "region-north.ed"
    assert not (tmp_path / "ck").exists()  # refused at start-up, before touching state


def test_registry_refuses_unusable_model(tmp_path):
    config = DeploymentConfig.model_validate(
        {"streams": [{"id": "a", "model": str(tmp_path / "missing.toml"), "start": "2026-01-01"}]}
    )
    with pytest.raises(ConfigError, match="missing.toml"):
        StreamRegistry(config, LocalCheckpointStore(tmp_path / "ck"))


def test_a_mistyped_password_is_not_echoed_in_the_error(tmp_path):
    """An unquoted numeric password fails validation; the error must not print it."""
    path = tmp_path / "deploy.toml"
    path.write_text('[kafka]\nsasl_password = 918273645\n[[streams]]\nid = "a"\nmodel = "sir"\nstart = "2025-01-01"\n')
    with pytest.raises(SpecError) as info:
        load_deployment_config(path, environ={})
    assert "kafka.sasl_password" in str(info.value)
    assert "918273645" not in str(info.value)
