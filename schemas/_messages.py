"""Messages on the wire: observations in; estimates, alerts and dead letters out.

JSON Schema files for each are exported to ``schemas/json/`` (see
:func:`export_json_schemas`); a test keeps them in sync with these models.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, BeforeValidator, ConfigDict, Field, StrictInt, ValidationError, WithJsonSchema, field_validator, model_validator

__all__ = [
    "StreamId",
    "ObservationMessage",
    "Concentration",
    "QuantitySummary",
    "Exceedance",
    "EstimateMessage",
    "AlertMessage",
    "DeadLetter",
    "SourcePosition",
    "NowcastPeriod",
    "SeriesPredictive",
    "ForecastBlock",
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


Measurement = Annotated[float, Field(strict=True, allow_inf_nan=False)]


def _written_whole(value: Any) -> Any:
    """A JSON number with no fractional part (``21.0``, ``1e3``) as the whole number it writes:
    JSON Schema's ``integer`` admits it, and so does the published contract. Anything else
    (``21.5``, ``"21"``, ``true``, or a float too large to be exact, above 2^53) is left to the
    strict check, which refuses it."""
    if isinstance(value, float) and math.isfinite(value) and value.is_integer() and abs(value) <= 2.0**53:
        return int(value)
    return value


# A count or a number of tests: a whole number from 0 to MAX_COUNT.
WholeCount = Annotated[StrictInt, Field(ge=0, le=MAX_COUNT), BeforeValidator(_written_whole)]


class Concentration(_Message):
    """One sample of a concentration series (e.g. gene copies per litre of wastewater).

    ``value`` null means "not detected": the lab's ``lod`` is then required and only
    "below the limit" is known; a value below ``lod`` is read the same way. A value of
    0 is never taken as a measurement (it needs ``lod`` too). ``flow`` is the sample's
    flow (e.g. litres per day), used by series with a ``reference_flow``.
    """

    value: Annotated[Measurement, Field(ge=0)] | None = Field(description="the measured concentration; null: not detected")
    lod: Annotated[Measurement, Field(gt=0)] | None = Field(default=None, description="the laboratory's limit of detection")
    flow: Annotated[Measurement, Field(gt=0)] | None = Field(default=None, description="the sample's flow")

    @model_validator(mode="after")
    def _detected(self) -> "Concentration":
        if (self.value is None or self.value == 0) and self.lod is None:
            raise ValueError(
                f"value {self.value!r} without 'lod': a sample that is not detected (null or 0) needs the lab's "
                "limit of detection, since only 'below the limit' is known"
            )
        return self


class ObservationMessage(_Message):
    """Aggregated counts for one stream and one period.

    ``counts`` maps series name to a whole-number count, or ``null`` when the
    series was not reported this period (it is then skipped, not taken as 0).
    Only aggregated counts: never line-level or personal data.
    """

    stream: StreamId
    period: Period = Field(description="a day YYYY-MM-DD, or an ISO week YYYY-Www for weekly streams")
    counts: dict[SeriesName, WholeCount | None] = Field(
        max_length=64, description="count series: whole numbers (at least 1 entry here or in 'concentrations')"
    )
    concentrations: dict[SeriesName, Concentration | None] | None = Field(
        default=None,
        max_length=64,
        description="concentration series (e.g. wastewater): one sample each, {value, lod, flow}; null: not reported",
    )
    tests: dict[SeriesName, WholeCount | None] | None = Field(
        default=None,
        max_length=64,
        description="for positivity series only: the number of tests behind each series' positives in 'counts' "
        "(a whole number of at least 1; null: not reported, with a null count)",
    )
    as_of: Annotated[str, Field(pattern=r"^\d{4}-\d{2}-\d{2}$")] | None = Field(
        default=None,
        description="the date the counts are known as of (a data vintage); absent means final. "
        "Event-dated series are revised upward as reports arrive; each later, higher total adds its increment",
    )
    metadata: dict[Annotated[str, Field(max_length=64)], Annotated[str, Field(max_length=256)]] = Field(
        default_factory=dict, max_length=16
    )

    @model_validator(mode="after")
    def _some_series(self) -> "ObservationMessage":
        concentrations = self.concentrations or {}
        if not self.counts and not concentrations:
            raise ValueError("counts: at least 1 series is needed, in 'counts' or 'concentrations' (given none)")
        both = sorted(set(self.counts) & set(concentrations))
        if both:
            raise ValueError(f"series {both} are given both in 'counts' and in 'concentrations'; a series is one or the other")
        return self

    def values(self) -> dict[str, float | None]:
        """Every series value of the message: counts, and concentrations (a sample not detected
        as 0.0: below its limit); None: not reported."""
        out: dict[str, float | None] = dict(self.counts)
        for name, c in (self.concentrations or {}).items():
            out[name] = None if c is None else (0.0 if c.value is None else c.value)
        return out

    @field_validator("period")
    @classmethod
    def _real_period(cls, value: str) -> str:
        parse_period(value)
        return value

    @field_validator("as_of")
    @classmethod
    def _real_date(cls, value: str | None) -> str | None:
        if value is not None:
            try:
                dt.date.fromisoformat(value)
            except ValueError:
                raise ValueError(f"as_of {value!r} is not a calendar date YYYY-MM-DD") from None
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


class NowcastPeriod(_Message):
    """One recent period of an event-dated series: reported so far against the eventual count."""

    period: Period
    reported: int = Field(description="total reported so far")
    as_of: str | None = Field(description="date the reported total is known as of (null: final)")
    eventual: QuantitySummary = Field(description="posterior predictive of the eventual complete count")
    share_pending: float = Field(description="expected share of the eventual count not yet reported")


class SeriesPredictive(_Message):
    """One value an estimate assimilated, against what the cloud expected of it just before
    (the one-step-ahead predictive: the cloud moved to the value's day, before the value
    re-weighted it; Dawid 1984, the prequential check)."""

    period: Period
    as_of: str | None = Field(default=None, description="the value's vintage (event-dated series); null: final")
    observed: float | None = Field(
        description="the value assimilated: a count or total, positives, or a concentration; null: a sample below its limit of detection"
    )
    tests: int | None = Field(default=None, description="positivity series: the tests behind the positives")
    lod: float | None = Field(default=None, description="concentration series: the sample's limit of detection, if given")
    flow: float | None = Field(default=None, description="concentration series: the sample's flow, if given (the predictive is at it)")
    mean: float | None = Field(description="predictive mean (null where it is infinite: Student-t noise on the log scale)")
    quantiles: dict[str, float] = Field(description="predictive quantiles of the value, at the summary levels")
    pit: float | None = Field(
        description="predictive probability below the observed value (counts: P(Y < y) + P(Y = y) / 2; "
        "below the limit: half the probability of falling below it); near 0 or 1: a surprise"
    )
    p_below_lod: float | None = Field(default=None, description="concentration series with a limit: predictive probability below it")


# ----------------------------------------------------------------------------- forecast block
Number = Annotated[float | None, WithJsonSchema({"type": ["number", "null"]})]  # rounded; null where not finite


class ForecastSummary(_Message):
    """Per day ahead: the mean and one row of quantiles per level (each row ``horizon`` long)."""

    mean: list[Number]
    quantiles: list[list[Number]] = Field(description="one row per entry of the block's levels")


class WeeklyForecast(_Message):
    """Totals of the weekly blocks a weekly-cadence series reports (``ends``: model days)."""

    ends: list[int]
    mean: list[Number]
    quantiles: list[list[Number]] = Field(description="one row per entry of the block's levels")


class ScalarSummary(_Message):
    mean: Number
    quantiles: list[Number] = Field(description="one value per entry of the block's peak_levels")


class PeakForecast(_Message):
    """Timing (day ahead) and size of the peak over the horizon."""

    day: ScalarSummary
    size: ScalarSummary
    p_at_horizon: Number = Field(description="share of trajectories still rising at the horizon (peak on its last day)")


class SeriesForecast(_Message):
    mean: list[Number]
    quantiles: list[list[Number]] = Field(description="one row per entry of the block's levels")
    weekly: WeeklyForecast | None = Field(default=None, description="weekly-cadence series only")
    peak: PeakForecast


class LatentForecast(_Message):
    mean: list[Number]
    quantiles: list[list[Number]] = Field(description="one row per entry of the block's levels")
    peak: PeakForecast | None = Field(default=None, description="latent infections only")


class ForecastBlock(_Message):
    """The ``forecast`` block of an estimate: simulated futures of the current cloud, summarised
    (``filters.Forecast.to_message_block``). Days ahead run 1..horizon."""

    start: int = Field(description="model day of the forecast origin")
    horizon: int = Field(ge=1)
    n_trajectories: int = Field(ge=1)
    levels: list[Annotated[float, Field(gt=0, lt=1)]] = Field(min_length=1)
    peak_levels: list[Annotated[float, Field(gt=0, lt=1)]] = Field(min_length=1)
    series: dict[str, SeriesForecast] = Field(description="per reported series, with observation noise")
    latent: dict[str, LatentForecast] = Field(description="infections, susceptibles, R_eff")
    growth_probability: Number = Field(
        default=None, description="P(latent infections over days 8-14 ahead exceed those over days 1-7); horizons of 14+ days"
    )

    @model_validator(mode="after")
    def _shapes(self) -> "ForecastBlock":
        where = []
        tables = [(f"series.{k}", v) for k, v in self.series.items()]
        tables += [(f"series.{k}.weekly", v.weekly) for k, v in self.series.items() if v.weekly is not None]
        tables += [(f"latent.{k}", v) for k, v in self.latent.items()]
        for name, t in tables:
            length = len(t.ends) if isinstance(t, WeeklyForecast) else self.horizon
            if len(t.mean) != length or len(t.quantiles) != len(self.levels) or any(len(r) != length for r in t.quantiles):
                where.append(f"{name}: mean and every quantile row must have {length} values and there must be "
                             f"{len(self.levels)} rows (one per level)")
        peaks = [(f"series.{k}.peak", v.peak) for k, v in self.series.items()]
        peaks += [(f"latent.{k}.peak", v.peak) for k, v in self.latent.items() if v.peak is not None]
        for name, pk in peaks:
            if len(pk.day.quantiles) != len(self.peak_levels) or len(pk.size.quantiles) != len(self.peak_levels):
                where.append(f"{name}: {len(self.peak_levels)} quantiles (one per peak level) expected")
        if where:
            raise ValueError("forecast block shapes do not match: " + "; ".join(where))
        return self


def _forecast_block(value: dict[str, Any] | None) -> dict[str, Any] | None:
    """Validate a forecast block against :class:`ForecastBlock`; keep the dict as given, so the
    published bytes are exactly what the forecast produced."""
    if value is not None:
        try:
            ForecastBlock.model_validate(value)
        except ValidationError as exc:
            raise ValueError(f"invalid forecast block: {exc}") from None
    return value


def _inlined(schema: dict[str, Any]) -> dict[str, Any]:
    """A model's JSON Schema with its ``$defs`` substituted in place (the models are not recursive)."""
    defs = schema.pop("$defs", {})

    def walk(node: Any) -> Any:
        if isinstance(node, dict):
            if "$ref" in node:
                return walk(dict(defs[node["$ref"].rsplit("/", 1)[-1]]))
            return {k: walk(v) for k, v in node.items()}
        if isinstance(node, list):
            return [walk(v) for v in node]
        return node

    return walk(schema)


