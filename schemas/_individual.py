"""Individual-based models: a synthetic population and the disease spread through it.

Two documents, both TOML, both validated here with errors that name the file,
line and field (see ``schemas/POPULATION.md`` for the guide):

- a *population* (:class:`PopulationSpec`): size, age bands with shares,
  household sizes, and settings (schools, workplaces, ...) with their size
  distributions and who belongs to them by age band, plus the seed the town is
  drawn from;
- an *individual-based model* (:class:`IndividualModelSpec`, top-level
  ``kind = "individual"``): the population (inline as ``[population]`` or a
  file named by ``population = "town.toml"``, relative to the model file),
  transmission rates per setting, importation, the disease's latent and
  infectious periods per person, the initial state, parameters (the same
  ``[parameters.*]`` tables as compartmental specs: fixed, static with a prior,
  or drifting) and the observed ``[[series]]`` (the same tables as
  compartmental specs, counting individual events by age band).

:func:`load_spec` reads either family from one path: a file whose top-level
``kind`` is ``"individual"`` is an individual-based model, one without ``kind``
(or with ``kind = "compartmental"``) a compartmental spec.
"""

from __future__ import annotations

import hashlib
import math
import tomllib
from pathlib import Path
from typing import Annotated, Any, Literal, Union

import orjson
from pydantic import Field, ValidationError, model_validator
from pydantic_core import InitErrorDetails, PydanticCustomError

from ._errors import SpecError
from ._loading import _line_of, load_toml_model, validate_document
from ._model_spec import Identifier, ModelSpec, Parameter, Quantity, Series, _Strict, load_model_spec

__all__ = [
    "AgeBand",
    "DiscreteSize",
    "GammaSize",
    "Households",
    "Setting",
    "PopulationSpec",
    "GammaPeriod",
    "GeometricPeriod",
    "DiscretePeriod",
    "Disease",
    "IndividualTransmission",
    "IndividualInitial",
    "IndividualModelSpec",
    "EVENTS",
    "MAX_LATENT_DAYS",
    "MAX_INFECTIOUS_DAYS",
    "load_population_spec",
    "load_individual_spec",
    "load_spec",
    "spec_kind",
    "EXAMPLE_INDIVIDUAL_MODELS",
    "example_individual_path",
    "load_named_spec",
]

# Events a series of an individual-based model can count (per age band, per day).
EVENTS = ("infection", "onset", "infectious", "recovery")
# The person's disease state is one byte (see filters/_individual.py): latent
# periods up to 127 days and infectious periods up to 63 days fit in it.
MAX_LATENT_DAYS = 127
MAX_INFECTIOUS_DAYS = 63
MAX_PEOPLE = 5_000_000
RESERVED_SETTINGS = frozenset({"household", "community", "imported"})


def _problem(problems: list[InitErrorDetails], loc: tuple, message: str, given: object = None) -> None:
    problems.append(
        InitErrorDetails(
            type=PydanticCustomError("cross_reference", "{problem}", {"problem": message}),
            loc=loc,
            input=given,
        )
    )


# ----------------------------------------------------------------- population
class DiscreteSize(_Strict):
    """Sizes ``values`` with relative ``weights`` (normalised here)."""

    dist: Literal["discrete"]
    values: list[Annotated[int, Field(ge=1, le=100_000)]] = Field(min_length=1, max_length=1000)
    weights: list[Annotated[float, Field(ge=0)]] = Field(min_length=1, max_length=1000)

    @model_validator(mode="after")
    def _consistent(self) -> "DiscreteSize":
        if len(self.values) != len(self.weights):
            raise ValueError(f"values has {len(self.values)} entries but weights has {len(self.weights)}; give one weight per value")
        if len(set(self.values)) != len(self.values):
            raise ValueError(f"values must not repeat, got {self.values}")
        if not sum(self.weights) > 0:
            raise ValueError("weights must not all be zero")
        return self


