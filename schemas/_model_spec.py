"""The compartmental-model spec: what an analyst writes in TOML.

A spec declares groups (age or risk bands) with populations, compartments,
flows between them with rate expressions, a contact matrix, parameters
(fixed, static with a prior, or drifting as a random walk), initial
conditions and the observed series. See ``schemas/models/*.toml``.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Annotated, Literal, Union

import orjson
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator
from pydantic_core import InitErrorDetails, PydanticCustomError

from ._loading import load_toml_model

__all__ = [
    "Uniform",
    "Normal",
    "LogNormal",
    "Gamma",
    "Beta",
    "Distribution",
    "Quantity",
    "Group",
    "Flow",
    "Transmission",
    "Parameter",
    "InitialValue",
    "Initial",
    "Delay",
    "Noise",
    "Positivity",
    "Shedding",
    "Series",
    "ModelSpec",
    "load_model_spec",
    "RESERVED_NAMES",
    "EXAMPLE_MODELS",
    "example_model_path",
]

Identifier = Annotated[str, Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]*$", max_length=64)]
RESERVED_NAMES = frozenset({"t", "N", "foi", "imported", "pi"})


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


class Uniform(_Strict):
    dist: Literal["uniform"]
    low: float
    high: float

    @model_validator(mode="after")
    def _order(self) -> "Uniform":
        if not self.low < self.high:
            raise ValueError(f"uniform needs low < high, got low={self.low}, high={self.high}")
        return self


class Normal(_Strict):
    dist: Literal["normal"]
    mean: float
    sd: float = Field(gt=0)


class LogNormal(_Strict):
    dist: Literal["lognormal"]
    mean_log: float
    sd_log: float = Field(gt=0)


class Gamma(_Strict):
    dist: Literal["gamma"]
    shape: float = Field(gt=0)
    scale: float = Field(gt=0)


class Beta(_Strict):
    dist: Literal["beta"]
    a: float = Field(gt=0)
    b: float = Field(gt=0)


Distribution = Annotated[Union[Uniform, Normal, LogNormal, Gamma, Beta], Field(discriminator="dist")]
Quantity = Union[float, Distribution]


class Group(_Strict):
    name: Identifier
    population: int = Field(gt=0, le=10_000_000_000)
    values: dict[Identifier, float] = Field(default_factory=dict)


class Flow(_Strict):
    name: Identifier
    source: Identifier = Field(alias="from")
    target: Identifier = Field(alias="to")
    rate: str = Field(min_length=1, max_length=2000)
    infection: bool = False


class Transmission(_Strict):
    infectious: dict[Identifier, float] = Field(default_factory=dict)
    importation: str | None = None
    contact: list[list[Annotated[float, Field(ge=0)]]] | None = None


class Parameter(_Strict):
    kind: Literal["fixed", "static", "drifting"]
    value: float | None = None
    prior: Distribution | None = None
    scale: Literal["identity", "log", "logit"] | None = None
    volatility: float = Field(default=0.0, ge=0)

    @model_validator(mode="after")
    def _consistent(self) -> "Parameter":
        if self.kind == "fixed":
            if self.value is None:
                raise ValueError("a fixed parameter needs 'value'")
            if self.prior is not None:
                raise ValueError("a fixed parameter takes 'value', not 'prior'")
        else:
            if self.prior is None:
                raise ValueError(f"a {self.kind} parameter needs a 'prior' table")
            if self.value is not None:
                raise ValueError(f"a {self.kind} parameter takes 'prior', not 'value'")
        if self.kind == "drifting" and self.volatility <= 0:
            raise ValueError("a drifting parameter needs volatility > 0 (random-walk sd per day)")
        if self.kind != "drifting" and self.volatility:
            raise ValueError("only drifting parameters take 'volatility'")
        return self

    @property
    def bounds(self) -> tuple[float, float]:
        """Support of the parameter on its natural scale."""
        prior = self.prior
        if isinstance(prior, Uniform):
            return (prior.low, prior.high)
        if isinstance(prior, Beta):
            return (0.0, 1.0)
        if isinstance(prior, (LogNormal, Gamma)):
            return (0.0, float("inf"))
        return (float("-inf"), float("inf"))

    @property
    def transform(self) -> str:
        """Scale on which drift and jitter act (explicit or implied by the prior)."""
        if self.scale is not None:
            return self.scale
        if isinstance(self.prior, (Uniform, Beta)):
            return "logit"
        if isinstance(self.prior, (LogNormal, Gamma)):
            return "log"
        return "identity"


class InitialValue(_Strict):
    compartment: Identifier
    group: Identifier | None = None
    count: Quantity | None = None
    fraction: Quantity | None = None

    @model_validator(mode="after")
    def _one(self) -> "InitialValue":
        if (self.count is None) == (self.fraction is None):
            raise ValueError("give exactly one of 'count' or 'fraction'")
        return self


class Initial(_Strict):
    remainder: Identifier
    set: list[InitialValue] = Field(default_factory=list)


class Delay(_Strict):
    dist: Literal["gamma", "lognormal"]
    mean: float = Field(gt=0, le=60)
    sd: float = Field(gt=0, le=60)
    max_days: int = Field(ge=1, le=60)


class ReportingDelay(_Strict):
    """Days from an event (onset, specimen) to its report, for event-dated series.

    ``mean`` and ``sd`` are numbers or parameter names, so the filter can learn
    the delay from the revisions as they arrive.
    """

    dist: Literal["gamma", "lognormal"]
    mean: float | Identifier
    sd: float | Identifier
    max_days: int = Field(ge=1, le=120)

    @model_validator(mode="after")
    def _positive(self) -> "ReportingDelay":
        for key in ("mean", "sd"):
            value = getattr(self, key)
            if isinstance(value, float) and not 0 < value <= 120:
                raise ValueError(f"reporting_delay {key} must be in (0, 120] days, got {value}")
        return self


class Noise(_Strict):
    dist: Literal["poisson", "negbin", "binomial", "betabinomial", "lognormal", "studentt"]
    dispersion: float | Identifier | None = None
    sd: float | Identifier | None = Field(
        default=None, description="lognormal / studentt (concentration series): spread of the log measurement"
    )
    df: float | None = Field(default=None, description="studentt: degrees of freedom (> 0; smaller, heavier tails)")

    @model_validator(mode="after")
    def _dispersion(self) -> "Noise":
        continuous = self.dist in ("lognormal", "studentt")
        if continuous and self.sd is None:
            raise ValueError(f"{self.dist} noise needs 'sd' (spread on the log scale, a number or parameter name)")
        if not continuous and self.sd is not None:
            raise ValueError(f"{self.dist} noise takes no 'sd' (it is for lognormal and studentt noise)")
        if isinstance(self.sd, float) and not 0 < self.sd < float("inf"):
            raise ValueError(f"sd must be finite and > 0, got {self.sd}")
        if (self.dist == "studentt") != (self.df is not None):
            raise ValueError("studentt noise needs 'df' (degrees of freedom), and only studentt noise takes it")
        if self.df is not None and not 0 < self.df < float("inf"):
            raise ValueError(f"df must be finite and > 0, got {self.df}")
        if self.dist == "negbin" and self.dispersion is None:
            raise ValueError("negbin noise needs 'dispersion' (size k, a number or parameter name)")
        if self.dist == "betabinomial" and self.dispersion is None:
            raise ValueError(
                "betabinomial noise needs 'dispersion' (concentration phi of the share positive, "
                "a number or parameter name; larger is closer to binomial)"
            )
        if self.dist not in ("negbin", "betabinomial") and self.dispersion is not None:
            raise ValueError(f"{self.dist} noise takes no 'dispersion'")
        if isinstance(self.dispersion, float) and self.dispersion <= 0:
            raise ValueError(f"dispersion must be > 0, got {self.dispersion}")
        return self


class Positivity(_Strict):
    """How the share of tests that come back positive follows prevalence.

    p = 1 - (1 - background) * exp(-enrichment * x), where x is the share of the
    series' groups in its compartment: ``background`` is the positivity when no
    one is infected (tests positive for other reasons), ``enrichment`` how much
    likelier infected people are to be among the tested (p ~ background +
    (1 - background) * enrichment * x while x is small). Numbers or parameter names.
    """

    background: float | Identifier
    enrichment: float | Identifier

    @model_validator(mode="after")
    def _ranges(self) -> "Positivity":
        if isinstance(self.background, float) and not 0 <= self.background < 1:
            raise ValueError(f"positivity background must be in [0, 1), got {self.background}")
        if isinstance(self.enrichment, float) and not 0 < self.enrichment < float("inf"):
            raise ValueError(f"positivity enrichment must be finite and > 0, got {self.enrichment}")
        return self


class Shedding(_Strict):
    """How much an infection sheds into wastewater on each day since infection: a gamma
    or log-normal profile discretised to days 0..max_days (as a ``delay``), whose
    ``mean`` and ``sd`` (days) are numbers or parameter names (estimated)."""

    dist: Literal["gamma", "lognormal"]
    mean: float | Identifier
    sd: float | Identifier
    max_days: int = Field(ge=1, le=60)

    @model_validator(mode="after")
    def _positive(self) -> "Shedding":
        for key in ("mean", "sd"):
            value = getattr(self, key)
            if isinstance(value, float) and not 0 < value <= 60:
                raise ValueError(f"shedding {key} must be in (0, 60] days, got {value}")
        return self


class Series(_Strict):
    name: Identifier
    kind: Literal["incidence", "prevalence", "positivity", "concentration"]
    flow: Identifier | None = None
    compartment: Identifier | None = None
    groups: list[Identifier] | None = None
    reporting: float | Identifier = 1.0
    delay: Delay | None = None
    noise: Noise
    cadence: Literal["daily", "weekly"] = "daily"
    dated_by: Literal["report", "event"] = Field(
        default="report",
        description="'report': a period's count is what was reported in it (final on arrival); "
        "'event': counted by event date (onset, specimen) and completed over time by reporting_delay",
    )
    reporting_delay: ReportingDelay | None = None
    positivity: Positivity | None = Field(
        default=None,
        description="kind = 'positivity' only: positives out of the tests the message carries, "
        "with a share positive that rises with the prevalence of 'compartment'",
    )

    shedding: Shedding | None = Field(
        default=None, description="kind = 'concentration' only: shedding-load profile over days since infection"
    )
    scale: float | Identifier | None = Field(
        default=None,
        description="kind = 'concentration' only: measurement units per shedding-weighted infection in the "
        "catchment (a number, or a static or drifting parameter)",
    )
    catchment: float | None = Field(
        default=None, description="kind = 'concentration' only: the site's share of the series' population, (0, 1]"
    )
    reference_flow: float | None = Field(
        default=None,
        description="kind = 'concentration' only: the flow (e.g. litres per day) 'scale' refers to; a sample's "
        "flow in the message then dilutes the expected value by reference_flow / flow",
    )

    @model_validator(mode="after")
    def _target(self) -> "Series":
        ww = {"shedding": self.shedding, "scale": self.scale, "catchment": self.catchment, "reference_flow": self.reference_flow}
        if self.kind == "concentration":
            if self.flow is None or self.compartment is not None or self.shedding is None or self.scale is None:
                raise ValueError("a concentration series names the infection 'flow' it sheds from, a 'shedding' profile and a 'scale'")
            if self.noise.dist not in ("lognormal", "studentt"):
                raise ValueError(f"a concentration series is continuous: noise lognormal or studentt, given {self.noise.dist!r}")
            if self.delay is not None or self.cadence != "daily" or self.dated_by != "report" or self.reporting != 1.0:
                raise ValueError("a concentration series is daily and dated by report: no 'delay' or 'reporting' (the shedding profile and 'scale' take their place)")
            if self.catchment is not None and not 0 < self.catchment <= 1:
                raise ValueError(f"catchment must be a share of the population in (0, 1], got {self.catchment}")
            if isinstance(self.scale, float) and not 0 < self.scale < float("inf"):
                raise ValueError(f"scale must be finite and > 0, got {self.scale}")
            if self.reference_flow is not None and not 0 < self.reference_flow < float("inf"):
                raise ValueError(f"reference_flow must be finite and > 0, got {self.reference_flow}")
            return self
        given = sorted(k for k, v in ww.items() if v is not None)
        if given:
            raise ValueError(f"{given} belong to series of kind = \"concentration\"")
        if self.noise.dist in ("lognormal", "studentt"):
            raise ValueError(f"{self.noise.dist} noise is for concentration series (counts take poisson, negbin or binomial)")
        if self.kind == "positivity":
            if self.compartment is None or self.flow is not None or self.positivity is None:
                raise ValueError("a positivity series names a 'compartment' (whose prevalence drives it) and a 'positivity' table")
            if self.noise.dist not in ("binomial", "betabinomial"):
                raise ValueError(f"a positivity series counts positives out of tests: noise binomial or betabinomial, given {self.noise.dist!r}")
            if self.delay is not None or self.cadence != "daily" or self.dated_by != "report" or self.reporting != 1.0:
                raise ValueError("a positivity series is a daily snapshot: no 'delay' or 'reporting', cadence 'daily', dated by report")
            return self
        if self.positivity is not None:
            raise ValueError("'positivity' belongs to series of kind = \"positivity\"")
        if self.noise.dist == "betabinomial":
            raise ValueError("betabinomial noise is for positivity series (positives out of tests)")
        if self.kind == "incidence" and (self.flow is None or self.compartment is not None):
            raise ValueError("an incidence series names a 'flow' (and no 'compartment')")
        if self.kind == "prevalence" and (self.compartment is None or self.flow is not None):
            raise ValueError("a prevalence series names a 'compartment' (and no 'flow')")
        if self.kind == "prevalence" and (self.delay is not None or self.cadence != "daily"):
            raise ValueError("a prevalence series is a daily snapshot: no 'delay', cadence 'daily'")
        if self.noise.dist == "binomial" and self.delay is not None:
            raise ValueError(
                "binomial noise needs whole-number trials, but a delay kernel makes expected "
                "counts fractional; use poisson or negbin noise with a delay"
            )
        if self.dated_by == "event":
            if self.kind != "incidence" or self.reporting_delay is None:
                raise ValueError("an event-dated series is an incidence series with a 'reporting_delay'")
            if self.noise.dist == "binomial":
                raise ValueError("an event-dated series is revised by increments: use poisson or negbin noise")
        elif self.reporting_delay is not None:
            raise ValueError("'reporting_delay' belongs to event-dated series (dated_by = \"event\")")
        if isinstance(self.reporting, float) and not 0 < self.reporting <= 1:
            raise ValueError(f"reporting fraction must be in (0, 1], got {self.reporting}")
        return self


class ModelSpec(_Strict):
    """A validated compartmental model; cross-references are checked here."""

    name: Identifier
    description: str = ""
    substeps_per_day: int = Field(default=4, ge=1, le=96)
    compartments: list[Identifier] = Field(min_length=1, max_length=32)
    groups: list[Group] = Field(min_length=1, max_length=32)
    flows: list[Flow] = Field(min_length=1, max_length=128)
    transmission: Transmission = Field(default_factory=Transmission)
    parameters: dict[Identifier, Parameter] = Field(default_factory=dict)
    derived: dict[Identifier, str] = Field(default_factory=dict)
    initial: Initial
    series: list[Series] = Field(min_length=1, max_length=64)
    window_days: int | None = Field(
        default=None,
        ge=0,
        le=120,
        description="how many days back a late or revised value is still assimilated; "
        "default: the longest delay of any series",
    )

    @model_validator(mode="after")
    def _cross_references(self) -> "ModelSpec":
        comps = set(self.compartments)
        groups = [g.name for g in self.groups]
        problems: list[InitErrorDetails] = []

        def problem(loc: tuple, message: str, given: object = None) -> None:
            problems.append(
                InitErrorDetails(
                    type=PydanticCustomError("cross_reference", "{problem}", {"problem": message}),
                    loc=loc,
                    input=given,
                )
            )

        def dupes(field: str, kind: str, names: list[str]) -> None:
            seen = sorted({n for n in names if names.count(n) > 1})
            if seen:
                problem((field,), f"{kind} names must be unique, repeated: {seen}", seen)

        dupes("compartments", "compartment", self.compartments)
        dupes("groups", "group", groups)
        dupes("flows", "flow", [f.name for f in self.flows])
        dupes("series", "series", [s.name for s in self.series])
        value_keys = {frozenset(g.values) for g in self.groups}
        if len(value_keys) > 1:
            problem(("groups",), "every group must define the same 'values' keys", sorted(map(sorted, value_keys)))
        all_names: list[str] = [
            *self.compartments,
            *self.parameters,
            *self.derived,
            *sorted(set().union(*(g.values for g in self.groups))),
        ]
        clash = sorted({n for n in all_names if all_names.count(n) > 1} | (set(all_names) & RESERVED_NAMES))
        if clash:
            problem(
                ("parameters",),
                f"names {clash} are used twice or are reserved; compartments, parameters, derived "
                f"quantities and group values share one namespace, and {sorted(RESERVED_NAMES)} are built in",
                clash,
            )
        for i, f in enumerate(self.flows):
            for end, c in (("from", f.source), ("to", f.target)):
                if c not in comps:
                    problem(("flows", i, end), f"flow {f.name!r}: {c!r} is not a compartment; allowed: {self.compartments}", c)
            if f.source == f.target:
                problem(("flows", i, "to"), f"flow {f.name!r} goes from {f.source!r} to itself", f.target)
        if not any(f.infection for f in self.flows) and self.transmission.infectious:
            problem(("transmission", "infectious"), "infectious compartments are set but no flow has infection = true")
        for c in self.transmission.infectious:
            if c not in comps:
                problem(("transmission", "infectious", c), f"{c!r} is not a compartment; allowed: {self.compartments}", c)
        g = len(self.groups)
        contact = self.transmission.contact
        if contact is None and g > 1:
            problem(("transmission", "contact"), f"a {g}x{g} contact matrix is required with {g} groups")
        if contact is not None and (len(contact) != g or any(len(row) != g for row in contact)):
            shape = f"{len(contact)}x" + "/".join(sorted({str(len(row)) for row in contact}) or ["0"])
            problem(("transmission", "contact"), f"must be {g}x{g} (one row and column per group), got {shape}", contact)
        for name, p in self.parameters.items():
            if p.transform == "logit" and not all(map(lambda b: abs(b) < float("inf"), p.bounds)):
                dist = p.prior.dist if p.prior is not None else "no prior"
                problem(("parameters", name, "scale"), f"parameter {name!r}: logit scale needs a bounded prior (uniform or beta), got {dist}", p.scale)
        if self.initial.remainder not in comps:
            problem(("initial", "remainder"), f"{self.initial.remainder!r} is not a compartment; allowed: {self.compartments}", self.initial.remainder)
        for i, v in enumerate(self.initial.set):
            if v.compartment not in comps:
                problem(("initial", "set", i, "compartment"), f"compartment {v.compartment!r} unknown; allowed: {self.compartments}", v.compartment)
            if v.compartment == self.initial.remainder:
                problem(("initial", "set", i, "compartment"), f"{v.compartment!r} is the remainder compartment; it takes what is left", v.compartment)
            if v.group is not None and v.group not in groups:
                problem(("initial", "set", i, "group"), f"group {v.group!r} unknown; allowed: {groups}", v.group)
        flows = {f.name for f in self.flows}
        for i, s in enumerate(self.series):
            if s.flow is not None and s.flow not in flows:
                problem(("series", i, "flow"), f"series {s.name!r}: flow {s.flow!r} unknown; allowed: {sorted(flows)}", s.flow)
            if s.compartment is not None and s.compartment not in comps:
                problem(("series", i, "compartment"), f"series {s.name!r}: compartment {s.compartment!r} unknown; allowed: {self.compartments}", s.compartment)
            for gname in s.groups or []:
                if gname not in groups:
                    problem(("series", i, "groups"), f"series {s.name!r}: group {gname!r} unknown; allowed: {groups}", gname)
            refs = [(s.reporting, "reporting"), (s.noise.dispersion, "dispersion")]
            if s.reporting_delay is not None:
                refs += [(s.reporting_delay.mean, "reporting_delay.mean"), (s.reporting_delay.sd, "reporting_delay.sd")]
            if s.positivity is not None:
                refs += [(s.positivity.background, "positivity.background"), (s.positivity.enrichment, "positivity.enrichment")]
            if s.shedding is not None:
                refs += [(s.shedding.mean, "shedding.mean"), (s.shedding.sd, "shedding.sd")]
            refs += [(s.scale, "scale"), (s.noise.sd, "noise.sd")]
            for ref, what in refs:
                if isinstance(ref, str) and ref not in self.parameters and ref not in self.derived:
                    loc = {"reporting": ("series", i, "reporting"), "dispersion": ("series", i, "noise", "dispersion")}.get(
                        what, ("series", i, *what.split(".")))
                    problem(loc, f"series {s.name!r}: {what} = {ref!r} is not a parameter; allowed: {sorted(self.parameters)}", ref)
        if problems:
            raise ValidationError.from_exception_data(type(self).__name__, problems)
        return self

    @property
    def group_names(self) -> list[str]:
        return [g.name for g in self.groups]

    def fingerprint(self) -> str:
        """Stable hash of everything that changes what a particle means."""
        data = self.model_dump(mode="json", by_alias=True, exclude={"description"})
        # Keys added later are left out at their defaults, so older specs keep their fingerprints.
        if data.get("window_days") is None:
            data.pop("window_days", None)
        for series in data["series"]:
            if series.get("dated_by") == "report" and series.get("reporting_delay") is None:
                series.pop("dated_by", None)
                series.pop("reporting_delay", None)
            for key in ("positivity", "shedding", "scale", "catchment", "reference_flow"):
                if series.get(key) is None:
                    series.pop(key, None)
            for key in ("sd", "df"):
                if series["noise"].get(key) is None:
                    series["noise"].pop(key, None)
        canonical = orjson.dumps(data, option=orjson.OPT_SORT_KEYS)
        return hashlib.sha256(canonical).hexdigest()[:16]


def load_model_spec(path: str | Path) -> ModelSpec:
    """Read and validate a model spec TOML file (raises SpecError)."""
    return load_toml_model(ModelSpec, path)


EXAMPLE_MODELS = ("sir", "seir", "seirs", "seir_two_band", "seir_two_band_lab", "seir_hospital",
                  "seir_two_band_signals")


def example_model_path(name: str) -> Path:
    """Path of a shipped example spec (``sir``, ``seir``, ``seirs``, ``seir_two_band``, ``seir_two_band_lab``,
    ``seir_hospital``, ``seir_two_band_signals``)."""
    if name not in EXAMPLE_MODELS:
        raise ValueError(f"no example model {name!r}; allowed: {list(EXAMPLE_MODELS)}")
    return Path(__file__).with_name("models") / f"{name}.toml"