ForecastBlockDict = Annotated[
    dict[str, Any],
    AfterValidator(_forecast_block),
    WithJsonSchema(_inlined(ForecastBlock.model_json_schema(mode="validation"))),
]


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
    cloud_day: int | None = Field(
        default=None, description="model day the cloud stands at (the latest period any series has reached)"
    )
    distinct_paths: int | None = Field(
        default=None,
        description="distinct particle ancestors at the oldest day of the assimilation window (path degeneracy)",
    )
    quantities: dict[str, QuantitySummary]
    exceedance: dict[str, Exceedance] = Field(default_factory=dict, description="per alert rule name")
    growth_probability: float | None = Field(
        default=None,
        description="P(latent new infections over days 8-14 ahead exceed those over days 1-7 ahead)",
    )
    forecast: ForecastBlockDict | None = Field(
        default=None,
        description="per series and latent quantity: mean and quantiles per day ahead, weekly totals, peak timing and size",
    )
    nowcast: dict[str, list[NowcastPeriod]] | None = Field(
        default=None,
        description="per event-dated series: recent periods with what is reported so far and the eventual count expected",
    )
    predictive: dict[str, SeriesPredictive] | None = Field(
        default=None,
        description="per series assimilated in this step: the value against its one-step-ahead predictive "
        "(absent in estimates of older versions and of models without a predictive law)",
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
    cloud_day: int | None = Field(
        default=None,
        description="model day the cloud stood at when the alert changed (a late or revised value can raise an "
        "alert while naming an older period)",
    )
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
        "bad_as_of",
        "cadence",
        "duplicate_series",
        "lower_total",
        "not_revisable",
        "conflicting_vintage",
        "bad_tests",
        "bad_concentration",
        "series_kind",
        "needs_recovery",
        "model_error",
        "internal_error",
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