class GammaSize(_Strict):
    """A gamma distribution with ``mean`` and ``sd``, rounded to whole sizes and
    kept within ``[min, max]`` (renormalised); ``max`` defaults to mean + 10 sd."""

    dist: Literal["gamma"]
    mean: float = Field(gt=0, le=100_000)
    sd: float = Field(gt=0, le=100_000)
    min: int = Field(default=1, ge=1, le=100_000)
    max: int | None = Field(default=None, ge=1, le=100_000)

    @model_validator(mode="after")
    def _range(self) -> "GammaSize":
        if self.max is not None and self.max < self.min:
            raise ValueError(f"max ({self.max}) must be at least min ({self.min})")
        return self

    @property
    def upper(self) -> int:
        return self.max if self.max is not None else min(100_000, max(self.min, math.ceil(self.mean + 10 * self.sd)))


SizeDistribution = Annotated[Union[DiscreteSize, GammaSize], Field(discriminator="dist")]
Size = Union[Annotated[int, Field(ge=1, le=100_000)], SizeDistribution]


class AgeBand(_Strict):
    name: Identifier
    share: float = Field(gt=0, le=1, description="share of the population in this band")


class Households(_Strict):
    size: Size = Field(description="household size: a whole number or a distribution")
    head_bands: list[Identifier] | None = Field(
        default=None,
        description="bands the first member of every household is drawn from (e.g. adults); default: any band",
    )


class Setting(_Strict):
    """A kind of place people gather in (schools, workplaces): members by age
    band, split into places whose sizes are drawn from ``size``."""

    name: Identifier
    size: Size
    members: dict[Identifier, Annotated[float, Field(ge=0, le=1)]] = Field(
        min_length=1, description="probability that a person of each band belongs to one of these places"
    )
    keep_households_together: bool = Field(
        default=False, description="members of one household who belong go to the same place where sizes allow"
    )


class PopulationSpec(_Strict):
    """A synthetic town, drawn reproducibly from ``seed``."""

    name: Identifier
    description: str = ""
    seed: int = Field(ge=0, le=2**63 - 1)
    size: int = Field(ge=1, le=MAX_PEOPLE)
    bands: list[AgeBand] = Field(min_length=1, max_length=16)
    households: Households
    settings: list[Setting] = Field(default_factory=list, max_length=8)

    @model_validator(mode="after")
    def _cross_references(self) -> "PopulationSpec":
        problems: list[InitErrorDetails] = []
        names = [b.name for b in self.bands]
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            _problem(problems, ("bands",), f"band names must be unique, repeated: {repeated}", repeated)
        total = sum(b.share for b in self.bands)
        if abs(total - 1.0) > 1e-6:
            _problem(problems, ("bands",), f"band shares must add up to 1, they add up to {total:.6g}", [b.share for b in self.bands])
        for band in self.households.head_bands or []:
            if band not in names:
                _problem(problems, ("households", "head_bands"), f"{band!r} is not a band; allowed: {names}", band)
        settings = [s.name for s in self.settings]
        repeated = sorted({n for n in settings if settings.count(n) > 1})
        if repeated:
            _problem(problems, ("settings",), f"setting names must be unique, repeated: {repeated}", repeated)
        for i, s in enumerate(self.settings):
            if s.name in RESERVED_SETTINGS:
                _problem(problems, ("settings", i, "name"), f"{s.name!r} is built in; choose another name (reserved: {sorted(RESERVED_SETTINGS)})", s.name)
            for band in s.members:
                if band not in names:
                    _problem(problems, ("settings", i, "members", band), f"setting {s.name!r}: {band!r} is not a band; allowed: {names}", band)
        if problems:
            raise ValidationError.from_exception_data(type(self).__name__, problems)
        return self

    @property
    def band_names(self) -> list[str]:
        return [b.name for b in self.bands]

    def fingerprint(self) -> str:
        data = self.model_dump(mode="json", exclude={"description"})
        return hashlib.sha256(orjson.dumps(data, option=orjson.OPT_SORT_KEYS)).hexdigest()[:16]


# ------------------------------------------------------------------- disease
class GammaPeriod(_Strict):
    """A gamma-distributed period rounded to whole days (mass on [d - 0.5, d + 0.5)),
    kept within the stage's shortest period and ``max_days`` and renormalised."""

    dist: Literal["gamma"]
    mean: float = Field(gt=0, le=MAX_LATENT_DAYS)
    sd: float = Field(gt=0, le=MAX_LATENT_DAYS)
    max_days: int = Field(ge=0, le=MAX_LATENT_DAYS)


