"""Stochastic compartmental models compiled from a :class:`ModelSpec`.

Dynamics follow the Euler-multinomial scheme (Breto, He, Ionides & King 2009):
in every sub-step of length dt, the occupants of each compartment leave with
probability 1 - exp(-sum(rates) * dt) and are split among the destinations in
proportion to the rates (sequential binomials). Counts stay integer,
non-negative, and each group's population is conserved exactly.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from schemas import ModelSpec

from ._expressions import CompiledExpression, ExpressionError, compile_expression
from ._observation import (
    Observation,
    ObservationError,
    binomial_loglik,
    delay_kernel,
    negbin_loglik,
    poisson_loglik,
)
from ._particles import ParticleSet
from ._priors import from_unconstrained, sample_prior, to_unconstrained

__all__ = ["CompartmentalModel", "ModelError"]

# Counts above this are rejected as implausible for a surveillance series.
MAX_COUNT = 1e9


class ModelError(ValueError):
    """A model spec compiles to something that cannot run."""


@dataclass(frozen=True)
class _CompiledSeries:
    name: str
    kind: str
    slot: int  # observed-flow slot (incidence) or compartment index (prevalence)
    group_mask: np.ndarray  # (G,) of 0/1
    weights: np.ndarray  # (L_s,) weights over history days (incidence)
    reporting: float | int  # constant fraction, or parameter column if int via _param
    reporting_param: int | None
    noise: str
    dispersion: float
    dispersion_param: int | None
    weekly: bool


class CompartmentalModel:
    """A vectorised stochastic compartmental model (implements ``Model``).

    Parameters
    ----------
    spec : ModelSpec
        A validated spec; see ``schemas/models`` for examples.
    """

    def __init__(self, spec: ModelSpec) -> None:
        self.spec = spec
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
        observed = [s.flow for s in spec.series if s.kind == "incidence"]
        flow_names = [f.name for f in spec.flows]
        self._observed_flows = [flow_names.index(f) for f in dict.fromkeys(observed)]
        self._slot_of = {flow_names[f]: k for k, f in enumerate(self._observed_flows)}
        self.series: list[_CompiledSeries] = []
        history_days = 0
        for s in spec.series:
            mask = np.zeros(self.n_groups)
            for g in s.groups or self.groups:
                mask[self.groups.index(g)] = 1.0
            kernel = (
                delay_kernel(s.delay.dist, s.delay.mean, s.delay.sd, s.delay.max_days)
                if s.delay is not None
                else np.ones(1)
            )
            weights = np.convolve(kernel, np.ones(7)) if s.cadence == "weekly" else kernel
            if s.kind == "incidence":
                history_days = max(history_days, weights.size)
            rep_param = self._resolve(s.reporting, f"series {s.name!r} reporting")
            disp_param = self._resolve(s.noise.dispersion, f"series {s.name!r} dispersion")
            self.series.append(
                _CompiledSeries(
                    name=s.name,
                    kind=s.kind,
                    slot=self._slot_of[s.flow] if s.kind == "incidence" else self._cidx[s.compartment],  # type: ignore[index]
                    group_mask=mask,
                    weights=weights,
                    reporting=s.reporting if rep_param is None else 0.0,  # type: ignore[arg-type]
                    reporting_param=rep_param,
                    noise=s.noise.dist,
                    dispersion=float(s.noise.dispersion) if disp_param is None and s.noise.dispersion is not None else 0.0,
                    dispersion_param=disp_param,
                    weekly=s.cadence == "weekly",
                )
            )
        self.history_days = history_days
        self._series_by_name = {s.name: s for s in self.series}
        self._infected = self._infected_compartments()

    def _resolve(self, ref: float | str | None, where: str) -> int | None:
        if isinstance(ref, str):
            if ref in self._pidx:
                return self._pidx[ref]
            raise ModelError(f"{where}: {ref!r} must be a parameter; allowed: {self.param_names}")
        return None

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
    def fingerprint(self) -> str:
        return self.spec.fingerprint()

    def initial(self, n: int, rng: np.random.Generator) -> ParticleSet:
        params = np.empty((n, len(self.param_names)))
        for j, p in enumerate(self.spec.parameters.values()):
            params[:, j] = p.value if p.kind == "fixed" else sample_prior(p.prior, rng, n)
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
        if self._infectious_w.any():
            weighted = x @ self._infectious_w  # (n, G)
            env["foi"] = (weighted / self.population) @ self.contact.T
        else:
            env["foi"] = 0.0
        if self._importation is not None:
            env["imported"] = np.asarray(self._importation(env), dtype=float) / self.population.sum()
        else:
            env["imported"] = 0.0
        return env

    def _rates(self, env: dict, n: int) -> list[np.ndarray]:
        shape = (n, self.n_groups)
        out = []
        for expr in self._flow_rates:
            r = np.broadcast_to(np.asarray(expr(env), dtype=float), shape)
            # Negative or undefined rates (e.g. from sin or 0/0) mean "no flow".
            out.append(np.where(r > 0, r, 0.0))
        return out

    def advance(self, particles: ParticleSet, t0: int, t1: int, rng: np.random.Generator) -> None:
        """Simulate every particle from day t0 to day t1 (in place)."""
        if t1 < t0:
            raise ValueError(f"cannot advance backwards from day {t0} to day {t1}")
        counts, history = particles.states, particles.history
        n = counts.shape[0]
        slots = self._observed_flows
        dt = self.dt
        for day in range(t0, t1):
            self._drift(particles.params, rng)
            scalars = self._scalars(particles.params, day)
            if history.shape[1]:
                history[:, 1:] = history[:, :-1]
                history[:, 0] = 0
            for sub in range(self.spec.substeps_per_day):
                t = day + sub * dt
                rates = self._rates(self._rate_env(scalars, counts, t), n)
                moves = self._euler_multinomial(counts, rates, rng)
                for c_from, c_to, flow, moved in moves:
                    counts[:, :, c_from] -= moved
                    counts[:, :, c_to] += moved
                if history.shape[1]:
                    for k, f in enumerate(slots):
                        history[:, 0, k] += moves[f][3]

    def _euler_multinomial(self, counts, rates, rng):
        """One sub-step: (source, target, flow, moved) for every flow, in flow order."""
        dt = self.dt
        moves: list = [None] * len(rates)
        for c, flows in self._outflows:
            occupants = counts[:, :, c]
            total = rates[flows[0]] if len(flows) == 1 else np.sum([rates[f] for f in flows], axis=0)
            leave = rng.binomial(occupants, -np.expm1(-total * dt))
            remaining, rate_left = leave, total
            for f in flows[:-1]:
                with np.errstate(divide="ignore", invalid="ignore"):
                    share = np.where(rate_left > 0, rates[f] / rate_left, 0.0)
                moved = rng.binomial(remaining, np.clip(share, 0.0, 1.0))
                moves[f] = (c, self._flow_ends[f][1], f, moved)
                remaining = remaining - moved
                rate_left = rate_left - rates[f]
            last = flows[-1]
            moves[last] = (c, self._flow_ends[last][1], last, remaining)
        return moves

    def _drift(self, params: np.ndarray, rng: np.random.Generator) -> None:
        for j in self._drifting:
            transform, bounds = self._transforms[j]
            y = to_unconstrained(params[:, j], transform, bounds)
            y = y + self._volatility[j] * rng.standard_normal(params.shape[0])
            params[:, j] = from_unconstrained(y, transform, bounds)

    # -------------------------------------------------------------- observing
    def check_observation(self, observation: Observation) -> None:
        for name, value in observation.values.items():
            if name not in self._series_by_name:
                raise ObservationError(
                    f"series {name!r} is not observed by model {self.spec.name!r}; "
                    f"allowed: {sorted(self._series_by_name)}"
                )
            if value is None:
                continue
            v = float(value)
            if not math.isfinite(v) or v < 0 or v != math.floor(v) or v > MAX_COUNT:
                raise ObservationError(
                    f"series {name!r} has count {value!r}; counts must be whole numbers "
                    f"between 0 and {MAX_COUNT:.0e}"
                )

    def _column(self, params: np.ndarray, col: int | None, const: float) -> np.ndarray | float:
        return params[:, col] if col is not None else const

    def expected(self, particles: ParticleSet, series: str) -> np.ndarray:
        """Expected reported count (incidence) or true size (prevalence) per particle."""
        s = self._series_by_name[series]
        rho = self._column(particles.params, s.reporting_param, s.reporting)
        if s.kind == "prevalence":
            return rho * (particles.states[:, :, s.slot] @ s.group_mask)
        daily = particles.history[:, : s.weights.size, s.slot, :] @ s.group_mask  # (n, L)
        return rho * (daily @ s.weights)

    def _trials(self, particles: ParticleSet, s: _CompiledSeries) -> np.ndarray:
        if s.kind == "prevalence":
            return particles.states[:, :, s.slot] @ s.group_mask.astype(np.int64)
        return particles.history[:, : s.weights.size, s.slot, :] @ s.group_mask.astype(np.int64) @ np.ones(
            s.weights.size, dtype=np.int64
        )

    def log_likelihood(self, particles: ParticleSet, observation: Observation) -> np.ndarray:
        self.check_observation(observation)
        total = np.zeros(particles.size)
        for name, y in observation.present().items():
            s = self._series_by_name[name]
            y = float(y)
            if s.noise == "binomial":
                rho = self._column(particles.params, s.reporting_param, s.reporting)
                total += binomial_loglik(y, self._trials(particles, s), rho)
                continue
            mu = self.expected(particles, name)
            if s.noise == "poisson":
                total += poisson_loglik(y, mu)
            else:
                k = self._column(particles.params, s.dispersion_param, s.dispersion)
                total += negbin_loglik(y, mu, k)
        return total

    def sample_observation(self, particles: ParticleSet, rng: np.random.Generator) -> dict[str, np.ndarray]:
        """Draw one set of reported counts per particle from the observation model."""
        out = {}
        for s in self.series:
            rho = self._column(particles.params, s.reporting_param, s.reporting)
            if s.noise == "binomial":
                out[s.name] = rng.binomial(self._trials(particles, s), rho)
                continue
            mu = self.expected(particles, s.name)
            if s.noise == "poisson":
                out[s.name] = rng.poisson(mu)
            else:
                k = np.broadcast_to(self._column(particles.params, s.dispersion_param, s.dispersion), mu.shape)
                # Gamma-Poisson mixture: mean mu, variance mu + mu^2 / k.
                out[s.name] = rng.poisson(rng.gamma(k, np.where(mu > 0, mu, 0.0) / k))
        return out

    # -------------------------------------------------------------- summaries
    def reproduction_number(self, particles: ParticleSet, t: float = 0.0) -> np.ndarray:
        """Effective reproduction number per particle from the next-generation matrix
        (van den Driessche & Watmough 2002), at the particles' current susceptibles.

        Assumes each infection flow's per-capita rate is linear in ``foi``.
        """
        infected = self._infected
        n = particles.size
        infection = [i for i, f in enumerate(self.spec.flows) if f.infection]
        if not infected or not infection:
            return np.full(n, np.nan)
        G, m_c = self.n_groups, len(infected)
        m = G * m_c
        counts = particles.states
        scalars = self._scalars(particles.params, t)
        env = self._rate_env(scalars, counts, t)
        rates = self._rates(env, n)
        env0 = dict(env, foi=np.zeros((n, G)), imported=0.0)
        env1 = dict(env, foi=np.ones((n, G)), imported=0.0)
        pos = {c: k for k, c in enumerate(infected)}
        F = np.zeros((n, m, m))
        for f in infection:
            src, dst = self._flow_ends[f]
            if dst not in pos:
                continue
            slope = np.broadcast_to(
                np.asarray(self._flow_rates[f](env1), float) - np.asarray(self._flow_rates[f](env0), float), (n, G)
            )
            susceptible = counts[:, :, src].astype(float)
            for g in range(G):
                for j in range(G):
                    for c in infected:
                        w = self._infectious_w[c]
                        if w:
                            F[:, g * m_c + pos[dst], j * m_c + pos[c]] += (
                                slope[:, g] * susceptible[:, g] * self.contact[g, j] * w / self.population[j]
                            )
        V = np.zeros((n, m, m))
        for f, (src, dst) in enumerate(self._flow_ends):
            if src not in pos or f in infection:
                continue
            for g in range(G):
                V[:, g * m_c + pos[src], g * m_c + pos[src]] += rates[f][:, g]
                if dst in pos:
                    V[:, g * m_c + pos[dst], g * m_c + pos[src]] -= rates[f][:, g]
        V += np.eye(m) * 1e-12  # keeps V invertible when an infected class has no exit
        K = F @ np.linalg.inv(V)
        return np.max(np.abs(np.linalg.eigvals(K)), axis=1)

    def describe(self, particles: ParticleSet, t: float = 0.0) -> dict[str, np.ndarray]:
        out: dict[str, np.ndarray] = {}
        counts = particles.states
        for c, cname in enumerate(self.compartments):
            for g, gname in enumerate(self.groups):
                out[f"{cname}[{gname}]"] = counts[:, g, c]
        if self.history_days:
            flow_names = [f.name for f in self.spec.flows]
            for k, f in enumerate(self._observed_flows):
                for g, gname in enumerate(self.groups):
                    out[f"incidence.{flow_names[f]}[{gname}]"] = particles.history[:, 0, k, g]
        for j, name in enumerate(self.param_names):
            if self.spec.parameters[name].kind != "fixed":
                out[name] = particles.params[:, j]
        out["R_eff"] = self.reproduction_number(particles, t)
        return out

    # ------------------------------------------------------------- transforms
    def to_unconstrained(self, params: np.ndarray) -> np.ndarray:
        out = np.array(params, dtype=float)
        for j, (transform, bounds) in enumerate(self._transforms):
            out[..., j] = to_unconstrained(out[..., j], transform, bounds)
        return out

    def from_unconstrained(self, values: np.ndarray) -> np.ndarray:
        out = np.array(values, dtype=float)
        for j, (transform, bounds) in enumerate(self._transforms):
            out[..., j] = from_unconstrained(out[..., j], transform, bounds)
        return out
