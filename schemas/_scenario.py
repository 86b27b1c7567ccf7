"""Intervention scenarios: what an analyst writes in TOML to ask "what if".

A scenario file holds one scenario (top-level ``name`` and ``[[interventions]]``)
or several (``[[scenarios]]``, each with a ``name`` and its own
``[[scenarios.interventions]]``). Every run also includes the implicit
``baseline`` scenario: no change. Examples ship in ``schemas/scenarios/``.

Interventions (``kind``):

``rate``
    Multiply one flow's per-capita rate by ``factor`` (>= 0) for the listed
    ``groups`` (default: all). The whole rate is scaled, importation included
    when the flow's rate expression adds it.
``contact``
    Multiply the contact matrix elementwise by ``factors`` (G x G, >= 0; rows
    the group being infected, columns the infecting group, as in the model's
    ``transmission.contact``). Changes the force of infection only, not
    importation.
``vaccination``
    Move occupants of ``source`` to ``target`` at the per-capita daily rate
    ``rate_per_day`` x ``efficacy`` for the listed ``groups`` (all-or-nothing
    protection: a fraction ``efficacy`` of doses protects fully, the rest not at
    all; failed doses are not tracked, so they leave their recipients in
    ``source``).

Every intervention is active on whole days ``start_day <= d < end_day``
counted from the forecast origin (0 = the first simulated day); without
``end_day`` it lasts to the end of the horizon. Intervention windows are whole
days so that every factor is constant within a day.

Structure is checked by :class:`ScenarioFile`; names of flows, compartments,
groups, series and the contact matrix's shape are checked against a model spec
by :func:`load_scenario_file` (given the spec) and :func:`scenario_problems`.
Errors name the file, line and field.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any, Literal, Union

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator
from pydantic_core import InitErrorDetails, PydanticCustomError

from ._loading import load_toml_model
from ._model_spec import ModelSpec

__all__ = [
    "BASELINE",
    "ContactChange",
    "EXAMPLE_SCENARIOS",
    "Intervention",
    "RateChange",
    "Scenario",
    "ScenarioFile",
    "ScenarioThreshold",
    "Vaccination",
    "example_scenario_path",
    "load_scenario_file",
    "scenario_problems",
]

BASELINE = "baseline"
MAX_DAY = 3650

Identifier = Annotated[str, Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]*$", max_length=64)]
ScenarioName = Annotated[str, Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$", max_length=64)]
Factor = Annotated[float, Field(ge=0, allow_inf_nan=False)]


def _not_reserved(name: str) -> str:
    if name == BASELINE:
        raise ValueError(f"{BASELINE!r} is reserved for the implicit no-change scenario; choose another name")
    return name


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class _Window(_Strict):
    start_day: int = Field(default=0, ge=0, le=MAX_DAY, description="first day in force, counted from the forecast origin")
    end_day: int | None = Field(default=None, ge=1, le=MAX_DAY, description="first day no longer in force; omit: to the horizon")
    description: str = Field(default="", max_length=500)

    @model_validator(mode="after")
    def _order(self) -> "_Window":
        if self.end_day is not None and self.end_day <= self.start_day:
            raise ValueError(
                f"end_day ({self.end_day}) must be after start_day ({self.start_day}); "
                "the window is start_day <= day < end_day"
            )
        return self


class RateChange(_Window):
    """Multiply one flow's per-capita rate by ``factor`` for some groups."""

    kind: Literal["rate"]
    flow: Identifier
    factor: Factor
    groups: list[Identifier] | None = Field(default=None, min_length=1)


class ContactChange(_Window):
    """Multiply the contact matrix elementwise by ``factors`` (G x G)."""

    kind: Literal["contact"]
    factors: list[list[Factor]] = Field(min_length=1, max_length=32)

    @model_validator(mode="after")
    def _square(self) -> "ContactChange":
        g = len(self.factors)
        if any(len(row) != g for row in self.factors):
            shape = f"{g}x" + "/".join(sorted({str(len(row)) for row in self.factors}))
            raise ValueError(f"factors must be a square matrix (one row and column per group), got {shape}")
        return self