class GeometricPeriod(_Strict):
    """Each day the stage ends with probability 1 - exp(-rate) (a constant daily
    hazard, as a compartmental model with one sub-step a day), truncated at ``max_days``."""

    dist: Literal["geometric"]
    rate: float = Field(gt=0, le=50)
    max_days: int = Field(ge=1, le=MAX_LATENT_DAYS)


class DiscretePeriod(_Strict):
    """Whole ``days`` with relative ``weights``; ``days = [1]`` is a constant period of one day."""

    dist: Literal["discrete"]
    days: list[Annotated[int, Field(ge=0, le=MAX_LATENT_DAYS)]] = Field(min_length=1, max_length=128)
    weights: list[Annotated[float, Field(ge=0)]] = Field(min_length=1, max_length=128)

    @model_validator(mode="after")
    def _consistent(self) -> "DiscretePeriod":
        if len(self.days) != len(self.weights):
            raise ValueError(f"days has {len(self.days)} entries but weights has {len(self.weights)}; give one weight per day")
        if len(set(self.days)) != len(self.days):
            raise ValueError(f"days must not repeat, got {self.days}")
        if not sum(self.weights) > 0:
            raise ValueError("weights must not all be zero")
        return self


Period = Annotated[Union[GammaPeriod, GeometricPeriod, DiscretePeriod], Field(discriminator="dist")]


def _period_range(period: Any) -> tuple[int, int]:
    if isinstance(period, DiscretePeriod):
        used = [d for d, w in zip(period.days, period.weights) if w > 0]
        return min(used), max(used)
    return 0, period.max_days


class Disease(_Strict):
    """Each infected person's history: ``latent`` days (not yet infectious; 0
    allowed), then ``infectious`` days (at least 1), then recovered and immune.
    A share ``asymptomatic`` of infections (a number, or one per band) never has
    a symptom onset and transmits at ``asymptomatic_infectiousness`` times the
    rate of a symptomatic case."""

    latent: Period
    infectious: Period
    asymptomatic: float | dict[Identifier, Annotated[float, Field(ge=0, le=1)]] = Field(default=0.0)
    asymptomatic_infectiousness: float = Field(default=1.0, ge=0, le=1)

    @model_validator(mode="after")
    def _ranges(self) -> "Disease":
        low, high = _period_range(self.latent)
        if high > MAX_LATENT_DAYS:
            raise ValueError(f"latent periods can last at most {MAX_LATENT_DAYS} days, given up to {high}")
        low, high = _period_range(self.infectious)
        if low < 1 and isinstance(self.infectious, DiscretePeriod):
            raise ValueError(f"infectious periods last at least 1 day, given days down to {low}")
        if high > MAX_INFECTIOUS_DAYS or high < 1:
            raise ValueError(f"infectious periods last 1 to {MAX_INFECTIOUS_DAYS} days, given up to {high}")
        if isinstance(self.asymptomatic, float) and not 0 <= self.asymptomatic <= 1:
            raise ValueError(f"asymptomatic must be a share in [0, 1], got {self.asymptomatic}")
        return self


# ------------------------------------------------------------------ the model
Rate = Union[Annotated[float, Field(ge=0)], Identifier]


class IndividualTransmission(_Strict):
    """Daily transmission rates (numbers >= 0 or parameter names).

    ``household`` and each of ``settings``: a case's infectious contacts per day
    in that place, shared evenly among the other members (frequency-dependent:
    each other member is infected at rate beta / (members - 1)). ``community``:
    a case's infectious contacts per day with the whole town (or by band with
    ``community_contact``). ``importation``: expected infections per day from
    outside the town while everyone is susceptible.
    """

    household: Rate = 0.0
    community: Rate = 0.0
    importation: Rate = 0.0
    settings: dict[Identifier, Rate] = Field(default_factory=dict)
    community_contact: list[list[Annotated[float, Field(ge=0)]]] | None = Field(
        default=None,
        description="bands x bands: rows the band being infected, columns the infecting band; "
        "default: homogeneous mixing of the whole town",
    )


class IndividualInitial(_Strict):
    """Day 0: whole numbers of people ``exposed`` (at the start of their latent
    period) and ``infectious`` (at the start of their infectious period), chosen
    at random, and a ``recovered`` share (each person immune with that probability).
    Numbers or prior distributions, drawn per particle."""

    exposed: Quantity = 0.0
    infectious: Quantity = 0.0
    recovered: Quantity = 0.0


