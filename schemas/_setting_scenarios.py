"""What-if scenarios for individual-based models: interventions that act on settings.

A file holds ``[[scenarios]]``, each with a ``name`` and its
``[[scenarios.interventions]]``; every run also includes the implicit
``baseline`` (no change). Interventions (``kind``), each in force on whole days
``start_day <= d < end_day`` counted from the forecast origin (0 = the first
simulated day; without ``end_day``: to the horizon):

``close``
    The places of one setting (``setting``, e.g. ``"school"``) are closed: no
    transmission there.
``attendance``
    Each member of a ``setting`` attends on a given day with probability
    ``share``; a contact needs both people there, so the setting's transmission
    is thinned to ``share ** 2``.
``community``
    Community transmission multiplied by ``factor`` (distancing, events called off).
``household_quarantine``
    A symptomatic case is detected on its onset day with probability
    ``detected``; from the next day its whole household stays at home for
    ``days`` days: its members neither infect nor are infected outside the
    household (settings and community) meanwhile. Household transmission goes
    on. Onsets before ``start_day`` or from ``end_day`` on start no quarantine.

Names are checked against a model by :func:`load_setting_scenarios` (given the
spec). Errors name the file, line and field.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Literal, Union

from pydantic import Field, model_validator

from ._errors import SpecError
from ._individual import IndividualModelSpec
from ._loading import _format_loc, _line_of, load_toml_model
from ._scenario import BASELINE, ScenarioName, _Strict, _Window

__all__ = [
    "CloseSetting",
    "Attendance",
    "CommunityChange",
    "HouseholdQuarantine",
    "SettingIntervention",
    "SettingScenario",
    "SettingScenarioFile",
    "load_setting_scenarios",
    "EXAMPLE_SETTING_SCENARIOS",
    "example_setting_scenarios_path",
]

Identifier = Annotated[str, Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]*$", max_length=64)]


class CloseSetting(_Window):
    kind: Literal["close"]
    setting: Identifier


class Attendance(_Window):
    kind: Literal["attendance"]
    setting: Identifier
    share: float = Field(ge=0, le=1, allow_inf_nan=False, description="probability that a member attends on a day")


class CommunityChange(_Window):
    kind: Literal["community"]
    factor: float = Field(ge=0, allow_inf_nan=False)


class HouseholdQuarantine(_Window):
    kind: Literal["household_quarantine"]
    detected: float = Field(ge=0, le=1, allow_inf_nan=False, description="share of symptomatic cases detected on their onset day")
    days: int = Field(ge=1, le=60, description="days the household stays at home, from the day after the onset")


SettingIntervention = Annotated[
    Union[CloseSetting, Attendance, CommunityChange, HouseholdQuarantine], Field(discriminator="kind")
]


class SettingScenario(_Strict):
    name: ScenarioName
    description: str = Field(default="", max_length=2000)
    interventions: list[SettingIntervention] = Field(default_factory=list, max_length=32)

    @model_validator(mode="after")
    def _not_baseline(self) -> "SettingScenario":
        if self.name == BASELINE:
            raise ValueError(f"{BASELINE!r} is reserved for the implicit no-change scenario; choose another name")
        if sum(1 for i in self.interventions if isinstance(i, HouseholdQuarantine)) > 1:
            raise ValueError("one household_quarantine per scenario (its days and detection apply to every case)")
        return self


class SettingScenarioFile(_Strict):
    description: str = Field(default="", max_length=2000)
    horizon_days: int | None = Field(default=None, ge=1, le=365)
    scenarios: list[SettingScenario] = Field(min_length=1, max_length=32)

    @model_validator(mode="after")
    def _unique(self) -> "SettingScenarioFile":
        names = [s.name for s in self.scenarios]
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            raise ValueError(f"scenario names must be unique, repeated: {repeated}")
        return self


def _problems(file: SettingScenarioFile, spec: IndividualModelSpec) -> list[tuple[tuple, str, str]]:
    settings = [s.name for s in spec.population.settings]
    out = []
    for i, scenario in enumerate(file.scenarios):
        for j, intervention in enumerate(scenario.interventions):
            name = getattr(intervention, "setting", None)
            if name is not None and name not in settings:
                out.append((
                    ("scenarios", i, "interventions", j, "setting"),
                    f"scenario {scenario.name!r}: {name!r} is not a setting of population {spec.population.name!r}; allowed: {settings}",
                    name,
                ))
    return out


def load_setting_scenarios(path: str | Path, spec: IndividualModelSpec | None = None) -> SettingScenarioFile:
    """Read a setting-scenario file; with ``spec``, its setting names are checked against the model."""
    file = load_toml_model(SettingScenarioFile, path)
    problems = _problems(file, spec) if spec is not None else []
    if problems:
        text = Path(path).read_text(encoding="utf-8")
        lines = []
        for loc, message, given in problems:
            line = _line_of(text, loc)
            where = f"{path}:{line}" if line is not None else str(path)
            lines.append(f"{where}: field {_format_loc(loc)}: {message} (given {given!r})")
        raise SpecError(f"{len(lines)} problem(s) in {path}:\n  " + "\n  ".join(lines), lines)
    return file


EXAMPLE_SETTING_SCENARIOS = ("pellingwold_schools_or_quarantine",)


def example_setting_scenarios_path(name: str) -> Path:
    """Path of a shipped setting-scenario file, in ``schemas/models/individual/``."""
    if name not in EXAMPLE_SETTING_SCENARIOS:
        raise ValueError(f"no setting-scenario example {name!r}; allowed: {list(EXAMPLE_SETTING_SCENARIOS)}")
    return Path(__file__).with_name("models") / "individual" / f"{name}.toml"
