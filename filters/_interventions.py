"""Interventions compiled against a compartmental model.

:func:`compile_interventions` turns a scenario's interventions (see
``schemas/_scenario.py``) into an :class:`Effects` object that
``CompartmentalModel.advance(..., effects=...)`` consults once per simulated
day. The scenario counts days from the forecast origin; ``Effects`` works in
absolute model days: an intervention with ``start_day = a`` and ``end_day = b``
compiled with ``origin = s`` is in force on the model days ``d`` with
``s + a <= d < s + b`` (the day that runs from time ``d`` to ``d + 1``).

What a day in force changes (``DayEffects``):

``rate_factors``
    flow -> (G,) multipliers of that flow's per-capita rate, one per group
    (the product of every rate change in force on the flow). Multiplied into
    the rate wherever the model evaluates it: once a day for rates that are
    constant within a day, every sub-step for the others. Windows are whole
    days, so a factor never changes within a day; a rate it touches changes
    from day to day, and the model evaluates rates afresh every day (nothing
    is carried across days), which is the time-dependence that
    ``_plan_dynamics`` asks for. A factor of exactly 1 leaves the rate's bits
    unchanged.
``contact_t``
    the transposed contact matrix in force, ``(C * F1 * F2 ...).T`` for the
    contact changes in force (elementwise products), read by the force of
    infection every sub-step. Importation is not a contact and is unchanged.
``extra``
    source compartment -> ((target compartment, (G,) per-capita rate), ...):
    vaccination as an extra competing outflow. A vaccination with daily
    per-capita dose rate ``r`` and efficacy ``e`` moves occupants of the source
    to the target at rate ``r * e``: all-or-nothing protection, where a share
    ``e`` of doses protects fully and the rest not at all. Failed doses are not
    tracked (their recipients stay in the source and may be dosed again), and
    doses are offered to the source's occupants only (none are spent on other
    compartments). With no other flow out of the source (or that flow switched
    off), the expected number moved in a day from S occupants is exactly
    ``S * (1 - exp(-r * e))``, because the Euler-multinomial leave probability
    over the day's sub-steps compounds to that.

A vaccination whose per-capita rate is zero in every group is dropped at
compile time: an extra outflow of rate zero would move nobody but would still
consume random numbers, so "no change" scenarios would not reproduce the
baseline.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

from schemas import ContactChange, RateChange, Scenario, Vaccination, scenario_problems

__all__ = ["DayEffects", "Effects", "InterventionError", "compile_interventions"]


class InterventionError(ValueError):
    """Interventions that do not fit the model (unknown flow, group, compartment, shape)."""


class DayEffects(NamedTuple):
    """What the interventions in force change on one day (see the module docstring).

    rate_factors : dict flow index -> ndarray (G,)
    contact_t : ndarray (G, G), C-contiguous, or None (the model's own contact matrix)
    extra : dict source compartment -> tuple of (target compartment, ndarray (G,) per-capita rate)
    """

    rate_factors: dict[int, np.ndarray]
    contact_t: np.ndarray | None
    extra: dict[int, tuple[tuple[int, np.ndarray], ...]]


@dataclass(frozen=True)
class _Window:
    start: int  # first model day in force
    end: int | None  # first model day no longer in force (None: open-ended)

    def covers(self, day: int) -> bool:
        return self.start <= day and (self.end is None or day < self.end)


@dataclass(frozen=True)
class _Rate:
    window: _Window
    flow: int
    factor: np.ndarray  # (G,)


@dataclass(frozen=True)
class _Contact:
    window: _Window
    factors: np.ndarray  # (G, G)


@dataclass(frozen=True)
class _Extra:
    window: _Window
    source: int
    target: int
    rate: np.ndarray  # (G,) per-capita rate (dose rate x efficacy)


def _signature(model: Any) -> tuple:
    return (tuple(model.compartments), tuple(model.groups), tuple(f.name for f in model.spec.flows))


class Effects:
    """Interventions in absolute model days, compiled for one model.

    Build with :func:`compile_interventions`. ``on_day(day)`` is what the
    model's ``advance`` asks: None on days when nothing is in force (the model
    then runs its ordinary code path for that day), else :class:`DayEffects`.
    Immutable after construction apart from a per-day cache.
    """

    def __init__(
        self,
        model: Any,
        origin: int,
        rates: Sequence[_Rate] = (),
        contacts: Sequence[_Contact] = (),
        extras: Sequence[_Extra] = (),
        labels: Sequence[str] = (),
    ) -> None:
        self.origin = int(origin)
        self.signature = _signature(model)
        self._contact = np.array(model.contact, dtype=float)
        self._groups = model.n_groups
        self._rates = tuple(rates)
        self._contacts = tuple(contacts)
        self._extras = tuple(extras)
        self.labels = tuple(labels)
        self._days: dict[int, DayEffects | None] = {}

    @property
    def empty(self) -> bool:
        """True when nothing is ever in force (the scenario is the baseline)."""
        return not (self._rates or self._contacts or self._extras)

    def windows(self) -> list[tuple[int, int | None]]:
        """(first day, first day after) in model days of every compiled intervention."""
        return [(x.window.start, x.window.end) for x in (*self._rates, *self._contacts, *self._extras)]

    def check_model(self, model: Any) -> None:
        """Raise InterventionError unless ``model`` has the compartments, groups and flows compiled for."""
        found = _signature(model)
        if found != self.signature:
            raise InterventionError(
                "these effects were compiled for a model with compartments/groups/flows "
                f"{self.signature}, not {found}; compile them against the model that runs them"
            )

    def on_day(self, day: int) -> DayEffects | None:
        """The changes in force on model day ``day`` (from time day to day + 1), or None."""
        if day in self._days:
            return self._days[day]
        rate_factors: dict[int, np.ndarray] = {}
        for r in self._rates:
            if r.window.covers(day):
                rate_factors[r.flow] = rate_factors[r.flow] * r.factor if r.flow in rate_factors else r.factor.copy()
        contact = None
        for c in self._contacts:
            if c.window.covers(day):
                contact = (self._contact if contact is None else contact) * c.factors
        extra: dict[int, list[tuple[int, np.ndarray]]] = {}
        for x in self._extras:
            if x.window.covers(day):
                extra.setdefault(x.source, []).append((x.target, x.rate))
        if not rate_factors and contact is None and not extra:
            found = None
        else:
            found = DayEffects(
                rate_factors={f: _frozen(v) for f, v in rate_factors.items()},
                contact_t=None if contact is None else _frozen(np.ascontiguousarray(contact.T)),
                extra={c: tuple(v) for c, v in sorted(extra.items())},
            )
        self._days[day] = found
        return found

    def __repr__(self) -> str:
        return (
            f"Effects(origin={self.origin}, rate_changes={len(self._rates)}, contact_changes={len(self._contacts)}, "
            f"vaccinations={len(self._extras)})"
        )


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a, dtype=float)
    a.flags.writeable = False
    return a


def _group_mask(model: Any, groups: list[str] | None) -> np.ndarray:
    mask = np.zeros(model.n_groups, dtype=bool)
    for g in groups or model.groups:
        mask[model.groups.index(g)] = True
    return mask


def compile_interventions(
    model: Any,
    interventions: Scenario | Iterable[RateChange | ContactChange | Vaccination],
    origin: int,
) -> Effects:
    """Compile interventions (or a :class:`schemas.Scenario`) for ``model``.

    ``origin`` is the model day of the forecast origin: a scenario's day
    ``k`` is model day ``origin + k``. Raises InterventionError listing every
    reference the model does not have (the same checks as
    ``schemas.load_scenario_file`` with a spec, without file and line).
    """
    if isinstance(origin, bool) or not isinstance(origin, (int, np.integer)):
        raise InterventionError(f"origin must be a whole model day, got {origin!r}")
    scenario = interventions if isinstance(interventions, Scenario) else Scenario(name="interventions", interventions=list(interventions))
    problems = scenario_problems(scenario, model.spec)
    if problems:
        listing = "; ".join(f"field {_where(loc)}: {message}" for loc, message, _ in problems)
        raise InterventionError(f"scenario {scenario.name!r} does not fit model {model.spec.name!r}: {listing}")
    flow_index = {f.name: i for i, f in enumerate(model.spec.flows)}
    cidx = {c: i for i, c in enumerate(model.compartments)}
    rates: list[_Rate] = []
    contacts: list[_Contact] = []
    extras: list[_Extra] = []
    labels: list[str] = []
    for item in scenario.interventions:
        window = _Window(int(origin) + item.start_day, None if item.end_day is None else int(origin) + item.end_day)
        days = f"days {item.start_day}-{item.end_day - 1}" if item.end_day is not None else f"from day {item.start_day}"
        groups = ", ".join(getattr(item, "groups", None) or model.groups)
        if isinstance(item, RateChange):
            factor = np.where(_group_mask(model, item.groups), float(item.factor), 1.0)
            rates.append(_Rate(window, flow_index[item.flow], _frozen(factor)))
            labels.append(f"{item.flow} rate x{item.factor:g} ({groups}; {days})")
        elif isinstance(item, ContactChange):
            contacts.append(_Contact(window, _frozen(np.array(item.factors, dtype=float))))
            labels.append(f"contacts x{item.factors} ({days})")
        else:
            rate = np.where(_group_mask(model, item.groups), float(item.rate_per_day) * float(item.efficacy), 0.0)
            if not np.any(rate > 0):
                continue  # moves nobody; dropping it keeps the random stream of the baseline
            extras.append(_Extra(window, cidx[item.source], cidx[item.target], _frozen(rate)))
            labels.append(
                f"vaccination {item.source}->{item.target} {item.rate_per_day:g}/day, efficacy {item.efficacy:g} "
                f"({groups}; {days})"
            )
    return Effects(model, int(origin), rates, contacts, extras, labels)


def _where(loc: tuple) -> str:
    """("interventions", 0, "rate", "flow") -> "interventions[0].rate.flow"."""
    out = ""
    for part in loc:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out