class IndividualModelSpec(_Strict):
    """An individual-based model (``kind = "individual"``); cross-references are checked here."""

    kind: Literal["individual"]
    name: Identifier
    description: str = ""
    population: PopulationSpec
    transmission: IndividualTransmission = Field(default_factory=IndividualTransmission)
    disease: Disease
    parameters: dict[Identifier, Parameter] = Field(default_factory=dict)
    initial: IndividualInitial = Field(default_factory=IndividualInitial)
    series: list[Series] = Field(min_length=1, max_length=64)
    window_days: int | None = Field(default=None, ge=0, le=120)

    @model_validator(mode="after")
    def _cross_references(self) -> "IndividualModelSpec":
        problems: list[InitErrorDetails] = []
        bands = self.population.band_names
        params = sorted(self.parameters)

        def ref(value: object, loc: tuple, what: str) -> None:
            if isinstance(value, str) and value not in self.parameters:
                _problem(problems, loc, f"{what} = {value!r} is not a parameter; allowed: {params}", value)

        tr = self.transmission
        for key in ("household", "community", "importation"):
            ref(getattr(tr, key), ("transmission", key), f"transmission.{key}")
        settings = [s.name for s in self.population.settings]
        for name, value in tr.settings.items():
            if name not in settings:
                _problem(problems, ("transmission", "settings", name), f"{name!r} is not a setting of population {self.population.name!r}; allowed: {settings}", name)
            ref(value, ("transmission", "settings", name), f"transmission.settings.{name}")
        contact = tr.community_contact
        b = len(bands)
        if contact is not None and (len(contact) != b or any(len(row) != b for row in contact)):
            _problem(problems, ("transmission", "community_contact"), f"must be {b}x{b} (one row and column per band {bands})", contact)
        if isinstance(self.disease.asymptomatic, dict):
            for band in self.disease.asymptomatic:
                if band not in bands:
                    _problem(problems, ("disease", "asymptomatic", band), f"{band!r} is not a band; allowed: {bands}", band)
        names = [s.name for s in self.series]
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            _problem(problems, ("series",), f"series names must be unique, repeated: {repeated}", repeated)
        for i, s in enumerate(self.series):
            if s.kind not in ("incidence", "concentration"):
                _problem(
                    problems, ("series", i, "kind"),
                    f"series {s.name!r}: an individual-based model observes counts of events (kind = \"incidence\") "
                    f"or what its infections shed (kind = \"concentration\"), given {s.kind!r}", s.kind,
                )
                continue
            if s.flow not in EVENTS:
                _problem(problems, ("series", i, "flow"), f"series {s.name!r}: event {s.flow!r} unknown; allowed: {list(EVENTS)}", s.flow)
            for band in s.groups or []:
                if band not in bands:
                    _problem(problems, ("series", i, "groups"), f"series {s.name!r}: {band!r} is not a band; allowed: {bands}", band)
            refs = [(s.reporting, ("series", i, "reporting"), "reporting"), (s.noise.dispersion, ("series", i, "noise", "dispersion"), "dispersion")]
            if s.reporting_delay is not None:
                refs += [
                    (s.reporting_delay.mean, ("series", i, "reporting_delay", "mean"), "reporting_delay.mean"),
                    (s.reporting_delay.sd, ("series", i, "reporting_delay", "sd"), "reporting_delay.sd"),
                ]
            for value, loc, what in refs:
                ref(value, loc, f"series {s.name!r}: {what}")
        for name, p in self.parameters.items():
            if p.transform == "logit" and not all(abs(v) < float("inf") for v in p.bounds):
                _problem(problems, ("parameters", name, "scale"), f"parameter {name!r}: logit scale needs a bounded prior (uniform or beta)", p.scale)
        if problems:
            raise ValidationError.from_exception_data(type(self).__name__, problems)
        return self

    @property
    def band_names(self) -> list[str]:
        return self.population.band_names

    def fingerprint(self) -> str:
        """Stable hash of everything that changes what a particle means (the population included)."""
        data = self.model_dump(mode="json", by_alias=True, exclude={"description": True, "population": {"description"}})
        return hashlib.sha256(orjson.dumps(data, option=orjson.OPT_SORT_KEYS)).hexdigest()[:16]


