"""Stochastic compartmental models compiled from a :class:`ModelSpec`.

Dynamics follow the Euler-multinomial scheme (Breto, He, Ionides & King 2009):
in every sub-step of length dt, the occupants of each compartment leave with
probability 1 - exp(-sum(rates) * dt) and are split among the destinations in
proportion to the rates (sequential binomials). Counts stay integer,
non-negative, and each group's population is conserved exactly.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from schemas import ModelSpec

from ._expressions import CompiledExpression, ExpressionError, compile_expression
from ._model import ModelError, ModelGuardError, first_bad
from ._particles import ParticleSet
from ._priors import ParameterScales, from_unconstrained, sample_prior, to_unconstrained
from ._reports import ReportingCdfTable
from ._series import ObservedSeries, compile_series, mask_groups

__all__ = ["CompartmentalModel", "ModelError", "ModelGuardError"]




def _expand(value: np.ndarray | float, shape: tuple[int, int]) -> np.ndarray:
    """``value`` broadcast to ``shape`` (n, G) as a C-contiguous array (a copy unless it
    already is one). An (n, 1) column is copied group by group, which is much
    faster than a broadcasting loop whose inner dimension is G."""
    a = np.asarray(value)
    n, groups = shape
    if a.shape == (n, 1) and groups > 1:
        out = np.empty(shape, dtype=a.dtype)
        column = a[:, 0]
        for g in range(groups):
            out[:, g] = column
        return out
    return np.ascontiguousarray(np.broadcast_to(a, shape))


def _shift_days(history: np.ndarray) -> None:
    """history[:, 1:] = history[:, :-1] (day 0 is left for the caller to overwrite).

    On a C-contiguous array this is one overlapping 1-D copy of the flat buffer
    (numpy copies 1-D overlapping data in place, memmove-like), shifted by one
    day's worth of entries: every day moves to the next slot of its particle,
    and each particle's oldest day spills into the next particle's day 0, which
    the caller overwrites. The 2-D assignment would copy through a temporary.
    """
    if not history.flags.c_contiguous or history.shape[1] < 2:
        history[:, 1:] = history[:, :-1]
        return
    flat = history.reshape(-1)
    day = history[0, 0].size
    flat[day:] = flat[:-day]


def _solve_table(A: list[list], b: list) -> list:
    """Solve A x = b where A is a small m x m table whose entries are arrays (all of
    one shape) or numbers, and b a list of m numbers or arrays: one solve per element.

    Gaussian elimination without pivoting, looping over m only; every operation
    runs over whole arrays. Meant for the transposed transition matrices of the
    next-generation method, which are diagonally dominant (an M-matrix), where
    elimination without pivoting is stable.
    """
    A = [list(row) for row in A]
    x = list(b)
    m = len(A)
    for k in range(m):
        for i in range(k + 1, m):
            if isinstance(A[i][k], float) and A[i][k] == 0.0:
                continue
            factor = A[i][k] / A[k][k]
            for j in range(k, m):
                A[i][j] = A[i][j] - factor * A[k][j]
            x[i] = x[i] - factor * x[k]
    for i in range(m - 1, -1, -1):
        rest = x[i]
        for j in range(i + 1, m):
            if not (isinstance(A[i][j], float) and A[i][j] == 0.0):
                rest = rest - A[i][j] * x[j]
        x[i] = rest / A[i][i]
    return x


def _spectral_radius(K: list[list[np.ndarray]], n: int) -> np.ndarray:
    """max |eigenvalue| of the m x m matrices whose entries are K[r][s] (arrays of
    length n); NaN (or infinity) where an entry is not finite."""
    m = len(K)
    if m == 0:
        return np.zeros(n)
    if m == 1:
        return np.abs(K[0][0])
    with np.errstate(invalid="ignore", over="ignore"):
        if m == 2:
            a, b, c, d = K[0][0], K[0][1], K[1][0], K[1][1]
            half_trace = 0.5 * (a + d)
            half_gap = 0.5 * (a - d)
            disc = half_gap * half_gap + b * c
            # Real pair: |tr/2| + sqrt(disc); complex pair: |lambda|^2 = det = (tr/2)^2 - disc.
            real = np.abs(half_trace) + np.sqrt(np.maximum(disc, 0.0))
            if np.all(disc >= 0):  # e.g. always for non-negative K: no complex pair to look at
                return real
            complex_ = np.sqrt(np.maximum(half_trace * half_trace - disc, 0.0))
            return np.where(disc >= 0, real, complex_)
    matrix = np.empty((n, m, m))
    for r in range(m):
        for s in range(m):
            matrix[:, r, s] = K[r][s]
    out = np.full(n, np.nan)
    ok = np.isfinite(matrix).all(axis=(1, 2))
    if ok.any():
        out[ok] = np.max(np.abs(np.linalg.eigvals(matrix[ok])), axis=1)
    return out


class CompartmentalModel(ObservedSeries, ParameterScales):
    """A vectorised stochastic compartmental model (implements ``Model``).

    Parameters
    ----------
    spec : ModelSpec
        A validated spec; see ``schemas/models`` for examples.
    """

    def __init__(self, spec: ModelSpec, window_days: int | None = None) -> None:
        self.spec = spec
        self._window_override = window_days
        self.compartments = list(spec.compartments)
        self.groups = spec.group_names
        self.n_groups = len(self.groups)
        self.n_compartments = len(self.compartments)
        self._cidx = {c: i for i, c in enumerate(self.compartments)}
        self.population = np.array([g.population for g in spec.groups], dtype=np.int64)
        self.dt = 1.0 / spec.substeps_per_day
        self.param_names = list(spec.parameters)
        self._pidx = {p: i for i, p in enumerate(self.param_names)}
        params = spec.parameters
        self.static_parameters = np.array(
            [i for i, p in enumerate(params.values()) if p.kind == "static"], dtype=np.intp
        )
        self._drifting = np.array(
            [i for i, p in enumerate(params.values()) if p.kind == "drifting"], dtype=np.intp
        )
        self._transforms = [(p.transform, p.bounds) for p in params.values()]
        self._volatility = np.array([p.volatility for p in params.values()])
        contact = spec.transmission.contact
        self.contact = np.array(contact if contact is not None else [[1.0]], dtype=float)
        self._infectious_w = np.zeros(self.n_compartments)
        for c, w in spec.transmission.infectious.items():
            self._infectious_w[self._cidx[c]] = w
        self._group_values = {
            key: np.array([g.values[key] for g in spec.groups], dtype=float)
            for key in (spec.groups[0].values if spec.groups else {})
        }
        self._compile(spec)

    # ------------------------------------------------------------------ compile
    def _compile(self, spec: ModelSpec) -> None:
        def comp(source: str, allowed: set[str], where: str) -> CompiledExpression:
            try:
                return compile_expression(source, allowed)
            except ExpressionError as exc:
                raise ModelError(f"model {spec.name!r}, {where}: {exc}") from None

        names: set[str] = set(self.param_names) | {"t"}
        self._derived: list[tuple[str, CompiledExpression]] = []
        for name, source in spec.derived.items():
            self._derived.append((name, comp(source, names, f"derived.{name}")))
            names.add(name)
        self._scalar_names = set(names)
        self._importation = (
            comp(spec.transmission.importation, names, "transmission.importation")
            if spec.transmission.importation
            else None
        )
        rate_names = names | set(self.compartments) | set(self._group_values) | {"N", "foi", "imported"}
        self._flow_rates = [comp(f.rate, rate_names, f"flows[{i}] ({f.name}).rate") for i, f in enumerate(spec.flows)]
        self._flow_ends = [(self._cidx[f.source], self._cidx[f.target]) for f in spec.flows]
        # Flows grouped by source compartment, in spec order.
        self._outflows: list[tuple[int, list[int]]] = []
        for c in range(self.n_compartments):
            flows = [i for i, (s, _) in enumerate(self._flow_ends) if s == c]
            if flows:
                self._outflows.append((c, flows))
        # Observed flows get a slot in the incidence history.
        observed = [s.flow for s in spec.series if s.kind in ("incidence", "concentration")]
        flow_names = [f.name for f in spec.flows]
        self._observed_flows = [flow_names.index(f) for f in dict.fromkeys(observed)]
        self._slot_of = {flow_names[f]: k for k, f in enumerate(self._observed_flows)}
        longest = max(
            [s.delay.max_days for s in spec.series if s.delay is not None]
            + [s.reporting_delay.max_days for s in spec.series if s.reporting_delay is not None]
            + [0]
        )
        self.default_window_days = spec.window_days if spec.window_days is not None else longest
        self.window_days = self.default_window_days if self._window_override is None else int(self._window_override)
        if not 0 <= self.window_days <= 120:
            raise ModelError(f"window_days must be between 0 and 120, got {self.window_days}")
        self.series, history_days = compile_series(
            spec.series,
            self.groups,
            lambda s: self._slot_of[s.flow] if s.flow is not None else self._cidx[s.compartment],
            self._resolve,
            self.window_days,
        )
        self.history_days = history_days
        self._series_by_name = {s.name: s for s in self.series}
        self._cdf_tables: dict[str, ReportingCdfTable] = {}  # built on first use
        self._infected = self._infected_compartments()
        self._plan_dynamics()

    def _plan_dynamics(self) -> None:
        """Bookkeeping for the sub-step loop, worked out once per model.

        Rates whose expression reads nothing that changes within a day (no
        compartment, ``foi``, ``t`` or time-dependent ``imported``) are
        evaluated once per day instead of once per sub-step, and only the
        compartments that some rate expression reads are converted to float.
        Values are the same as evaluating everything every sub-step.

        Interventions (``advance(..., effects=...)``) make the rates they touch
        time-dependent: a factor applies on the days of its window only. Their
        windows are whole days, so a factor is constant within each day and
        changes only at day boundaries; every rate (touched or not) is
        evaluated afresh each day and nothing is carried across days, so the
        once-a-day evaluation stays exact on effect days too, with the day's
        factor applied wherever the rate is evaluated. (A window starting
        mid-day would move the rates it touches to the per-sub-step set.)
        """
        imported_dynamic = self._importation is not None and "t" in self._importation.names
        dynamic = set(self.compartments) | {"t", "foi"} | ({"imported"} if imported_dynamic else set())
        self._rate_is_dynamic = [bool(expr.names & dynamic) for expr in self._flow_rates]
        used: set[str] = set()
        for expr in self._flow_rates:
            used |= expr.names
        self._imported_dynamic = imported_dynamic
        self._env_compartments = [(c, name) for c, name in enumerate(self.compartments) if name in used]
        self._rate_reads = frozenset(used)
        dynamic_reads: set[str] = set()
        for expr, is_dynamic in zip(self._flow_rates, self._rate_is_dynamic):
            if is_dynamic:
                dynamic_reads |= expr.names
        self._dynamic_reads = frozenset(dynamic_reads)
        self._full_cache: dict[int, dict[str, np.ndarray]] = {}
        self._needs_foi = "foi" in used
        nonzero = np.flatnonzero(self._infectious_w)
        # With a single infectious compartment of weight 1, x @ w is that column exactly.
        self._single_infectious = (
            int(nonzero[0]) if nonzero.size == 1 and self._infectious_w[nonzero[0]] == 1.0 else None
        )
        self._contact_t = np.ascontiguousarray(self.contact.T)
        self._total_population = self.population.sum()
        self._source_is_dynamic = [any(self._rate_is_dynamic[f] for f in flows) for _, flows in self._outflows]
        self._infection_flows = [i for i, f in enumerate(self.spec.flows) if f.infection]
        self._mask_groups = mask_groups(self.series)

    def _infected_compartments(self) -> list[int]:
        """Compartments on a path from an infection flow to an infectious compartment."""
        infection = [i for i, f in enumerate(self.spec.flows) if f.infection]
        edges: dict[int, set[int]] = {c: set() for c in range(self.n_compartments)}
        for i, (s, d) in enumerate(self._flow_ends):
            if i not in infection:
                edges[s].add(d)

        def reach(starts: set[int]) -> set[int]:
            seen, todo = set(starts), list(starts)
            while todo:
                for d in edges[todo.pop()]:
                    if d not in seen:
                        seen.add(d)
                        todo.append(d)
            return seen

        entries = {self._flow_ends[i][1] for i in infection}
        infectious = {c for c in range(self.n_compartments) if self._infectious_w[c] > 0}
        return sorted(c for c in reach(entries) if reach({c}) & infectious)

    # --------------------------------------------------------------- protocol
    def initial(self, n: int, rng: np.random.Generator) -> ParticleSet:
        params = self.draw_parameters(n, rng)
        counts = np.zeros((n, self.n_groups, self.n_compartments), dtype=np.int64)
        left = np.broadcast_to(self.population, (n, self.n_groups)).copy()
        for entry in self.spec.initial.set:
            groups = [self.groups.index(entry.group)] if entry.group else range(self.n_groups)
            c = self._cidx[entry.compartment]
            for g in groups:
                qty = entry.count if entry.count is not None else entry.fraction
                draw = np.full(n, float(qty)) if isinstance(qty, (int, float)) else sample_prior(qty, rng, n)
                if entry.fraction is not None:
                    draw = draw * self.population[g]
                # Entries are capped so a group's total never exceeds its population.
                value = np.clip(np.rint(draw), 0, left[:, g]).astype(np.int64)
                counts[:, g, c] += value
                left[:, g] -= value
        counts[:, :, self._cidx[self.spec.initial.remainder]] += left
        history = np.zeros((n, self.history_days, len(self._observed_flows), self.n_groups), dtype=np.int64)
        return ParticleSet(states=counts, params=params, history=history)

    def _scalars(self, params: np.ndarray, t: float) -> dict[str, np.ndarray | float]:
        """Parameters and derived quantities as (n, 1) columns."""
        env: dict[str, np.ndarray | float] = {name: params[:, j, None] for j, name in enumerate(self.param_names)}
        env["t"] = float(t)
        for name, expr in self._derived:
            with np.errstate(all="ignore"):  # a bad value shows up in the rates that read it, where the guard names it
                env[name] = np.broadcast_to(np.asarray(expr(env), dtype=float), (params.shape[0], 1))
        return env

    def _rate_env(self, scalars: dict, counts: np.ndarray, t: float) -> dict:
        env = dict(scalars)
        env["t"] = float(t)
        env.update(self._group_values)
        env["N"] = self.population
        x = counts.astype(float)
        for c, name in enumerate(self.compartments):
            env[name] = x[:, :, c]
        env["foi"] = self._foi(counts, x)
        if self._importation is not None:
            env["imported"] = np.asarray(self._importation(env), dtype=float) / self._total_population
        else:
            env["imported"] = 0.0
        return env

    def _foi(self, counts: np.ndarray, x: np.ndarray | None = None) -> np.ndarray | float:
        """Force of infection (n, G): contact-weighted infectious fraction per group."""
        return self._foi_columns([counts[:, :, c] for c in range(counts.shape[2])], x)

    def _foi_columns(
        self, columns: list[np.ndarray], x: np.ndarray | None = None, contact_t: np.ndarray | None = None
    ) -> np.ndarray | float:
        """Force of infection from the compartments' (n, G) count arrays.

        ``x`` optionally gives the counts as an (n, G, C) float array already;
        ``contact_t`` a transposed contact matrix to use instead of the model's
        (an intervention in force).
        """
        if self._single_infectious is not None:
            weighted = columns[self._single_infectious].astype(float)
        elif self._infectious_w.any():
            if x is None:
                x = np.stack(columns, axis=-1).astype(float)
            n, g, c = x.shape
            # A 2-D matrix-vector product: the same BLAS call (and bits) as the
            # stacked (n, G, C) @ (C,) product, without its per-row overhead.
            weighted = (x.reshape(n * g, c) @ self._infectious_w).reshape(n, g)
        else:
            return 0.0
        # Dividing by a full (n, G) copy of the populations gives the same values
        # as broadcasting the (G,) vector, with a contiguous inner loop.
        weighted /= self._full_constants(weighted.shape[0])["N"]
        return weighted @ (self._contact_t if contact_t is None else contact_t)

    def _full_constants(self, n: int) -> dict[str, np.ndarray]:
        """Group values and populations as read-only (n, G) arrays (cached per n)."""
        cache = self._full_cache
        found = cache.get(n)
        if found is None:
            shape = (n, self.n_groups)
            found = {}
            for name, value in self._group_values.items():
                found[name] = np.ascontiguousarray(np.broadcast_to(value, shape))
            found["N"] = np.ascontiguousarray(np.broadcast_to(self.population.astype(float), shape))
            found["N_int"] = np.ascontiguousarray(np.broadcast_to(self.population, shape))
            found["foi=0"], found["foi=1"] = np.zeros(shape), np.ones(shape)  # (not identifiers: no clash)
            for arr in found.values():
                arr.flags.writeable = False
            if len(cache) >= 8:
                cache.clear()  # a few sizes in use at once (filter, forecasts); atomic under the GIL
            cache[n] = found
        return found

    def _day_env(self, scalars: dict, t: float, n: int) -> dict:
        """The part of the rate environment that is fixed for a day.

        Every per-particle or per-group quantity a rate reads is laid out as a
        contiguous (n, G) array, so that rate arithmetic runs over whole arrays
        instead of broadcasting (n, 1) columns against (G,) rows: the same
        elementwise operations on the same values, hence the same results.
        """
        shape = (n, self.n_groups)
        full = self._full_constants(n)
        env: dict = {}
        for name, value in scalars.items():
            if name in self._dynamic_reads and name != "t":
                env[name] = _expand(value, shape)
            elif name in self._rate_reads:
                env[name] = value  # read once a day only: the (n, 1) column will do
        env["t"] = float(t)
        for name in self._group_values:
            env[name] = full[name]
        env["N"] = full["N_int"]
        if self._importation is None:
            env["imported"] = 0.0
        elif not self._imported_dynamic:
            imported = np.asarray(self._importation(scalars), dtype=float) / self._total_population
            env["imported"] = _expand(imported, shape) if "imported" in self._dynamic_reads else imported
        return env

    def _substep_env(
        self,
        day_env: dict,
        scalars: dict,
        columns: list[np.ndarray],
        t: float,
        with_foi: bool = True,
        contact_t: np.ndarray | None = None,
    ) -> dict:
        """The rate environment at time t: what any rate expression may read.

        ``columns`` holds each compartment's (n, G) counts; ``contact_t`` an
        intervention's transposed contact matrix (None: the model's).
        """
        env = dict(day_env)
        env["t"] = float(t)
        for c, name in self._env_compartments:
            env[name] = columns[c].astype(float)
        if self._needs_foi and with_foi:
            env["foi"] = self._foi_columns(columns, contact_t=contact_t)
        if self._imported_dynamic:
            at_t = dict(scalars, t=float(t))
            imported = np.asarray(self._importation(at_t), dtype=float) / self._total_population  # type: ignore[misc]
            env["imported"] = _expand(imported, (columns[0].shape[0], self.n_groups))
        return env

    def _rate(self, f: int, env: dict, n: int) -> np.ndarray:
        with np.errstate(all="ignore"):  # a NaN or infinity is reported by the guard, not as a warning
            r = np.asarray(self._flow_rates[f](env), dtype=float)
        self._guard_rate(f, r, env, n)
        if r.shape != (n, self.n_groups):
            r = _expand(r, (n, self.n_groups))
        return r

    def _rates(self, env: dict, n: int) -> list[np.ndarray]:
        shape = (n, self.n_groups)
        out = []
        for f, expr in enumerate(self._flow_rates):
            with np.errstate(all="ignore"):  # a NaN or infinity is reported by the guard, not as a warning
                r = np.broadcast_to(np.asarray(expr(env), dtype=float), shape)
            self._guard_rate(f, r, env, n)
            out.append(r)
        return out

    def _guard_rate(self, f: int, r: np.ndarray, env: dict, n: int) -> None:
        """A rate must be finite and >= 0 for every particle and group (a spec error otherwise)."""
        where = first_bad(r)
        if where is None:
            return
        full = np.broadcast_to(r, (n, self.n_groups))
        i, g = first_bad(full)  # type: ignore[misc]
        flow = self.spec.flows[f]
        day = float(env.get("t", float("nan")))
        values = {name: float(np.broadcast_to(env[name], (n, self.n_groups))[i, g]) for name in self.param_names if name in env}
        raise ModelGuardError(
            f"model {self.spec.name!r}: the rate of flow {flow.name!r} ({flow.rate!r}) is {float(full[i, g])!r} for group "
            f"{self.groups[g]!r} on day {day:g} (particle {i}: {values}); rates must be finite and >= 0"
        )

    def advance(
        self, particles: ParticleSet, t0: int, t1: int, rng: np.random.Generator, effects: Any = None
    ) -> None:
        """Simulate every particle from day t0 to day t1 (in place).

        ``effects``: interventions compiled for this model
        (:func:`filters.compile_interventions`), consulted once per day. On
        days when nothing is in force, and always with ``effects=None``, the
        day runs exactly the code (and draws exactly the random numbers) it
        runs without interventions.
        """
        if t1 < t0:
            raise ValueError(f"cannot advance backwards from day {t0} to day {t1}")
        if effects is not None:
            effects.check_model(self)
        counts, history = particles.states, particles.history
        n = counts.shape[0]
        track = bool(history.shape[1])
        if track:
            # The day's incidence is summed in a buffer with one contiguous (n, G)
            # block per slot and written to history[:, 0] once the day is done
            # (nothing reads it mid-day).
            incidence = np.empty((len(self._observed_flows), n, self.n_groups), dtype=history.dtype)
        # Each compartment's (n, G) counts as a contiguous copy, written back to
        # ``counts`` when the days are done (or a guard stops them): the in-place
        # updates and the binomial draws of every sub-step then run over
        # contiguous memory instead of a stride-C view. Same values, same draws.
        columns = [np.ascontiguousarray(counts[:, :, c]) for c in range(self.n_compartments)]
        try:
            self._advance_days(particles, t0, t1, rng, effects, columns, incidence if track else None)
        finally:
            for c, column in enumerate(columns):
                counts[:, :, c] = column

    def _advance_days(
        self,
        particles: ParticleSet,
        t0: int,
        t1: int,
        rng: np.random.Generator,
        effects: Any,
        columns: list[np.ndarray],
        incidence: np.ndarray | None,
    ) -> None:
        """The day loop of :meth:`advance` over the compartments' (n, G) ``columns``;
        ``incidence`` (slots, n, G) is the day's buffer (None: no history kept)."""
        history = particles.history
        n = columns[0].shape[0]
        slots = self._observed_flows
        dt = self.dt
        n_flows = len(self._flow_rates)
        track = incidence is not None
        for day in range(t0, t1):
            self._drift(particles.params, rng)
            scalars = self._scalars(particles.params, day)
            day_env = self._day_env(scalars, day, n)
            if track:
                incidence.fill(0)
            today = None if effects is None else effects.on_day(day)
            if today is not None:
                self._day_with_effects(today, day, day_env, scalars, columns, n, rng, incidence)
                if track:
                    _shift_days(history)
                    history[:, 0] = incidence.transpose(1, 0, 2)
                continue
            # Rates, leave probabilities and shares that are fixed for the day.
            rates: list = [None] * n_flows
            for f, dynamic in enumerate(self._rate_is_dynamic):
                if not dynamic:
                    rates[f] = self._rate(f, day_env, n)
            fixed = [
                None if dynamic else self._probabilities(rates, flows)
                for (_, flows), dynamic in zip(self._outflows, self._source_is_dynamic)
            ]
            moves: list = [None] * n_flows
            for sub in range(self.spec.substeps_per_day):
                t = day + sub * dt
                env = self._substep_env(day_env, scalars, columns, t)
                for f, dynamic in enumerate(self._rate_is_dynamic):
                    if dynamic:
                        rates[f] = self._rate(f, env, n)
                # Every move is drawn from the counts at the start of the sub-step.
                for (c, flows), probs in zip(self._outflows, fixed):
                    p_leave, shares = probs if probs is not None else self._probabilities(rates, flows)
                    self._draw(columns[c], flows, p_leave, shares, rng, moves)
                for f, (c_from, c_to) in enumerate(self._flow_ends):
                    columns[c_from] -= moves[f]
                    columns[c_to] += moves[f]
                if track:
                    for k, f in enumerate(slots):
                        incidence[k] += moves[f]
            if track:
                _shift_days(history)
                history[:, 0] = incidence.transpose(1, 0, 2)

    def _day_with_effects(
        self,
        today: Any,
        day: int,
        day_env: dict,
        scalars: dict,
        columns: list[np.ndarray],
        n: int,
        rng: np.random.Generator,
        incidence: np.ndarray | None,
    ) -> None:
        """One day's sub-steps with interventions in force (``today``: a DayEffects).

        The same scheme as the ordinary day, with three changes: rates of flows
        in ``today.rate_factors`` are multiplied by their per-group factors
        wherever they are evaluated; the force of infection reads
        ``today.contact_t``; and each source in ``today.extra`` gets extra
        competing outflows (vaccination), included in its leave probability.

        Random numbers: a source's leave draw and the split draws of all its
        model flows but the last are made where the ordinary day makes them.
        The splits that the extra outflows add (last model flow versus the
        extra ones, then among the extra ones) are drawn after every ordinary
        draw of the sub-step, so the other compartments' draws keep their
        places in the stream; scenario runs that share random numbers stay
        aligned as far as the changed probabilities allow.
        """
        dt = self.dt
        n_flows = len(self._flow_rates)
        factors = today.rate_factors
        shape = (n, self.n_groups)
        extra = {c: [(target, _expand(rate, shape)) for target, rate in xs] for c, xs in today.extra.items()}
        rates: list = [None] * n_flows
        for f, dynamic in enumerate(self._rate_is_dynamic):
            if not dynamic:
                rates[f] = self._rate(f, day_env, n)
                if f in factors:
                    rates[f] = rates[f] * factors[f]
        sources = {c for c, _ in self._outflows}
        # Sources with extra outflows but no flow of their own: drawn wholly after the ordinary draws.
        extra_only = [(c, xs) for c, xs in extra.items() if c not in sources]
        fixed = [
            None if dynamic else self._probabilities_with_extra(rates, flows, extra.get(c))
            for (c, flows), dynamic in zip(self._outflows, self._source_is_dynamic)
        ]
        fixed_extra_only = [self._probabilities_with_extra(rates, [], xs) for _, xs in extra_only]
        moves: list = [None] * n_flows
        for sub in range(self.spec.substeps_per_day):
            t = day + sub * dt
            env = self._substep_env(day_env, scalars, columns, t, contact_t=today.contact_t)
            for f, dynamic in enumerate(self._rate_is_dynamic):
                if dynamic:
                    rates[f] = self._rate(f, env, n)
                    if f in factors:
                        rates[f] = rates[f] * factors[f]
            deferred: list = []
            for (c, flows), probs in zip(self._outflows, fixed):
                xs = extra.get(c)
                p_leave, shares, tail = probs if probs is not None else self._probabilities_with_extra(rates, flows, xs)
                if xs is None:
                    self._draw(columns[c], flows, p_leave, shares, rng, moves)
                    continue
                remaining = rng.binomial(columns[c], p_leave)
                for f, share in zip(flows[:-1], shares):
                    moved = rng.binomial(remaining, share)
                    moves[f] = moved
                    remaining = remaining - moved
                deferred.append((c, flows[-1], xs, remaining, tail))
            for (c, xs), (p_leave, _, tail) in zip(extra_only, fixed_extra_only):
                deferred.append((c, None, xs, rng.binomial(columns[c], p_leave), tail))
            extra_moves: list = []  # (source, target, moved)
            for c, last, xs, remaining, tail in deferred:
                # What is left splits among the last model flow (if any), then the extra outflows.
                ends = ([] if last is None else [(None, last)]) + [(target, None) for target, _ in xs]
                for k, (target, flow) in enumerate(ends):
                    if k < len(tail):
                        moved = rng.binomial(remaining, tail[k])
                        remaining = remaining - moved
                    else:
                        moved = remaining  # the last destination takes the rest
                    if flow is not None:
                        moves[flow] = moved
                    else:
                        extra_moves.append((c, target, moved))
            for f, (c_from, c_to) in enumerate(self._flow_ends):
                columns[c_from] -= moves[f]
                columns[c_to] += moves[f]
            for c_from, c_to, moved in extra_moves:
                columns[c_from] -= moved
                columns[c_to] += moved
            if incidence is not None:
                for k, f in enumerate(self._observed_flows):
                    incidence[k] += moves[f]

    def _probabilities_with_extra(
        self, rates: list, flows: list[int], extra: list | None
    ) -> tuple[np.ndarray, list[np.ndarray], list[np.ndarray]]:
        """Leave probability and split shares of a source with extra outflows.

        Returns (p_leave, shares, tail): ``shares`` split the leavers among
        ``flows[:-1]`` in order, as in :meth:`_probabilities`; ``tail`` then
        splits what is left among ``flows[-1]`` and the extra outflows (all but
        the last get a share; the last takes the rest). With ``extra`` None this
        is :meth:`_probabilities` with an empty tail.
        """
        if extra is None:
            p_leave, shares = self._probabilities(rates, flows)
            return p_leave, shares, []
        parts = [rates[f] for f in flows] + [rate for _, rate in extra]
        total = parts[0]
        for r in parts[1:]:
            total = total + r
        p_leave = total * -self.dt
        np.expm1(p_leave, out=p_leave)
        np.negative(p_leave, out=p_leave)
        split: list[np.ndarray] = []
        rate_left = total
        for r in parts[:-1]:
            with np.errstate(divide="ignore", invalid="ignore"):
                share = np.where(rate_left > 0, r / rate_left, 0.0)
            split.append(np.clip(share, 0.0, 1.0))
            rate_left = rate_left - r
        head = max(len(flows) - 1, 0)
        return p_leave, split[:head], split[head:]

    def _probabilities(self, rates: list, flows: list[int]) -> tuple[np.ndarray, list[np.ndarray]]:
        """Leave probability 1 - exp(-sum(rates) dt) and the sequential split shares."""
        total = rates[flows[0]]
        for f in flows[1:]:
            total = total + rates[f]  # same order and bits as np.sum(list, axis=0)
        p_leave = total * -self.dt  # == -(total * dt) exactly
        np.expm1(p_leave, out=p_leave)
        np.negative(p_leave, out=p_leave)
        shares = []
        rate_left = total
        for f in flows[:-1]:
            with np.errstate(divide="ignore", invalid="ignore"):
                share = np.where(rate_left > 0, rates[f] / rate_left, 0.0)
            shares.append(np.clip(share, 0.0, 1.0))
            rate_left = rate_left - rates[f]
        return p_leave, shares

    @staticmethod
    def _draw(occupants, flows, p_leave, shares, rng, moves) -> None:
        """Sequential binomials: who leaves, then how they split among the flows."""
        remaining = rng.binomial(occupants, p_leave)
        for f, share in zip(flows[:-1], shares):
            moved = rng.binomial(remaining, share)
            moves[f] = moved
            remaining = remaining - moved
        moves[flows[-1]] = remaining

    def _euler_multinomial(self, counts, rates, rng):
        """One sub-step: (source, target, flow, moved) for every flow, in flow order."""
        moved: list = [None] * len(rates)
        for c, flows in self._outflows:
            p_leave, shares = self._probabilities(rates, flows)
            self._draw(counts[:, :, c], flows, p_leave, shares, rng, moved)
        return [(s, d, f, moved[f]) for f, (s, d) in enumerate(self._flow_ends)]

    def _drift(self, params: np.ndarray, rng: np.random.Generator) -> None:
        for j in self._drifting:
            transform, bounds = self._transforms[j]
            y = to_unconstrained(np.ascontiguousarray(params[:, j]), transform, bounds)
            y = y + self._volatility[j] * rng.standard_normal(params.shape[0])
            params[:, j] = from_unconstrained(y, transform, bounds)


    # -------------------------------------------------------------- summaries
    def flow_rates(self, particles: ParticleSet, t: float = 0.0) -> dict[str, np.ndarray]:
        """Per-capita rate of every flow at time ``t`` from the particles' current counts,
        ``{flow: ndarray of shape (n_particles, n_groups)}``; a bad rate raises ModelGuardError."""
        n = particles.size
        env = self._rate_env(self._scalars(particles.params, t), particles.states, t)
        return {f.name: np.broadcast_to(self._rate(i, env, n), (n, self.n_groups)).copy() for i, f in enumerate(self.spec.flows)}

    def basic_reproduction_number(self, particles: ParticleSet, t: float = 0.0) -> np.ndarray:
        """R0 per particle: the next-generation number with every person in the remainder
        compartment (the susceptibles, in every shipped spec) and the particles' parameters."""
        counts = np.zeros_like(particles.states)
        counts[:, :, self._cidx[self.spec.initial.remainder]] = self.population
        naive = ParticleSet(states=counts, params=particles.params, history=particles.history[:, :0])
        return self.reproduction_number(naive, t)

    def _ngm_plan(self) -> tuple[dict[int, int], list[int], list[int], list[int], bool]:
        """What :meth:`reproduction_number` needs from the flow graph, worked out once:
        the infected classes' positions, the infection flows entering them, the other
        flows leaving them, the entry classes and whether an exit rate reads foi."""
        plan = getattr(self, "_ngm_cache", None)
        if plan is None:
            pos = {c: k for k, c in enumerate(self._infected)}
            infection = self._infection_flows
            entering = [f for f in infection if self._flow_ends[f][1] in pos]
            exits = [f for f, (src, _) in enumerate(self._flow_ends) if src in pos and f not in infection]
            entries = sorted({pos[self._flow_ends[f][1]] for f in entering})
            reads_foi = any("foi" in self._flow_rates[f].names for f in exits)
            plan = self._ngm_cache = (pos, entering, exits, entries, reads_foi)
        return plan

    def reproduction_number(self, particles: ParticleSet, t: float = 0.0, today: Any = None) -> np.ndarray:
        """Effective reproduction number per particle from the next-generation matrix
        (van den Driessche & Watmough 2002), at the particles' current susceptibles.

        Assumes each infection flow's per-capita rate is linear in ``foi``.
        ``today`` (a DayEffects from ``Effects.on_day``) applies interventions:
        rate factors on the flows they change, the changed contact matrix, and
        extra outflows (e.g. vaccination) from infected classes.

        K = F V^-1 over the infected classes of every group. F[(g, d), (h, c)] =
        a[g, d] C[g, h] w_c / N_h, where a[g, d] sums slope x susceptibles over
        the infection flows entering class d, and V is block-diagonal by group.
        So K[(g, d), (h, e)] = a[g, d] C[g, h] / N_h u_h[e] with u_h = V_h^-T w
        (the expected weighted infectious time of someone entering class e of
        group h). Rows of K for classes no infection enters are zero, so the
        spectral radius of K is that of its block on the entry classes: G x G
        when infections enter one class. That block's spectral radius is taken
        in closed form when it is 1 x 1 or 2 x 2 and with ``numpy.linalg.eigvals``
        otherwise: the same quantity as the dense definition, without the
        batched inverse and eigen-decomposition of the full matrix.
        """
        infected = self._infected
        n = particles.size
        infection = self._infection_flows
        if not infected or not infection:
            return np.full(n, np.nan)
        G, m_c = self.n_groups, len(infected)
        pos, entering, exits, entries, exits_read_foi = self._ngm_plan()
        if not entering:
            return np.zeros(n)  # F = 0
        counts = particles.states
        scalars = self._scalars(particles.params, t)
        # The slopes of infection rates are taken with foi set to 0 and 1; the force of
        # infection itself is only needed if a rate that enters V reads it.
        columns = [counts[:, :, c] for c in range(self.n_compartments)]
        env = self._substep_env(self._day_env(scalars, t, n), scalars, columns, t, with_foi=False)
        full = self._full_constants(n)
        env0 = dict(env, foi=full["foi=0"], imported=0.0)
        env1 = dict(env, foi=full["foi=1"], imported=0.0)
        if exits_read_foi:
            env["foi"] = self._foi(counts)
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            # a[i]: (n, G) sum of slope x susceptibles over infection flows entering class entries[i].
            a = [np.zeros((n, G)) for _ in entries]
            factors = today.rate_factors if today is not None else {}
            for f in entering:
                src, dst = self._flow_ends[f]
                slope = np.asarray(self._flow_rates[f](env1), float) - np.asarray(self._flow_rates[f](env0), float)
                if f in factors:
                    slope = slope * factors[f]
                a[entries.index(pos[dst])] += slope * counts[:, :, src]
            # V of every group as an m_c x m_c table of (n, G) arrays (0.0 where no flow);
            # 1e-12 on the diagonal keeps it invertible when a class has no exit.
            V: list[list] = [[0.0] * m_c for _ in range(m_c)]
            exit_rates = [(src, dst, self._rate(f, env, n) * factors[f] if f in factors else self._rate(f, env, n))
                          for f in exits for src, dst in [self._flow_ends[f]]]
            if today is not None:
                exit_rates += [(src, dst, rate) for src, xs in today.extra.items() if src in pos for dst, rate in xs]
            for src, dst, rate in exit_rates:
                V[pos[src]][pos[src]] = V[pos[src]][pos[src]] + rate
                if dst in pos:
                    V[pos[dst]][pos[src]] = V[pos[dst]][pos[src]] - rate
            for i in range(m_c):
                V[i][i] = V[i][i] + 1e-12
            transposed = [[V[j][i] for j in range(m_c)] for i in range(m_c)]
            u = _solve_table(transposed, [float(self._infectious_w[c]) for c in infected])
            u = [x if isinstance(x, np.ndarray) and x.shape == (n, G) and x.dtype == float
                 else np.broadcast_to(np.asarray(x, dtype=float), (n, G)) for x in u]
            contact = self.contact if today is None or today.contact_t is None else today.contact_t.T
            coupling = contact / self.population[None, :]  # C[g, h] / N_h
            rows = [(g, i) for g in range(G) for i in range(len(entries))]
            K = [[a[i][:, g] * coupling[g, h] * u[entries[j]][:, h] for h, j in rows] for g, i in rows]
            return _spectral_radius(K, n)

    def describe(self, particles: ParticleSet, t: float = 0.0) -> dict[str, np.ndarray]:
        """Per-particle quantities to summarise: counts per compartment and group, the
        day's incidence of observed flows, the non-fixed parameters and R_eff.

        Each is a contiguous (n,) array: the counts (and parameters, and the day's
        incidence) are transposed in one copy each, much cheaper than reading every
        column through a strided view (a summary sorts and copies each column).
        """
        out: dict[str, np.ndarray] = {}
        by_column = np.ascontiguousarray(particles.states.transpose(2, 1, 0))  # (C, G, n)
        for c, cname in enumerate(self.compartments):
            for g, gname in enumerate(self.groups):
                out[f"{cname}[{gname}]"] = by_column[c, g]
        if self.history_days:
            flow_names = [f.name for f in self.spec.flows]
            today = np.ascontiguousarray(particles.history[:, 0].transpose(1, 2, 0))  # (flows, G, n)
            for k, f in enumerate(self._observed_flows):
                for g, gname in enumerate(self.groups):
                    out[f"incidence.{flow_names[f]}[{gname}]"] = today[k, g]
        params = np.ascontiguousarray(particles.params.T)
        for j, name in enumerate(self.param_names):
            if self.spec.parameters[name].kind != "fixed":
                out[name] = params[j]
        out["R_eff"] = self.reproduction_number(particles, t)
        return out

