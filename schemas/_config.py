"""The deployment config: one TOML file, with environment overrides for
addresses and secrets.

Environment variables (they win over the file):

===================================  ==============================
``CASECLOUD_KAFKA_BOOTSTRAP``         kafka.bootstrap_servers
``CASECLOUD_KAFKA_GROUP``             kafka.group_id
``CASECLOUD_KAFKA_USERNAME``          kafka.sasl_username
``CASECLOUD_KAFKA_PASSWORD``          kafka.sasl_password
``CASECLOUD_METRICS_HOST``            metrics.host
``CASECLOUD_METRICS_PORT``            metrics.port
``CASECLOUD_CHECKPOINT_DIR``          service.checkpoint_dir
===================================  ==============================
"""

from __future__ import annotations

import datetime as dt
import os
import tomllib
from pathlib import Path
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, SecretStr, model_validator

from ._errors import SpecError
from ._loading import validate_document
from ._messages import StreamId

__all__ = [
    "AlertRule",
    "StreamConfig",
    "ServiceSettings",
    "MetricsSettings",
    "KafkaSettings",
    "FileSettings",
    "DeploymentConfig",
    "load_deployment_config",
    "ENV_OVERRIDES",
]


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class AlertRule(_Section):
    """Raise when P(series exceeds threshold on any day within horizon) crosses raise_level;
    clear when it falls below clear_level (hysteresis); optionally require
    ``persistence`` consecutive updates above raise_level."""

    name: Annotated[str, Field(pattern=r"^[A-Za-z0-9_.-]{1,64}$")]
    series: str
    threshold: float = Field(ge=0)
    horizon_days: int = Field(default=7, ge=1, le=90)
    raise_level: float = Field(default=0.8, gt=0, lt=1)
    clear_level: float = Field(default=0.5, ge=0, lt=1)
    persistence: int = Field(default=1, ge=1, le=30)

    @model_validator(mode="after")
    def _levels(self) -> "AlertRule":
        if not self.clear_level < self.raise_level:
            raise ValueError(
                f"clear_level ({self.clear_level}) must be below raise_level ({self.raise_level}) for hysteresis"
            )
        return self


class StreamConfig(_Section):
    id: StreamId
    model: str = Field(description="path to a model spec TOML (relative to the config file) or an example name")
    start: dt.date = Field(description="calendar date of model day 0")
    particles: int = Field(default=5000, ge=10, le=1_000_000)
    resample_threshold: float = Field(default=0.5, gt=0, le=1)
    scheme: Literal["systematic", "stratified", "residual", "multinomial"] = "systematic"
    liu_west_discount: float | None = Field(default=0.99, gt=0, lt=1)
    forecast_trajectories: int = Field(default=500, ge=10, le=100_000)
    forecast_horizon_days: int = Field(default=28, ge=1, le=90)
    publish_forecast: bool = Field(default=True, description="include the forecast block in every estimate")
    publish_predictive: bool = Field(
        default=True,
        description="include in every estimate each assimilated value's one-step-ahead predictive (the value against "
        "what the cloud expected of it; a few ms a step)",
    )
    assimilation_window_days: int | None = Field(
        default=None,
        ge=0,
        le=120,
        description="days back a late or revised value is still assimilated; default: the model spec's "
        "window_days, else its longest delay. Changing it changes the model fingerprint",
    )
    alerts: list[AlertRule] = Field(default_factory=list)


class ServiceSettings(_Section):
    seed: int = Field(default=20261201, ge=0)
    checkpoint_dir: Path = Path("casecloud-checkpoints")
    keep_checkpoints: int = Field(default=3, ge=1, le=100)
    max_message_bytes: int = Field(default=65536, ge=256, le=16 * 1024 * 1024)
    max_future_days: int = Field(default=2, ge=0, le=366)
    max_gap_days: int = Field(default=120, ge=1, le=3660)
    checkpoint_store: Literal["local", "kafka"] = Field(
        default="local",
        description="local: checkpoint_dir on disk; kafka: a compacted topic every replica can read",
    )
    checkpoint_topic: str = "casecloud.checkpoints"


class MetricsSettings(_Section):
    enabled: bool = True
    host: str = "127.0.0.1"
    port: int = Field(default=9464, ge=0, le=65535)


def _given(value: object) -> bool:
    """Set and not empty (an empty environment variable counts as unset)."""
    if isinstance(value, SecretStr):
        value = value.get_secret_value()
    return value is not None and value != ""


