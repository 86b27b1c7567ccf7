"""The reference model written as a per-particle Python loop: the `naive` baseline of the update section.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from filters import (
    CompartmentalModel,
    Observation,
    compile_expression,
    delay_kernel,
)


# ---------------------------------------------------------------------- naive
def _to_unconstrained(x: float, transform: str, bounds: tuple[float, float]) -> float:
    if transform == "log":
        return math.log(max(x, 1e-300))
    if transform == "logit":
        lo, hi = bounds
        u = min(max((x - lo) / (hi - lo), 1e-12), 1 - 1e-12)
        return math.log(u) - math.log1p(-u)
    return x


def _from_unconstrained(y: float, transform: str, bounds: tuple[float, float]) -> float:
    if transform == "log":
        return math.exp(y)
    if transform == "logit":
        lo, hi = bounds
        return lo + (hi - lo) / (1.0 + math.exp(-y))
    return y


class NaiveModel:
    """The reference model written the slow way: one particle at a time, scalar draws.

    Built from the public model spec (not from the vectorised engine's internals),
    so it is also an independent re-implementation of the same dynamics: the
    Euler-multinomial scheme with sequential binomials, the random-walk drift of
    drifting parameters, the contact-matrix force of infection and importation,
    and the Poisson / negative-binomial likelihood of daily incidence series with
    reporting-delay kernels. Other spec features (weekly series, prevalence and
    binomial series) are outside what the benchmark needs and are refused.
    """

    def __init__(self, model: CompartmentalModel) -> None:
        spec = model.spec
        for s in spec.series:
            if s.kind != "incidence" or s.cadence != "daily" or s.noise.dist == "binomial":
                raise NotImplementedError(f"naive baseline covers daily incidence series only, not {s.name!r}")
        self.spec = spec
        self.compartments = list(spec.compartments)
        self.cidx = {c: i for i, c in enumerate(self.compartments)}
        self.groups = [g.name for g in spec.groups]
        self.population = [int(g.population) for g in spec.groups]
        self.total_population = sum(self.population)
        self.group_values = [dict(g.values) for g in spec.groups]
        self.substeps = spec.substeps_per_day
        self.dt = 1.0 / spec.substeps_per_day
        self.param_names = list(spec.parameters)
        self.drifting = [
            (j, p.volatility, p.transform, p.bounds)
            for j, p in enumerate(spec.parameters.values())
            if p.kind == "drifting"
        ]
        contact = spec.transmission.contact
        self.contact = [list(map(float, row)) for row in (contact if contact is not None else [[1.0]])]
        self.infectious = [(self.cidx[c], float(w)) for c, w in spec.transmission.infectious.items()]
        scalars = set(self.param_names) | {"t"}
        self.derived = []
        for name, source in spec.derived.items():
            self.derived.append((name, compile_expression(source, scalars)))
            scalars.add(name)
        self.importation = (
            compile_expression(spec.transmission.importation, scalars) if spec.transmission.importation else None
        )
        rate_names = scalars | set(self.compartments) | set(self.group_values[0]) | {"N", "foi", "imported"}
        self.flows = [
            (self.cidx[f.source], self.cidx[f.target], compile_expression(f.rate, rate_names)) for f in spec.flows
        ]
        # Flows out of each compartment, in spec order (the order of the sequential binomials).
        self.outflows = [
            (c, [f for f, (src, _, _) in enumerate(self.flows) if src == c])
            for c in range(len(self.compartments))
            if any(src == c for src, _, _ in self.flows)
        ]
        flow_names = [f.name for f in spec.flows]
        observed = list(dict.fromkeys(s.flow for s in spec.series))
        self.observed = [flow_names.index(f) for f in observed]
        self.series = []
        for s in spec.series:
            kernel = [1.0] if s.delay is None else list(
                delay_kernel(s.delay.dist, s.delay.mean, s.delay.sd, s.delay.max_days)
            )
            groups = [self.groups.index(g) for g in (s.groups or self.groups)]
            reporting = s.reporting if isinstance(s.reporting, str) else float(s.reporting)
            dispersion = s.noise.dispersion
            self.series.append((s.name, observed.index(s.flow), groups, kernel, reporting, s.noise.dist, dispersion))

    def _value(self, ref: float | str | None, params: list[float]) -> float:
        return params[self.param_names.index(ref)] if isinstance(ref, str) else float(ref)  # type: ignore[arg-type]

    def advance_particle(
        self, state: list[list[int]], params: list[float], history: list[list[list[int]]], t0: int, t1: int,
        rng: np.random.Generator,
    ) -> None:
        """Move one particle from day t0 to t1 in place (state[g][c], history[day][slot][g])."""
        G = len(self.groups)
        for day in range(t0, t1):
            for j, vol, transform, bounds in self.drifting:
                y = _to_unconstrained(params[j], transform, bounds) + vol * float(rng.standard_normal())
                params[j] = _from_unconstrained(y, transform, bounds)
            env: dict[str, Any] = dict(zip(self.param_names, params))
            env["t"] = float(day)
            for name, expr in self.derived:
                env[name] = float(expr(env))
            if history:
                history.insert(0, [[0] * G for _ in self.observed])
                history.pop()
            for sub in range(self.substeps):
                env["t"] = day + sub * self.dt
                imported = float(self.importation(env)) / self.total_population if self.importation else 0.0
                prevalence = [
                    sum(w * state[j][c] for c, w in self.infectious) / self.population[j] for j in range(G)
                ]
                moves = []  # per group: moved count per flow
                for g in range(G):
                    genv = dict(env)
                    genv.update(self.group_values[g])
                    genv["N"] = float(self.population[g])
                    genv["imported"] = imported
                    genv["foi"] = sum(self.contact[g][j] * prevalence[j] for j in range(G))
                    for c, name in enumerate(self.compartments):
                        genv[name] = float(state[g][c])
                    rates = []
                    for _, _, expr in self.flows:
                        r = float(expr(genv))
                        rates.append(r if r > 0 else 0.0)
                    moved = [0] * len(self.flows)
                    for c, out in self.outflows:
                        total = sum(rates[f] for f in out)
                        remaining = int(rng.binomial(state[g][c], -math.expm1(-total * self.dt)))
                        left = total
                        for f in out[:-1]:
                            share = rates[f] / left if left > 0 else 0.0
                            moved[f] = int(rng.binomial(remaining, min(max(share, 0.0), 1.0)))
                            remaining -= moved[f]
                            left -= rates[f]
                        moved[out[-1]] = remaining
                    moves.append(moved)
                for g in range(G):
                    for f, (src, dst, _) in enumerate(self.flows):
                        state[g][src] -= moves[g][f]
                        state[g][dst] += moves[g][f]
                    if history:
                        for k, f in enumerate(self.observed):
                            history[0][k][g] += moves[g][f]

    def log_likelihood_particle(self, params: list[float], history: list[list[list[int]]], values: dict) -> float:
        """log p(observation | particle) for one particle."""
        total = 0.0
        for name, slot, groups, kernel, reporting, noise, dispersion in self.series:
            y = values.get(name)
            if y is None:
                continue
            y = float(y)
            daily = [sum(history[d][slot][g] for g in groups) for d in range(len(kernel))]
            mu = self._value(reporting, params) * sum(w * x for w, x in zip(kernel, daily))
            if noise == "poisson":
                if y == 0:
                    total += -mu
                elif mu <= 0:
                    return -math.inf
                else:
                    total += y * math.log(mu) - mu - math.lgamma(y + 1.0)
            else:
                k = self._value(dispersion, params)
                if mu <= 0 and y > 0:
                    return -math.inf
                log_p_zero = k * (math.log(k) - math.log(k + mu))
                if y == 0:
                    total += log_p_zero
                else:
                    total += (
                        math.lgamma(y + k) - math.lgamma(k) - math.lgamma(y + 1.0)
                        + log_p_zero + y * (math.log(mu) - math.log(k + mu))
                    )
        return total

    def step(self, arrays: dict[str, np.ndarray], t0: int, observation: Observation, rng: np.random.Generator,
             index: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Propagate the chosen particles one at a time and weight them.

        Returns (states, history, loglik) for those particles.
        """
        states = arrays["states"][index].tolist()
        params = arrays["params"][index].tolist()
        history = arrays["history"][index].tolist()
        loglik = np.empty(len(index))
        present = observation.present()
        for i in range(len(index)):
            self.advance_particle(states[i], params[i], history[i], t0, observation.time, rng)
            loglik[i] = self.log_likelihood_particle(params[i], history[i], present)
        return np.array(states, dtype=np.int64), np.array(history, dtype=np.int64), loglik