class Vaccination(_Window):
    """Move ``source`` occupants to ``target`` at per-capita rate ``rate_per_day * efficacy``."""

    kind: Literal["vaccination"]
    source: Identifier
    target: Identifier
    rate_per_day: float = Field(ge=0, le=1, allow_inf_nan=False, description="doses per occupant of source per day")
    efficacy: float = Field(default=1.0, ge=0, le=1, allow_inf_nan=False)
    groups: list[Identifier] | None = Field(default=None, min_length=1)

    @model_validator(mode="after")
    def _ends(self) -> "Vaccination":
        if self.source == self.target:
            raise ValueError(f"source and target are both {self.source!r}; vaccination must move people somewhere else")
        return self


Intervention = Annotated[Union[RateChange, ContactChange, Vaccination], Field(discriminator="kind")]


class Scenario(_Strict):
    """A named set of interventions (none: the scenario reproduces the baseline)."""

    name: ScenarioName
    description: str = Field(default="", max_length=2000)
    interventions: list[Intervention] = Field(default_factory=list, max_length=64)

    @field_validator("name")
    @classmethod
    def _not_baseline(cls, value: str) -> str:
        return _not_reserved(value)


class ScenarioThreshold(_Strict):
    """Report P(``series`` > ``threshold`` on some day within ``within_days``) per scenario.

    ``series`` is a reported series of the model or ``latent.infections``.
    """

    series: Annotated[str, Field(min_length=1, max_length=80)]
    threshold: float = Field(ge=0, allow_inf_nan=False)
    within_days: int | None = Field(default=None, ge=1, le=MAX_DAY)


class ScenarioFile(_Strict):
    """A scenario file: one scenario at the top level, or ``[[scenarios]]``."""

    name: ScenarioName | None = None
    description: str = Field(default="", max_length=2000)
    horizon_days: int | None = Field(default=None, ge=1, le=365)
    interventions: list[Intervention] | None = Field(default=None, max_length=64)
    scenarios: list[Scenario] | None = Field(default=None, min_length=1, max_length=32)
    thresholds: list[ScenarioThreshold] = Field(default_factory=list, max_length=32)

    @model_validator(mode="after")
    def _one_form(self) -> "ScenarioFile":
        if self.scenarios is None:
            if self.interventions is None or self.name is None:
                raise ValueError(
                    "give either one scenario (top-level 'name' and [[interventions]]) "
                    "or several ([[scenarios]], each with 'name' and [[scenarios.interventions]])"
                )
            return self
        if self.interventions is not None or self.name is not None:
            raise ValueError(
                "a file with [[scenarios]] takes no top-level 'name' or [[interventions]]; "
                "put each scenario's interventions under [[scenarios.interventions]]"
            )
        names = [s.name for s in self.scenarios]
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            raise ValueError(f"scenario names must be unique, repeated: {repeated}")
        return self

    @field_validator("name")
    @classmethod
    def _not_baseline(cls, value: str | None) -> str | None:
        return None if value is None else _not_reserved(value)

    def all_scenarios(self) -> list[Scenario]:
        """The scenarios of the file, in order (the baseline is not listed)."""
        if self.scenarios is not None:
            return list(self.scenarios)
        return [Scenario(name=self.name, description=self.description, interventions=self.interventions or [])]

    def _locations(self) -> list[tuple[tuple[Any, ...], Scenario]]:
        """(location prefix of each scenario's interventions, scenario)."""
        if self.scenarios is not None:
            return [(("scenarios", i), s) for i, s in enumerate(self.scenarios)]
        return [((), self.all_scenarios()[0])]


# ------------------------------------------------------------ model checks
Problem = tuple[tuple[Any, ...], str, Any]


