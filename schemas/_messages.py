"""Messages on the wire: observations in; estimates, alerts and dead letters out.

JSON Schema files for each are exported to ``schemas/json/`` (see
:func:`export_json_schemas`); a test keeps them in sync with these models.
"""

from __future__ import annotations

import datetime as dt
import re
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StrictInt, field_validator

__all__ = [
    "StreamId",
    "ObservationMessage",
    "QuantitySummary",
    "Exceedance",
    "EstimateMessage",
    "AlertMessage",
    "DeadLetter",
    "SourcePosition",
    "parse_period",
    "MAX_COUNT",
    "MESSAGE_MODELS",
    "json_schema",
]

MAX_COUNT = 1_000_000_000
StreamId = Annotated[str, Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9._:-]{0,127}$")]
SeriesName = Annotated[str, Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")]
Period = Annotated[str, Field(pattern=r"^(\d{4}-\d{2}-\d{2}|\d{4}-W\d{2})$")]
# [0-9], not \d: \d also matches non-ASCII digits (e.g. "\u0662\u0660\u0662\u0666-W05"), which int() would accept.
_WEEK = re.compile(r"^([0-9]{4})-W([0-9]{2})$")


def parse_period(period: str) -> dt.date:
    """The last day a period covers: the date itself, or the Sunday of an ISO week."""
    match = _WEEK.match(period)
    if match:
        year, week = int(match.group(1)), int(match.group(2))
        try:
            return dt.date.fromisocalendar(year, week, 7)
        except ValueError:
            raise ValueError(f"period {period!r} is not an ISO week (weeks run 01..52 or 53)") from None
    try:
        return dt.date.fromisoformat(period)
    except ValueError:
        raise ValueError(f"period {period!r} is not a date YYYY-MM-DD or an ISO week YYYY-Www") from None


class _Message(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class ObservationMessage(_Message):
    """Aggregated counts for one stream and one period.

    ``counts`` maps series name to a whole-number count, or ``null`` when the
    series was not reported this period (it is then skipped, not taken as 0).
    Only aggregated counts: never line-level or personal data.
    """

    stream: StreamId
    period: Period = Field(description="a day YYYY-MM-DD, or an ISO week YYYY-Www for weekly streams")
    counts: dict[SeriesName, Annotated[StrictInt, Field(ge=0, le=MAX_COUNT)] | None] = Field(
        min_length=1, max_length=64
    )
    metadata: dict[Annotated[str, Field(max_length=64)], Annotated[str, Field(max_length=256)]] = Field(
        default_factory=dict, max_length=16
    )

    @field_validator("period")
    @classmethod
    def _real_period(cls, value: str) -> str:
        parse_period(value)
        return value


class QuantitySummary(_Message):
    mean: float
    quantiles: dict[str, float]


class SourcePosition(_Message):
    topic: str
    partition: int
    offset: int


class Exceedance(_Message):
    """One alert rule's look ahead from the current cloud."""

    series: str
    threshold: float
    horizon_days: int
    probability: float = Field(description="P(reported count > threshold on at least one of the next horizon_days days)")
    expected_first_day: float | None = Field(
        description="mean first day of exceedance (1 = tomorrow) among the simulated futures that exceed; null if none do"
    )


class EstimateMessage(_Message):
    """What a stream's cloud believes after assimilating one period."""

    id: str
    stream: StreamId
    period: Period
    day: int = Field(description="model day index of the period (day 0 is the stream's start)")
    step: int
    model: str
    model_fingerprint: str
    particles: int
    ess: float
    resampled: bool
    collapsed: bool
    log_evidence_increment: float | None
    quantities: dict[str, QuantitySummary]
    exceedance: dict[str, Exceedance] = Field(default_factory=dict, description="per alert rule name")
    growth_probability: float | None = Field(
        default=None,
        description="P(latent new infections over days 8-14 ahead exceed those over days 1-7 ahead)",
    )
    forecast: dict[str, Any] | None = Field(
        default=None,
        description="per series and latent quantity: mean and quantiles per day ahead, weekly totals, peak timing and size",
    )
    source: SourcePosition
    caution: str = (
        "Model-based estimate with stated uncertainty; decision support only. "
        "Local public-health judgement and reporting rules prevail."
    )


class AlertMessage(_Message):
    """A change in an exceedance alert: raised, updated or cleared."""

    id: str = Field(description="stable for the life of one alert episode")
    event_id: str = Field(description="unique per message; deterministic from stream, rule, period, step")
    stream: StreamId
    rule: str
    status: Literal["raised", "updated", "cleared"]
    period: Period
    step: int
    series: str
    threshold: float
    horizon_days: int
    probability: float
    raise_level: float
    clear_level: float
    latest_mean: float | None = Field(description="posterior mean of the series' latest expected count")


class DeadLetter(_Message):
    """An input record that was not applied, with why, and its original bytes."""

    reason: Literal[
        "malformed_json",
        "schema",
        "oversized",
        "unknown_stream",
        "unknown_series",
        "bad_count",
        "late",
        "future",
        "bad_period",
    ]
    message: str
    stream: str | None = None
    source: SourcePosition
    original_base64: str


MESSAGE_MODELS: dict[str, type[BaseModel]] = {
    "observation": ObservationMessage,
    "estimate": EstimateMessage,
    "alert": AlertMessage,
    "dead_letter": DeadLetter,
}


def json_schema(name: str) -> dict[str, Any]:
    """The JSON Schema of message ``name`` (validation mode)."""
    schema = MESSAGE_MODELS[name].model_json_schema(mode="validation")
    schema["$id"] = f"https://schemas.casecloud.invalid/{name}.v1.json"
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    return schema