class KafkaSettings(_Section):
    bootstrap_servers: str = "127.0.0.1:9092"
    group_id: str = "casecloud"
    input_topic: str = "casecloud.observations"
    estimates_topic: str = "casecloud.estimates"
    alerts_topic: str = "casecloud.alerts"
    dead_letter_topic: str = "casecloud.dead-letters"
    client_id: str = "casecloud"
    session_timeout_ms: int = Field(default=10_000, ge=6_000, le=300_000)
    publish_timeout_ms: int = Field(
        default=40_000,
        ge=1_000,
        le=300_000,
        description="how long one publish waits for the brokers' acknowledgement before it counts as failed "
        "(the service then publishes again with a new producer, until the brokers answer)",
    )
    security_protocol: Literal["PLAINTEXT", "SSL", "SASL_PLAINTEXT", "SASL_SSL"] = "PLAINTEXT"
    sasl_mechanism: Literal["PLAIN", "SCRAM-SHA-256", "SCRAM-SHA-512"] | None = None
    sasl_username: str | None = None
    sasl_password: SecretStr | None = None
    ssl_cafile: Path | None = Field(default=None, description="PEM CA bundle that signed the brokers' certificates (default: the system's)")
    ssl_certfile: Path | None = Field(default=None, description="PEM client certificate (chain) for brokers that require TLS client authentication")
    ssl_keyfile: Path | None = Field(default=None, description="PEM private key of ssl_certfile (omit if the certificate file holds the key)")

    @model_validator(mode="after")
    def _security(self) -> "KafkaSettings":
        # Never echo the password here: the loader prints these messages.
        protocol = self.security_protocol
        if protocol.startswith("SASL"):
            missing = [
                f"{name} (or ${var})"
                for name, var, value in (
                    ("sasl_username", "CASECLOUD_KAFKA_USERNAME", self.sasl_username),
                    ("sasl_password", "CASECLOUD_KAFKA_PASSWORD", self.sasl_password),
                )
                if not _given(value)
            ]
            if missing:
                raise ValueError(f"security_protocol {protocol} needs {' and '.join(missing)}")
        else:
            given = [n for n in ("sasl_mechanism", "sasl_username", "sasl_password") if _given(getattr(self, n))]
            if given:
                raise ValueError(
                    f"{', '.join(given)} given but security_protocol is {protocol}, so they would never be sent; "
                    f"allowed: SASL_PLAINTEXT or SASL_SSL with SASL settings"
                )
        if protocol not in ("SSL", "SASL_SSL"):
            given = [n for n in ("ssl_cafile", "ssl_certfile", "ssl_keyfile") if getattr(self, n) is not None]
            if given:
                raise ValueError(
                    f"{', '.join(given)} given but security_protocol is {protocol} (no TLS); allowed: SSL or SASL_SSL"
                )
        if self.ssl_keyfile is not None and self.ssl_certfile is None:
            raise ValueError("ssl_keyfile given without ssl_certfile; the key belongs to a client certificate")
        return self


class FileSettings(_Section):
    input: Path | None = Field(default=None, description="NDJSON observations; omit to read stdin")
    output_dir: Path | None = Field(default=None, description="where estimates/alerts/dead letters go; omit for stdout")


class DeploymentConfig(_Section):
    service: ServiceSettings = Field(default_factory=ServiceSettings)
    metrics: MetricsSettings = Field(default_factory=MetricsSettings)
    transport: Literal["kafka", "file"] = "file"
    kafka: KafkaSettings = Field(default_factory=KafkaSettings)
    file: FileSettings = Field(default_factory=FileSettings)
    streams: list[StreamConfig] = Field(min_length=1)

    @model_validator(mode="after")
    def _unique(self) -> "DeploymentConfig":
        ids = [s.id for s in self.streams]
        repeated = sorted({i for i in ids if ids.count(i) > 1})
        if repeated:
            raise ValueError(f"stream ids must be unique, repeated: {repeated}")
        return self


ENV_OVERRIDES = {
    "CASECLOUD_KAFKA_BOOTSTRAP": ("kafka", "bootstrap_servers"),
    "CASECLOUD_KAFKA_GROUP": ("kafka", "group_id"),
    "CASECLOUD_KAFKA_USERNAME": ("kafka", "sasl_username"),
    "CASECLOUD_KAFKA_PASSWORD": ("kafka", "sasl_password"),
    "CASECLOUD_METRICS_HOST": ("metrics", "host"),
    "CASECLOUD_METRICS_PORT": ("metrics", "port"),
    "CASECLOUD_CHECKPOINT_DIR": ("service", "checkpoint_dir"),
}


def load_deployment_config(
    path: str | Path, environ: dict[str, str] | None = None
) -> DeploymentConfig:
    """Read the TOML config, apply environment overrides, validate.

    Relative paths in the file (checkpoint_dir, file input/output, stream
    models, Kafka TLS files) are resolved against the config file's directory.
    """
    path = Path(path)
    env = os.environ if environ is None else environ
    try:
        text = path.read_text(encoding="utf-8")
        data = tomllib.loads(text)
    except OSError as exc:
        raise SpecError(f"{path}: cannot read config: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"{path}: not valid TOML: {exc}") from None
    base = path.parent
    for section, key in (
        ("service", "checkpoint_dir"),
        ("file", "input"),
        ("file", "output_dir"),
        ("kafka", "ssl_cafile"),
        ("kafka", "ssl_certfile"),
        ("kafka", "ssl_keyfile"),
    ):
        table = data.get(section)
        value = table.get(key) if isinstance(table, dict) else None  # a non-table is reported by validation
        if isinstance(value, str) and value and not Path(value).is_absolute():
            data[section][key] = str(base / value)
    for stream in data.get("streams", []) if isinstance(data.get("streams"), list) else []:
        model = stream.get("model") if isinstance(stream, dict) else None
        if isinstance(model, str) and model.endswith(".toml") and not Path(model).is_absolute():
            stream["model"] = str(base / model)
    # After resolving: a relative path given in the environment means the
    # working directory, as usual for environment variables, not the file's.
    for var, (section, key) in ENV_OVERRIDES.items():
        if var in env and isinstance(data.setdefault(section, {}), dict):
            data[section][key] = env[var]
    return validate_document(DeploymentConfig, data, str(path), text)
