"""The model guard with a real Kafka broker: a spec whose recovery rate is NaN before day 5
publishes no estimate; its records land on the dead-letter topic with reason model_error and
their original bytes. Bug caught: a NaN rate read as "no flow" and estimates published from it."""

from __future__ import annotations

import base64

import orjson
import pytest

from kafka_helpers import START, ServiceProcess, produce, read_all, season_messages, wait_for
from schemas import example_model_path

pytestmark = pytest.mark.integration


def test_a_broken_spec_publishes_nothing_over_kafka(kafka_broker, tmp_path):
    bootstrap = kafka_broker.bootstrap_servers
    topic, stream = "guard.observations", "typo-ili"
    kafka_broker.create_topic(topic, 1)
    messages = season_messages(stream, 6, seed=3, model="sir")
    produce(bootstrap, topic, [(stream.encode(), m) for m in messages])
    spec = tmp_path / "sir_typo.toml"
    spec.write_text(example_model_path("sir").read_text(encoding="utf-8").replace('rate = "gamma"', 'rate = "gamma * log(t - 5)"'))
    config = tmp_path / "deploy.toml"
    config.write_text(f"""
transport = "kafka"
[service]
checkpoint_dir = "{tmp_path / 'ckpt'}"
[metrics]
enabled = false
[kafka]
bootstrap_servers = "{bootstrap}"
group_id = "guard"
input_topic = "{topic}"
estimates_topic = "guard.estimates"
alerts_topic = "guard.alerts"
dead_letter_topic = "guard.dead-letters"
[[streams]]
id = "{stream}"
model = "{spec}"
start = "{START.isoformat()}"
particles = 50
forecast_trajectories = 10
""")
    service = ServiceProcess(config, tmp_path / "service.log").start()
    wait_for(lambda: len(read_all(bootstrap, "guard.dead-letters", timeout=5)) == 6, 120, "six dead letters", service)
    assert service.terminate() == 0, service.log_tail()
    letters = [orjson.loads(r.value) for r in read_all(bootstrap, "guard.dead-letters")]
    assert [x["reason"] for x in letters] == ["model_error"] * 6
    assert "flow 'recovery'" in letters[0]["message"] and "is nan" in letters[0]["message"]
    assert sorted(base64.b64decode(x["original_base64"]) for x in letters) == sorted(messages)
    assert read_all(bootstrap, "guard.estimates", timeout=5) == []
    assert "stopped on a model error" in (tmp_path / "service.log").read_text()