def _intervention_problems(item: Any, spec: ModelSpec, loc: tuple[Any, ...]) -> list[Problem]:
    """What in one intervention does not fit the model: (field location, message, given)."""
    problems: list[Problem] = []
    groups = spec.group_names
    comps = list(spec.compartments)
    flows = [f.name for f in spec.flows]
    where = loc + (item.kind,)
    chosen = list(getattr(item, "groups", None) or [])
    for name in chosen:
        if name not in groups:
            problems.append((where + ("groups",), f"group {name!r} is not a group of model {spec.name!r}; allowed: {groups}", name))
    if chosen:
        repeated = sorted({g for g in chosen if chosen.count(g) > 1})
        if repeated:
            problems.append((where + ("groups",), f"groups listed twice: {repeated}", repeated))
    if isinstance(item, RateChange) and item.flow not in flows:
        problems.append((where + ("flow",), f"flow {item.flow!r} is not a flow of model {spec.name!r}; allowed: {flows}", item.flow))
    if isinstance(item, ContactChange):
        g = len(groups)
        if len(item.factors) != g:
            problems.append(
                (
                    where + ("factors",),
                    f"factors is {len(item.factors)}x{len(item.factors)} but model {spec.name!r} has {g} group(s) "
                    f"{groups}: a {g}x{g} matrix is needed (rows: infected group, columns: infecting group)",
                    item.factors,
                )
            )
        if not spec.transmission.infectious:
            problems.append((where + ("kind",), f"model {spec.name!r} has no infectious compartments, so no contacts to change", "contact"))
    if isinstance(item, Vaccination):
        for end in ("source", "target"):
            value = getattr(item, end)
            if value not in comps:
                problems.append((where + (end,), f"compartment {value!r} is not a compartment of model {spec.name!r}; allowed: {comps}", value))
    return problems


def _series_names(spec: ModelSpec) -> list[str]:
    """Names a threshold may watch: the reported series, and latent infections if the model has them."""
    latent = ["latent.infections"] if any(f.infection for f in spec.flows) else []
    return [s.name for s in spec.series] + latent


def scenario_problems(scenarios: ScenarioFile | Scenario | list[Scenario], spec: ModelSpec) -> list[Problem]:
    """Every reference in ``scenarios`` that the model spec does not have.

    Returns (field location, message, given) triples; empty when everything fits.
    """
    if isinstance(scenarios, ScenarioFile):
        located = scenarios._locations()
        thresholds = scenarios.thresholds
    elif isinstance(scenarios, Scenario):
        located, thresholds = [((), scenarios)], []
    else:
        located, thresholds = [(("scenarios", i), s) for i, s in enumerate(scenarios)], []
    problems: list[Problem] = []
    for prefix, scenario in located:
        for j, item in enumerate(scenario.interventions):
            problems += _intervention_problems(item, spec, prefix + ("interventions", j))
    allowed = _series_names(spec)
    for i, t in enumerate(thresholds):
        if t.series not in allowed:
            problems.append((("thresholds", i, "series"), f"series {t.series!r} is not reported by model {spec.name!r}; allowed: {allowed}", t.series))
    return problems


def _error_details(problems: list[Problem]) -> list[InitErrorDetails]:
    return [
        InitErrorDetails(
            type=PydanticCustomError("model_reference", "{problem}", {"problem": message}),
            loc=loc,
            input=given,
        )
        for loc, message, given in problems
    ]


def _checked_against(spec: ModelSpec) -> type[ScenarioFile]:
    """ScenarioFile with one more validation step: every reference fits ``spec``."""

    class ScenarioFileForModel(ScenarioFile):
        @model_validator(mode="after")
        def _fits_model(self) -> "ScenarioFileForModel":
            problems = scenario_problems(self, spec)
            if problems:
                raise ValidationError.from_exception_data("ScenarioFile", _error_details(problems))
            return self

    return ScenarioFileForModel


def load_scenario_file(path: str | Path, spec: ModelSpec | None = None) -> ScenarioFile:
    """Read and validate a scenario TOML file (raises SpecError naming file, line and field).

    With ``spec``, flows, compartments, groups, series and the contact matrix's
    shape are also checked against that model.
    """
    return load_toml_model(ScenarioFile if spec is None else _checked_against(spec), path)


EXAMPLE_SCENARIOS = ("brackenford_schools", "brackenford_single")


def example_scenario_path(name: str) -> Path:
    """Path of a shipped example scenario file (see ``schemas/scenarios/``)."""
    if name not in EXAMPLE_SCENARIOS:
        raise ValueError(f"no example scenario file {name!r}; allowed: {list(EXAMPLE_SCENARIOS)}")
    return Path(__file__).with_name("scenarios") / f"{name}.toml"