# ---------------------------------------------------------------------- loading
def load_population_spec(path: str | Path) -> PopulationSpec:
    """Read and validate a population TOML file (raises SpecError naming file, line, field)."""
    return load_toml_model(PopulationSpec, path)


def _read(path: Path) -> tuple[str, dict[str, Any]]:
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise SpecError(f"{path}: cannot read file: {exc.strerror}") from None
    try:
        return text, tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"{path}: not valid TOML: {exc}") from None


def load_individual_spec(path: str | Path) -> IndividualModelSpec:
    """Read and validate an individual-based model; a ``population`` given as a
    path is read relative to the model file (its errors name that file)."""
    path = Path(path)
    text, data = _read(path)
    population = data.get("population")
    if isinstance(population, str):
        target = path.parent / population
        if not target.is_file():
            line = _line_of(text, ("population",))
            where = f"{path}:{line}" if line is not None else str(path)
            message = f"{where}: field population: file {population!r} not found (looked for {target})"
            raise SpecError(message, [message])
        data["population"] = load_population_spec(target)
    return validate_document(IndividualModelSpec, data, str(path), text)


def spec_kind(path: str | Path) -> str:
    """``"individual"`` or ``"compartmental"``: the family a model file declares (top-level ``kind``)."""
    path = Path(path)
    _, data = _read(path)
    kind = data.get("kind", "compartmental")
    if kind not in ("individual", "compartmental"):
        line = _line_of(_read(path)[0], ("kind",))
        where = f"{path}:{line}" if line is not None else str(path)
        message = f"{where}: field kind: model family {kind!r} unknown; allowed: ['compartmental', 'individual']"
        raise SpecError(message, [message])
    return str(kind)


def load_spec(path: str | Path) -> ModelSpec | IndividualModelSpec:
    """A compartmental spec or an individual-based model, by the file's top-level ``kind``.

    ``kind = "compartmental"`` is the default and may be left out (the
    compartmental spec itself has no ``kind`` key; one given is checked and
    dropped, so it does not change the spec's fingerprint).
    """
    path = Path(path)
    if spec_kind(path) == "individual":
        return load_individual_spec(path)
    text, data = _read(path)
    if "kind" not in data:
        return load_model_spec(path)
    data.pop("kind")
    return validate_document(ModelSpec, data, str(path), text)


EXAMPLE_INDIVIDUAL_MODELS = ("pellingwold_flu",)


def example_individual_path(name: str) -> Path:
    """Path of a shipped individual-based example (``pellingwold_flu``), in ``schemas/models/individual/``."""
    if name not in EXAMPLE_INDIVIDUAL_MODELS:
        raise ValueError(f"no individual-based example {name!r}; allowed: {list(EXAMPLE_INDIVIDUAL_MODELS)}")
    return Path(__file__).with_name("models") / "individual" / f"{name}.toml"


def load_named_spec(ref: str | Path) -> ModelSpec | IndividualModelSpec:
    """The spec ``ref`` names, of either family: the path of a spec TOML (an existing
    file, or any name ending in ``.toml``), or the name of a shipped example.

    Raises SpecError naming what was given and what is allowed."""
    from ._model_spec import EXAMPLE_MODELS, example_model_path

    text = str(ref)
    if text.endswith(".toml") or Path(text).is_file():
        path = Path(text)
        if not path.is_file():
            message = f"model {text!r}: no such spec file; allowed: a spec TOML path, or a shipped example " \
                f"{[*EXAMPLE_MODELS, *EXAMPLE_INDIVIDUAL_MODELS]}"
            raise SpecError(message, [message])
        return load_spec(path)
    if text in EXAMPLE_INDIVIDUAL_MODELS:
        return load_spec(example_individual_path(text))
    if text in EXAMPLE_MODELS:
        return load_model_spec(example_model_path(text))
    message = (f"model {text!r} is neither a spec file nor a shipped example; allowed: a spec TOML path, "
               f"or one of {[*EXAMPLE_MODELS, *EXAMPLE_INDIVIDUAL_MODELS]}")
    raise SpecError(message, [message])
