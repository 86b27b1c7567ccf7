"""An individual-based model: every particle is a whole town of people.

The population (households, schools, workplaces, age bands) is drawn once from
its seed (:func:`filters.build_population`) and shared by all particles; what
differs between particles is who is infected, when, and the parameters.

State: one byte per person and particle
---------------------------------------
``ParticleSet.states`` is an array of shape (n_particles, people), uint8. The
byte holds the person's stage and the whole days left in it:

==========  =========================================================
0 .. 126    latent (infected, not yet infectious), ``code + 1`` days left
127 .. 189  infectious with symptoms, ``code - 126`` days left (1 .. 63)
190 .. 252  infectious without symptoms, ``code - 189`` days left
254         recovered (immune)
255         susceptible
==========  =========================================================

Everyone latent or infectious has a code below 253, so one comparison over
the array finds them. So latent periods are at most 127 days and infectious periods at most 63 (the
spec is checked against these limits). Resampling gathers whole towns
(``ParticleSet.take``). ``history`` (n_particles, history_days, slots, bands),
int32, newest day first, holds each day's event counts per age band (the
series read it, through the shared observation layer :mod:`filters._series`),
the day's infections by where they happened, the infectious person-days, and
the end-of-day number of people in each stage (so summaries never scan the
people).

One day
-------
Transitions happen at the end of a day. On day ``d``:

1. One scan of the state finds the latent and infectious people.
2. Each infectious person ``j`` (weight ``w_j`` = 1, or the asymptomatic
   relative infectiousness) makes a Poisson number of infectious contacts with
   mean ``w_j x sum over places of beta_place x m/(m - 1)`` (``m`` the members
   of ``j``'s household or setting place; community: ``beta_community``), each
   to a uniformly chosen member of the place the contact happened in (the
   place chosen in proportion to its part of the mean). A contact to oneself
   is wasted, so each *other* member is contacted at rate ``beta / (m - 1)``
   (frequency-dependent transmission). Importation adds ``Poisson(iota)``
   contacts from outside per day, each to a uniformly chosen person.
   By the superposition and thinning of Poisson processes, each susceptible
   person ``i`` then receives a Poisson number of contacts with mean
   ``lambda_i = sum_j rate_ij + iota / N`` independently of everyone else, and
   is infected if it is at least one: probability ``1 - exp(-lambda_i)``, the
   same law as drawing one Bernoulli per susceptible person, at a cost
   proportional to the number of contacts instead of the number of people.
   A person contacted twice is infected once; the place of infection (and
   whether it came from outside) is the place of one of their contacts chosen
   uniformly, i.e. with probability proportional to its rate.
3. Everyone who was latent or infectious at the start of the day loses one
   day; a latent period that ends starts an infectious period (drawn then,
   with the asymptomatic share of the person's band); an infectious period that
   ends makes the person recovered.
4. The day's infected draw a latent period; with 0 days they are infectious
   from the next day (a symptom onset on the day of infection).

Events are counted on the day they happen: ``infection``, ``onset`` (start of
infectiousness with symptoms), ``infectious`` (start of infectiousness, with
or without symptoms) and ``recovery``.

Reproduction number
-------------------
``R_eff`` is the mean number of people a person infected now would go on to
infect if transmission per unit of infectiousness stayed as it has been over
the last ``R_WINDOW`` days: per particle,

    R_eff = (infections caused by the town's own cases in the window)
            / (infectious person-days in the window, asymptomatic ones weighted)
            x (mean infectious person-days of one infection, so weighted).

It is tracked per particle from the realised infections of its own path (no
re-simulation). In a large homogeneously mixing population with everyone
susceptible its expectation is ``beta x E[infectious days] x E[weight]``, the
basic reproduction number, and it falls with the susceptible share as the
next-generation R_eff of the compartmental models does; with households it
also falls as cases' households are already infected. It is NaN when no one
was infectious in the window.

Learning the transmission rates
-------------------------------
A static parameter used only as places' transmission rates or as the
importation rate, with a prior on [0, inf), is learned from each particle's
own contacts rather than by Liu-West jitter. Every contact a case makes at a
place whose rate is ``beta`` is one of Poisson(``beta x e``) contacts, ``e``
the case's exposure there (``m/(m - 1)`` or the community factor, times its
weight and the interventions' factor); imports are Poisson(``iota``) a day.
So given the particle's path, ``beta``'s likelihood is ``beta^M exp(-beta E)``
with ``M`` all contacts made at its places (whether they infected anyone or
not) and ``E`` the summed exposure. ``ParticleSet.stats`` keeps ``(M, E)`` per
learned parameter and particle (two float64 columns each), carried through
resampling and checkpoints; after each weighting the filter calls
:meth:`IndividualModel.move_parameters`, which redraws the rate from its
conditional posterior (:mod:`filters._rate_learning`). Parameters the series
read (reporting shares, dispersions) stay with Liu-West.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import stats

from schemas import DiscretePeriod, GammaPeriod, GeometricPeriod, IndividualModelSpec

from ._compartmental import ModelError, _shift_days
from ._particles import ParticleSet
from ._population import Population, build_population
from ._priors import ParameterScales, from_unconstrained, sample_prior, to_unconstrained
from ._rate_learning import learnable_prior, move_rates
from ._reports import ReportingCdfTable
from ._series import ObservedSeries, compile_series, mask_groups

__all__ = ["IndividualModel", "period_pmf", "SUSCEPTIBLE", "RECOVERED", "R_WINDOW"]

SUSCEPTIBLE = 255
RECOVERED = 254
SYMPTOMATIC_BASE = 127  # infectious with symptoms: 127 + days left - 1
ASYMPTOMATIC_BASE = 190  # infectious without symptoms: 190 + days left - 1
R_WINDOW = 7
_ACTIVE_BELOW = np.uint8(253)  # latent or infectious
# People per block when drawing the initial state (bounds its temporary memory;
# a fixed number so the draws do not depend on the machine).
_INITIAL_BLOCK = 64
# A day on for each code of someone latent or infectious: one day less, the last
# infectious day to recovered (latent 0 becomes 255 here and its infectious code is
# written over it).
_NEXT_CODE = np.arange(-1, 255).astype(np.uint8)
_NEXT_CODE[[SYMPTOMATIC_BASE, ASYMPTOMATIC_BASE]] = RECOVERED


def _repeat_index(counts: np.ndarray) -> np.ndarray:
    """``np.repeat(np.arange(counts.size), counts)``, by marking where each run ends
    (several times faster for many short runs)."""
    ends = np.cumsum(counts)
    total = int(ends[-1]) if ends.size else 0
    marks = np.bincount(ends[:-1], minlength=total + 1)[:total]
    return np.cumsum(marks)


def _stable_sort(values: np.ndarray, bound: int) -> tuple[np.ndarray, np.ndarray]:
    """(sorted values, ``np.argsort(values, kind="stable")``) for integers in [0, bound):
    one sort of (value, position) packed in an int64, so the keys are unique and any
    sort algorithm gives the same order."""
    shift = max(int(values.size).bit_length(), 1)
    if bound >= 1 << (62 - shift):  # does not fit: sort the values themselves
        order = np.argsort(values, kind="stable")
        return values[order], order
    keys = values.astype(np.int64) << shift
    keys |= np.arange(values.size, dtype=np.int64)
    keys.sort()
    return keys >> shift, keys & ((1 << shift) - 1)


def period_pmf(period: Any, shortest: int) -> tuple[np.ndarray, np.ndarray]:
    """(days, probabilities) of a stage's length in whole days.

    ``gamma``: mass on [d - 0.5, d + 0.5) for d = shortest .. max_days, the
    shortest day also taking everything below it, renormalised (the mass above
    max_days + 0.5 is dropped). ``geometric``: P(d) = (1 - q) q^(d - 1),
    q = exp(-rate), d = 1 .. max_days, renormalised. ``discrete``: as given.
    """
    if isinstance(period, DiscretePeriod):
        w = np.asarray(period.weights, dtype=float)
        days = np.asarray(period.days, dtype=np.int64)
        keep = w > 0
        return days[keep], w[keep] / w[keep].sum()
    if isinstance(period, GammaPeriod):
        top = max(period.max_days, shortest)
        days = np.arange(shortest, top + 1, dtype=np.int64)
        shape = (period.mean / period.sd) ** 2
        cdf = stats.gamma.cdf(days + 0.5, shape, scale=period.sd**2 / period.mean)
        mass = np.diff(np.concatenate([[0.0], cdf]))
    elif isinstance(period, GeometricPeriod):
        days = np.arange(max(shortest, 1), period.max_days + 1, dtype=np.int64)
        q = math.exp(-period.rate)
        mass = (1.0 - q) * q ** (days - 1.0)
    else:  # pragma: no cover - the schema admits no other kind
        raise ModelError(f"period {period!r} not known")
    if not mass.sum() > 0:
        raise ModelError(f"period {period!r} puts no mass on days {days[0]}..{days[-1]}")
    return days, mass / mass.sum()


class _Table:
    """Inverse-CDF sampling of whole days from a pmf."""

    def __init__(self, days: np.ndarray, probs: np.ndarray) -> None:
        self.days, self.probs = days, probs
        self.cdf = np.cumsum(probs)
        self.cdf[-1] = 1.0
        self.mean = float(days @ probs)

    def __call__(self, u: np.ndarray) -> np.ndarray:
        return self.days[self.index(u)]

    def index(self, u: np.ndarray) -> np.ndarray:
        """Which entry of ``days`` each uniform in [0, 1) picks."""
        out = np.searchsorted(self.cdf, u, side="right")
        np.minimum(out, self.days.size - 1, out=out)
        return out

    def laplace(self, theta: float) -> float:
        """E[exp(-theta D)]."""
        return float(self.probs @ np.exp(-theta * self.days))


class IndividualModel(ObservedSeries, ParameterScales):
    """The individual-based family (implements ``filters.Model``).

    Parameters
    ----------
    spec : IndividualModelSpec
    window_days : days back a late or revised value is still assimilated
        (default: the spec's ``window_days``, else its longest delay).
    population : an already drawn population of ``spec.population`` (drawn here if None).
    """

    def __init__(self, spec: IndividualModelSpec, window_days: int | None = None, population: Population | None = None) -> None:
        self.spec = spec
        self.population = population if population is not None else build_population(spec.population)
        pop = self.population
        if pop.size != spec.population.size or pop.band_names != spec.band_names:
            raise ModelError(f"the population given is not the one model {spec.name!r} declares")
        self.people = pop.size
        self.groups = list(spec.band_names)
        self.n_groups = len(self.groups)
        # Parameters, as compartmental specs have them.
        self.param_names = list(spec.parameters)
        self._pidx = {p: i for i, p in enumerate(self.param_names)}
        params = spec.parameters
        self.static_parameters = np.array([i for i, p in enumerate(params.values()) if p.kind == "static"], dtype=np.intp)
        self._drifting = np.array([i for i, p in enumerate(params.values()) if p.kind == "drifting"], dtype=np.intp)
        self._transforms = [(p.transform, p.bounds) for p in params.values()]
        self._volatility = np.array([p.volatility for p in params.values()])
        # Places: household, each setting, the community.
        tr = spec.transmission
        self.places = ["household", *[v.name for v in pop.settings], "community"]
        rates = [tr.household, *[tr.settings.get(v.name, 0.0) for v in pop.settings], tr.community]
        self._beta = [self._value(r, f"transmission rate of {name!r}") for r, name in zip(rates, self.places)]
        self._iota = self._value(tr.importation, "transmission.importation")
        self._person_factor = self._place_factors()
        self._community_targets()
        self._place_table()
        # Disease histories.
        d = spec.disease
        self.latent = _Table(*period_pmf(d.latent, 0))
        self.infectious = _Table(*period_pmf(d.infectious, 1))
        asym = d.asymptomatic
        self.asymptomatic = np.array(
            [asym.get(b, 0.0) if isinstance(asym, dict) else asym for b in self.groups], dtype=float
        )
        self.relative = float(d.asymptomatic_infectiousness)
        # Mean weighted infectious person-days of one infection, by band.
        self.lifetime = self.infectious.mean * (1.0 - self.asymptomatic + self.asymptomatic * self.relative)
        self._asymptomatic_of = self.asymptomatic[self.population.band]  # by person
        # Rows of the place factors for cases with symptoms (0 .. people - 1) and without
        # (people .. 2 people - 1: times the relative infectiousness), one gather per case.
        self._case_factor = np.concatenate([self._person_factor, self._person_factor * self.relative])
        # The code of an infectious period of k + 1 days (the table's k-th day), with symptoms
        # (first row) or without.
        days = self.infectious.days
        self._infectious_code = np.stack([SYMPTOMATIC_BASE - 1 + days, ASYMPTOMATIC_BASE - 1 + days]).astype(np.uint8)
        # History slots.
        self.slots = [
            "infection", "onset", "infectious", "recovery",
            *[f"infection.{p}" for p in self.places], "infection.imported",
            "recovery.asymptomatic",
            "stock.S", "stock.E", "stock.I", "stock.I_asymptomatic", "stock.R",
        ]  # fmt: skip
        self._slot = {name: k for k, name in enumerate(self.slots)}
        self._cause0 = self._slot["infection.household"]
        # End-of-day people: S, E, I with symptoms, I without, R.
        self._stocks = [self._slot[f"stock.{c}"] for c in ("S", "E", "I", "I_asymptomatic", "R")]
        # Series, through the shared observation layer.
        longest = max(
            [s.delay.max_days for s in spec.series if s.delay is not None]
            + [s.reporting_delay.max_days for s in spec.series if s.reporting_delay is not None]
            + [0]
        )
        self.default_window_days = spec.window_days if spec.window_days is not None else longest
        self.window_days = self.default_window_days if window_days is None else int(window_days)
        if not 0 <= self.window_days <= 120:
            raise ModelError(f"window_days must be between 0 and 120, got {self.window_days}")
        series_columns: set[int] = set()

        def resolve_for_series(ref: Any, where: str) -> int | None:
            col = self._resolve(ref, where)
            if col is not None:
                series_columns.add(col)
            return col

        self.series, history_days = compile_series(
            spec.series, self.groups, lambda s: self._slot[s.flow], resolve_for_series, self.window_days
        )
        self._learned = self._learned_rates(series_columns)
        learned = {col for col, _, _ in self._learned}
        self.static_parameters = np.array([j for j in self.static_parameters if j not in learned], dtype=np.intp)
        self.learned_parameters = np.array(sorted(learned), dtype=np.intp)
        # R_eff reads R_WINDOW days; one more keeps the stocks at the start of the window.
        self.history_days = max(history_days, R_WINDOW + 1)
        self._series_by_name = {s.name: s for s in self.series}
        self._cdf_tables: dict[str, ReportingCdfTable] = {}
        self._mask_groups = mask_groups(self.series)

    # --------------------------------------------------------------- compile
    def _learned_rates(self, series_columns: set[int]) -> list[tuple[int, np.ndarray, bool]]:
        """(column, places, importation) of each static parameter learned from the particles'
        own contacts: used only as places' rates or the importation rate, with a prior on
        [0, inf) (see "Learning the transmission rates" in the module docstring)."""
        out = []
        for j, (name, p) in enumerate(self.spec.parameters.items()):
            places = np.array([k for k, (_, col) in enumerate(self._beta) if col == j], dtype=np.intp)
            imported = self._iota[1] == j
            if p.kind == "static" and (places.size or imported) and j not in series_columns and learnable_prior(p.prior):
                out.append((j, places, bool(imported)))
        return out

    def _value(self, ref: float | str, where: str) -> tuple[float, int | None]:
        col = self._resolve(ref, where)
        return (0.0, col) if col is not None else (float(ref), None)

    def _place_factors(self) -> np.ndarray:
        """(people, places) float64: m / (m - 1) for each person's household and
        setting place of m members (0 where m < 2 or no place), and the
        community factor of the person's band."""
        pop = self.population
        out = np.zeros((pop.size, len(self.places)))
        for k, venues in enumerate([pop.households, *pop.settings]):
            sizes = venues.sizes.astype(float)
            factor = np.where(sizes >= 2, sizes / np.maximum(sizes - 1.0, 1.0), 0.0)
            has = venues.venue >= 0
            out[has, k] = factor[venues.venue[has]]
        return out

    def _community_targets(self) -> None:
        """Community mixing by band: rows of ``contact`` the band infected, columns the
        infecting band. Susceptibles of band a are infected at rate
        beta_c sum_b C[a, b] I_b / N_b, so a case of band b makes contacts at rate
        beta_c sum_a C[a, b] N_a / N_b spread over band a in proportion to C[a, b] N_a.
        Default C[a, b] = N_b / N: everyone mixes with everyone (rate beta_c, targets uniform)."""
        pop = self.population
        counts = pop.band_counts().astype(float)
        contact = self.spec.transmission.community_contact
        C = np.array(contact, dtype=float) if contact is not None else np.broadcast_to(counts / counts.sum(), (counts.size, counts.size))
        with np.errstate(divide="ignore", invalid="ignore"):
            toward = C * counts[:, None]  # [a, b] = C[a, b] N_a
            factor = np.where(counts > 0, toward.sum(axis=0) / counts, 0.0)
            share = np.where(toward.sum(axis=0) > 0, toward / toward.sum(axis=0), 0.0)
        self._community_factor = factor  # (bands,) by the infecting band
        self._homogeneous = contact is None
        self._person_factor[:, -1] = factor[pop.band]
        cdf = np.cumsum(share.T, axis=1)  # row b: cumulative over target bands a
        cdf[:, -1] = 1.0
        self._community_cdf = cdf
        order = np.argsort(pop.band, kind="stable").astype(np.int32)
        self._band_members = order
        self._band_start = np.concatenate([[0], np.cumsum(pop.band_counts())]).astype(np.int64)

    def _place_table(self) -> None:
        """All places of all kinds in one table, so a contact's target is a few gathers.

        ``_place_of[person, k]``: the person's place of kind k (household, each
        setting, community) as a row of ``_place_start`` / ``_place_size``, whose
        members are ``_place_members[start : start + size]``. The community is one
        place holding everyone (homogeneous mixing), or one place per band when a
        community contact matrix is given (the band is then drawn per contact).
        """
        pop = self.population
        kinds = [pop.households, *pop.settings]
        starts, sizes, members = [], [], []
        offset_places = offset_members = 0
        self._place_of = np.full((pop.size, len(self.places)), -1, dtype=np.int64)
        for k, venues in enumerate(kinds):
            has = venues.venue >= 0
            self._place_of[has, k] = venues.venue[has] + offset_places
            starts.append(venues.start[:-1] + offset_members)
            sizes.append(venues.sizes)
            members.append(venues.members)
            offset_places += venues.count
            offset_members += venues.members.size
        self._community_place = offset_places
        bands = np.diff(self._band_start)
        starts.append(self._band_start[:-1] + offset_members if not self._homogeneous else np.array([offset_members]))
        sizes.append(bands if not self._homogeneous else np.array([pop.size]))
        members.append(self._band_members if not self._homogeneous else np.arange(pop.size, dtype=np.int32))
        self._place_of[:, -1] = offset_places if self._homogeneous else offset_places + pop.band.astype(np.int64)
        self._place_start = np.concatenate(starts).astype(np.int64)
        self._place_size = np.concatenate(sizes).astype(np.int64)
        self._place_members = np.concatenate(members).astype(np.int32)
        # By (person, kind) flattened: where the person's place starts and its size
        # (a float, as it multiplies a uniform), one gather each per contact.
        self._start_of = self._place_start[self._place_of].reshape(-1)
        self._size_of = self._place_size[self._place_of].reshape(-1).astype(float)

    # -------------------------------------------------------------- protocol
    def initial(self, n: int, rng: np.random.Generator) -> ParticleSet:
        params = self.draw_parameters(n, rng)
        init = self.spec.initial

        def draw(quantity: Any) -> np.ndarray:
            return np.full(n, float(quantity)) if isinstance(quantity, (int, float)) else sample_prior(quantity, rng, n)

        recovered = np.clip(draw(init.recovered), 0.0, 1.0)
        exposed = np.maximum(np.rint(draw(init.exposed)), 0).astype(np.int64)
        infectious = np.maximum(np.rint(draw(init.infectious)), 0).astype(np.int64)
        P = self.people
        codes = np.full((n, P), SUSCEPTIBLE, dtype=np.uint8)
        for lo in range(0, n, _INITIAL_BLOCK):
            hi = min(n, lo + _INITIAL_BLOCK)
            block = codes[lo:hi]
            immune = rng.random((hi - lo, P)) < recovered[lo:hi, None]
            block[immune] = RECOVERED
            keys = rng.random((hi - lo, P))
            keys[immune] = 2.0
            free = P - immune.sum(axis=1)
            e = np.minimum(exposed[lo:hi], free)
            i = np.minimum(infectious[lo:hi], free - e)
            k = int((e + i).max(initial=0))
            if k == 0:
                continue
            # The k smallest keys of each row, in key order: a uniform random ordering of the susceptibles.
            chosen = np.argpartition(keys, k - 1, axis=1)[:, :k] if k < P else np.tile(np.arange(P), (hi - lo, 1))
            chosen = np.take_along_axis(chosen, np.argsort(np.take_along_axis(keys, chosen, axis=1), axis=1), axis=1)
            rank = np.arange(k)[None, :]
            rows = np.broadcast_to(np.arange(hi - lo)[:, None], chosen.shape)
            as_e = rank < e[:, None]
            as_i = (rank >= e[:, None]) & (rank < (e + i)[:, None])
            lat = np.maximum(self.latent(rng.random(int(as_e.sum()))), 1)
            block[rows[as_e], chosen[as_e]] = (lat - 1).astype(np.uint8)
            people = chosen[as_i]
            block[rows[as_i], people] = self._infectious_codes(people, rng)
        history = np.zeros((n, self.history_days, len(self.slots), self.n_groups), dtype=np.int32)
        history[:, 0, self._stocks, :] = self._stage_counts(codes)
        return ParticleSet(states=codes, params=params, history=history, stats=np.zeros((n, 2 * len(self._learned))))

    def _infectious_codes(self, people: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Codes of people starting an infectious period: asymptomatic by their band's share, days drawn."""
        u = rng.random((2, people.size))
        silent = u[0] < np.take(self._asymptomatic_of, people)
        day = self.infectious.index(u[1])
        day += silent * self._infectious_code.shape[1]
        return np.take(self._infectious_code, day)

    def _stage_counts(self, codes: np.ndarray) -> np.ndarray:
        """(n, 5, bands) people in S, E, I with symptoms, I without, R by band (a full scan; used at the start only)."""
        onehot = np.zeros((self.people, self.n_groups), dtype=np.float32)
        onehot[np.arange(self.people), self.population.band] = 1.0
        stages = [
            codes == SUSCEPTIBLE,
            codes < SYMPTOMATIC_BASE,
            (codes >= SYMPTOMATIC_BASE) & (codes < ASYMPTOMATIC_BASE),
            (codes >= ASYMPTOMATIC_BASE) & (codes < _ACTIVE_BELOW),
            codes == RECOVERED,
        ]
        return np.stack([np.rint(s.astype(np.float32) @ onehot) for s in stages], axis=1).astype(np.int32)

    def _column(self, params: np.ndarray, col: int | None, const: float) -> np.ndarray | float:
        return params[:, col] if col is not None else const

    def _rates(self, params: np.ndarray, factors: np.ndarray | None = None) -> np.ndarray:
        """(n, places) daily transmission rates of every particle (times intervention factors)."""
        n = params.shape[0]
        out = np.empty((n, len(self.places)))
        for k, (const, col) in enumerate(self._beta):
            out[:, k] = params[:, col] if col is not None else const
        np.maximum(out, 0.0, out=out)
        if factors is not None:
            out *= factors
        return out

    def advance(self, particles: ParticleSet, t0: int, t1: int, rng: np.random.Generator, effects: Any = None) -> None:
        """Move every particle's town from day t0 to day t1 (in place).

        ``effects``: interventions compiled for this model
        (:func:`filters.compile_setting_interventions`), consulted once per day:
        factors on the places' rates and a household quarantine. Days with no
        factor in force and no one at home run the code (and draw the random
        numbers) of a day without interventions; with None every day does.
        """
        if t1 < t0:
            raise ValueError(f"cannot advance backwards from day {t0} to day {t1}")
        codes = particles.states
        if not codes.flags.c_contiguous:
            particles.states = codes = np.ascontiguousarray(codes)
        learning = self._learning_stats(particles)
        for day in range(t0, t1):
            self._drift(particles.params, rng)
            # (n, places + 1) rate factors of the interventions in force (last column: importation), or None.
            factors = None if effects is None else effects.factors(day, particles.params.shape[0])
            quarantine = None if effects is None else effects.quarantine(codes)
            self._day(codes, particles.params, particles.history, rng, factors, quarantine, day, learning)

    def _learning_stats(self, particles: ParticleSet) -> np.ndarray | None:
        """The (n, 2 x learned) running contacts and exposures, or None when nothing is learned."""
        if not self._learned:
            return None
        stats_ = particles.stats
        if stats_.shape != (particles.size, 2 * len(self._learned)):
            names = [self.param_names[col] for col, _, _ in self._learned]
            raise ModelError(
                f"model {self.spec.name!r} learns {names} from each particle's contacts and needs "
                f"{2 * len(self._learned)} statistics per particle; this cloud has {stats_.shape[1]} "
                "(saved before they were kept?): rebuild the stream from its history (casecloud stream rebuild)"
            )
        return stats_

    def move_parameters(self, particles: ParticleSet, rng: np.random.Generator) -> None:
        """Redraw each learned rate from its conditional posterior given the particle's own
        contacts (one Metropolis-Hastings step, :func:`filters._rate_learning.move_rates`);
        the filter calls it after weighting. Weights are unchanged."""
        learning = self._learning_stats(particles)
        if learning is None:
            return
        for i, (col, _, _) in enumerate(self._learned):
            prior = self.spec.parameters[self.param_names[col]].prior
            particles.params[:, col] = move_rates(particles.params[:, col], learning[:, 2 * i], learning[:, 2 * i + 1], prior, rng)

    def _day(
        self,
        codes: np.ndarray,
        params: np.ndarray,
        history: np.ndarray,
        rng: np.random.Generator,
        factors: np.ndarray | None,
        quarantine: Any = None,
        day: int = 0,
        learning: np.ndarray | None = None,
    ) -> None:
        n, P = codes.shape
        C = len(self.places)
        flat = codes.reshape(-1)
        # 1. Who is latent or infectious at the start of the day.
        active = np.flatnonzero(flat < _ACTIVE_BELOW)
        code = flat[active]
        inf_at = np.flatnonzero(code >= SYMPTOMATIC_BASE)
        inf = active[inf_at]
        inf_particle = inf // P
        inf_person = inf - inf_particle * P
        # 2. Infectious contacts: each case makes a Poisson number over all its places
        # (rate of place k: beta_k x m/(m - 1) x weight), each contact's place drawn in
        # proportion to its rate, its target uniformly among that place's members.
        # cum[j, k]: case j's rates of places 0..k summed.
        # np.take gathers rows several times faster than fancy indexing.
        row = inf_person + (code[inf_at] >= ASYMPTOMATIC_BASE) * P  # asymptomatic cases: the weighted rows
        cum = np.take(self._case_factor, row, axis=0)
        del row
        household = self.population.households.venue
        if quarantine is not None:  # cases whose household stays at home infect no one outside it
            cum[quarantine.home(inf_particle, household[inf_person], day), 1:] = 0.0
        if learning is not None:
            exposure = self._exposure(cum, inf_particle, n, factors)
        cum *= np.take(self._rates(params, None if factors is None else factors[:, :-1]), inf_particle, axis=0)
        for k in range(1, C):
            cum[:, k] += cum[:, k - 1]
        source = _repeat_index(rng.poisson(cum[:, -1]))
        u = rng.random((source.size, 2))
        mine = np.take(cum, source, axis=0)
        del cum
        x = u[:, 0] * mine[:, -1]
        place = (mine[:, 0] <= x).view(np.int8)
        for k in range(1, C - 1):
            place += mine[:, k] <= x
        del mine, x
        slot = np.take(inf_person, source) * C + place
        start = np.take(self._start_of, slot)
        size = np.take(self._size_of, slot)
        if not self._homogeneous:  # community contacts: the target's band drawn by the contact matrix
            community = np.flatnonzero(place == C - 1)
            cdf = self._community_cdf[self.population.band[inf_person[source[community]]]]
            row = self._community_place + np.minimum((cdf <= rng.random(community.size)[:, None]).sum(axis=1), self.n_groups - 1)
            start[community], size[community] = self._place_start[row], self._place_size[row]
        size *= u[:, 1]
        start += size.astype(np.int64)
        del slot, size, u
        by_particle = np.take(inf_particle, source)
        contacted = by_particle * P + np.take(self._place_members, start)
        if learning is not None:  # contacts made, by particle and place (wasted or not: all count)
            made = np.bincount(by_particle * C + place, minlength=n * C).reshape(n, C)
        if quarantine is not None:  # and no one outside it reaches them
            out = (place > 0) & quarantine.home(by_particle, household[contacted % P], day)
            contacted, place = contacted[~out], place[~out]
        del start, source, by_particle
        # Importation: Poisson(iota) contacts per particle from outside, each to a uniformly chosen person.
        iota = self._column(params, self._iota[1], self._iota[0])
        if factors is not None:
            iota = iota * factors[:, -1]  # the last column scales importation
        imports = rng.poisson(np.broadcast_to(np.maximum(iota, 0.0), (n,)))
        if learning is not None:
            self._learn(learning, made, exposure, imports, None if factors is None else factors[:, -1])
        particle = np.repeat(np.arange(n), imports)
        imported = (rng.random(particle.size) * P).astype(np.int64)
        if quarantine is not None:
            away = ~quarantine.home(particle, household[imported], day)
            particle, imported = particle[away], imported[away]
        contacted = np.concatenate([contacted, particle * P + imported])
        cause = np.concatenate([place, np.full(particle.size, C, dtype=np.int8)])
        hit = np.flatnonzero(flat[contacted] == SUSCEPTIBLE)
        contacted, cause = contacted[hit], cause[hit]
        # A person contacted more than once is infected once, by one of their contacts chosen uniformly.
        ranked, order = _stable_sort(contacted, n * P)
        first = np.ones(ranked.size, dtype=bool)
        np.not_equal(ranked[1:], ranked[:-1], out=first[1:])
        starts = np.flatnonzero(first)
        infected = ranked[starts]
        counts = np.diff(np.append(starts, ranked.size))
        pick = starts.copy()
        multi = np.flatnonzero(counts > 1)
        if multi.size:
            pick[multi] += (rng.random(multi.size) * counts[multi]).astype(np.intp)
        cause = cause[order[pick]].astype(np.intp)
        # 3. A day passes for everyone latent or infectious since the morning.
        ends_latent = np.flatnonzero(code == 0)
        moved = np.take(_NEXT_CODE, code)
        recovers = np.flatnonzero(moved == RECOVERED)
        recovered_silent = code[recovers] == ASYMPTOMATIC_BASE
        started = active[ends_latent]
        started_code = self._infectious_codes(started % P, rng)
        flat[active] = moved
        flat[started] = started_code
        # 4. The day's infected start their latent period (or, with 0 days, their infectious one).
        latent = self.latent(rng.random(infected.size))
        new_code = (latent - 1).astype(np.uint8)  # latent 0 wraps to 255 and is overwritten below
        at_once = np.flatnonzero(latent == 0)
        if at_once.size:
            new_code[at_once] = self._infectious_codes(infected[at_once] % P, rng)
        flat[infected] = new_code
        onset = np.concatenate([started, infected[at_once]])
        onset_code = np.concatenate([started_code, new_code[at_once]])
        if quarantine is not None:
            symptomatic = onset[onset_code < ASYMPTOMATIC_BASE]
            quarantine.onsets(symptomatic // P, household[symptomatic % P], day)
        # 5. The day's counts.
        self._tally(history, n, infected, cause, onset, onset_code, active[recovers], recovered_silent)

    def _exposure(self, rows: np.ndarray, particle: np.ndarray, n: int, factors: np.ndarray | None) -> np.ndarray:
        """(n, places): each particle's day of exposure per unit rate, the sum over its cases of
        m/(m - 1) (or the community factor) x weight x the interventions' factor (``rows``:
        the cases' factors times weights, quarantined places already 0; ``particle`` sorted)."""
        bounds = np.searchsorted(particle, np.arange(n + 1))
        some = bounds[:-1] < bounds[1:]
        out = np.zeros((n, rows.shape[1]))
        if some.any():
            out[some] = np.add.reduceat(rows, bounds[:-1][some], axis=0)
        if factors is not None:
            out *= factors[:, :-1]
        return out

    def _learn(self, learning: np.ndarray, made: np.ndarray, exposure: np.ndarray, imports: np.ndarray, import_factor: np.ndarray | None) -> None:
        """Add the day's contacts and exposure to each learned rate's running statistics."""
        for i, (_, places, imported) in enumerate(self._learned):
            learning[:, 2 * i] += made[:, places].sum(axis=1)
            learning[:, 2 * i + 1] += exposure[:, places].sum(axis=1)
            if imported:
                learning[:, 2 * i] += imports
                learning[:, 2 * i + 1] += 1.0 if import_factor is None else import_factor

    def _tally(self, history, n, infected, cause, onset, onset_code, recovered, recovered_silent) -> None:
        """Count the day's events by particle, slot and band, and carry the stocks forward."""
        P, B, S = self.people, self.n_groups, len(self.slots)
        causes = len(self.places) + 1  # places and importation
        band = self.population.band
        slot = self._slot

        def at(flat_index: np.ndarray) -> np.ndarray:  # (particle, band) as one key
            particle = flat_index // P
            return particle * B + np.take(band, flat_index - particle * P)

        def count(keys: np.ndarray) -> np.ndarray:
            return np.bincount(keys, minlength=n * B).reshape(n, B)

        infected_at, onset_at, recovered_at = at(infected), at(onset), at(recovered)
        counts = np.zeros((n, S, B), dtype=history.dtype)
        counts[:, slot["infection"]] = count(infected_at)
        by_cause = np.bincount(infected_at * causes + cause, minlength=n * B * causes).reshape(n, B, causes)
        counts[:, self._cause0 : self._cause0 + causes] = by_cause.transpose(0, 2, 1)
        counts[:, slot["infectious"]] = count(onset_at)
        counts[:, slot["onset"]] = count(onset_at[onset_code < ASYMPTOMATIC_BASE])
        counts[:, slot["recovery"]] = count(recovered_at)
        counts[:, slot["recovery.asymptomatic"]] = count(recovered_at[recovered_silent])
        _shift_days(history)
        infection, infectious, onsets = counts[:, slot["infection"]], counts[:, slot["infectious"]], counts[:, slot["onset"]]
        recovery, silent_recovery = counts[:, slot["recovery"]], counts[:, slot["recovery.asymptomatic"]]
        s_, e_, i_, a_, r_ = self._stocks
        counts[:, s_] = history[:, 1, s_] - infection
        counts[:, e_] = history[:, 1, e_] + infection - infectious
        counts[:, i_] = history[:, 1, i_] + onsets - (recovery - silent_recovery)
        counts[:, a_] = history[:, 1, a_] + (infectious - onsets) - silent_recovery
        counts[:, r_] = history[:, 1, r_] + recovery
        history[:, 0] = counts

    def _drift(self, params: np.ndarray, rng: np.random.Generator) -> None:
        for j in self._drifting:
            transform, bounds = self._transforms[j]
            y = to_unconstrained(np.ascontiguousarray(params[:, j]), transform, bounds)
            y = y + self._volatility[j] * rng.standard_normal(params.shape[0])
            params[:, j] = from_unconstrained(y, transform, bounds)

    # ------------------------------------------------------------- summaries
    def reproduction_number(self, particles: ParticleSet, t: float = 0.0, today: Any = None) -> np.ndarray:
        """R_eff per particle over the last ``R_WINDOW`` days (see the module docstring).

        The infectious person-days of day d are the people infectious at the end of
        day d - 1 (the stocks one row further back in the history)."""
        h = particles.history
        slot = self._slot
        infections = h[:, :R_WINDOW, slot["infection"]].sum(axis=1).astype(float)  # (n, B)
        caused = infections.sum(axis=1) - h[:, :R_WINDOW, slot["infection.imported"]].sum(axis=(1, 2))
        person_days = (
            h[:, 1 : R_WINDOW + 1, slot["stock.I"]].sum(axis=(1, 2))
            + self.relative * h[:, 1 : R_WINDOW + 1, slot["stock.I_asymptomatic"]].sum(axis=(1, 2))
        )
        mix = np.where(infections.sum(axis=1, keepdims=True) > 0, infections, self.population.band_counts()[None, :])
        lifetime = (mix @ self.lifetime) / mix.sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(person_days > 0, caused / person_days * lifetime, np.nan)

    latent_source = "infections counted person by person (all bands, imported included)"

    def latent_quantities(self, particles: ParticleSet) -> dict[str, np.ndarray]:
        """The day's infections, the susceptibles at its end and R_eff, per particle (read by forecasts)."""
        h = particles.history
        return {
            "infections": h[:, 0, self._slot["infection"]].sum(axis=1),
            "susceptibles": h[:, 0, self._slot["stock.S"]].sum(axis=1),
            "R_eff": self.reproduction_number(particles),
        }

    def stage_counts(self, particles: ParticleSet) -> np.ndarray:
        """(n, 4, bands) people susceptible, latent, infectious and recovered at the end of the cloud's day."""
        s_, e_, i_, a_, r_ = self._stocks
        h = particles.history[:, 0]
        return np.stack([h[:, s_], h[:, e_], h[:, i_] + h[:, a_], h[:, r_]], axis=1)

    def describe(self, particles: ParticleSet, t: float = 0.0) -> dict[str, np.ndarray]:
        out: dict[str, np.ndarray] = {}
        h = particles.history
        stages = self.stage_counts(particles)
        for c, name in enumerate("SEIR"):
            for g, band in enumerate(self.groups):
                out[f"{name}[{band}]"] = stages[:, c, g]
        for event in ("infection", "onset"):
            for g, band in enumerate(self.groups):
                out[f"incidence.{event}[{band}]"] = h[:, 0, self._slot[event], g]
        for place in [*self.places, "imported"]:
            out[f"infections_{R_WINDOW}d.{place}"] = h[:, :R_WINDOW, self._slot[f"infection.{place}"]].sum(axis=(1, 2))
        for j, name in enumerate(self.param_names):
            if self.spec.parameters[name].kind != "fixed":
                out[name] = particles.params[:, j]
        out["R_eff"] = self.reproduction_number(particles, t)
        return out

