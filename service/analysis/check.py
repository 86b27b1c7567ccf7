"""``casecloud check``: what a model spec and its priors imply, before any observation arrives.

The spec is validated and compiled; a cloud is drawn from its priors and run
forward ``--days`` days (default 60) exactly as the filter would propagate it
(the same code, so the run-time guard rails apply). The report gives ranges of
every compartment and flow rate, R0 and R_eff on day 0 (next-generation matrix),
peak timing and size of new infections, and the prior predictive quantiles of
every observed series. It flags:

* a model error (a NaN, negative or infinite rate, reporting fraction or
  dispersion: the guard's message names where);
* a population that is not conserved;
* priors that put most mass on no outbreak (more than half of the draws have
  R_eff below 1 on day 0 and infect fewer than 1 % of the population by the
  last day: a slow epidemic that is still growing is not flagged) or on
  everyone infected within a week (more than half infect over 90 % by day 7). Infections
  are counted as the fall of the remainder compartment (the susceptibles in
  every shipped spec); with waning immunity that undercounts them.

With ``--history`` the prior predictive band (central 99 %) is drawn over the
data (PNG) and every observation outside it is listed: a prior-data conflict
(Box 1980, "Sampling and Bayes' inference in scientific modelling and
robustness"; Gelman et al. 2020, "Bayesian workflow").

Exit status: 0 nothing flagged, 1 something flagged, 2 unusable arguments or spec.
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import orjson

__all__ = ["CheckResult", "add_check_parser", "check_spec", "run_check_command"]

BAND = (0.005, 0.995)
PROBS = (0.005, 0.05, 0.25, 0.5, 0.75, 0.95, 0.995)
NO_OUTBREAK, EVERYONE = 0.01, 0.9


@dataclass
class CheckResult:
    """Everything the check found; ``flags`` empty means nothing to worry about."""

    model: str
    particles: int
    days: int
    flags: list[str] = field(default_factory=list)
    r0: np.ndarray | None = None  # (n,)
    r_eff: np.ndarray | None = None  # (n,)
    attack: np.ndarray | None = None  # (n,) share infected by the last day
    attack_week: np.ndarray | None = None  # (n,) by day 7
    peak_day: np.ndarray | None = None
    peak_size: np.ndarray | None = None
    compartments: dict[str, tuple[float, float]] = field(default_factory=dict)
    rates: dict[str, tuple[float, float]] = field(default_factory=dict)
    series: dict[str, np.ndarray] = field(default_factory=dict)  # name -> (days, n) draws, day 1 first
    # positivity series with beta-binomial noise -> (days, n) concentration phi of each draw
    positivity_phi: dict[str, np.ndarray] = field(default_factory=dict)
    conflicts: list[dict[str, Any]] = field(default_factory=list)

    def summary(self) -> dict[str, Any]:
        def q(values: np.ndarray | None) -> dict[str, float] | None:
            if values is None:
                return None
            return {f"{p:g}": float(v) for p, v in zip(PROBS, np.quantile(values, PROBS))}

        return {
            "model": self.model,
            "particles": self.particles,
            "days": self.days,
            "flags": self.flags,
            "R0": q(self.r0),
            "R_eff_day0": q(self.r_eff),
            "attack_by_last_day": q(self.attack),
            "attack_by_day_7": q(self.attack_week),
            "peak_day": q(self.peak_day),
            "peak_new_infections": q(self.peak_size),
            "compartment_ranges": {k: list(v) for k, v in self.compartments.items()},
            "flow_rate_ranges": {k: list(v) for k, v in self.rates.items()},
            "series": {
                name: {f"day {d + 1}": {f"{p:g}": float(v) for p, v in zip(PROBS, np.quantile(draws[d], PROBS))}
                       for d in range(0, draws.shape[0], 7)}
                for name, draws in self.series.items()
            },
            "prior_data_conflicts": self.conflicts,
        }


def check_spec(model, particles: int = 1000, days: int = 60, seed: int = 1) -> CheckResult:
    """Draw the prior cloud of ``model`` and run it ``days`` days forward; see the module docstring."""
    from filters import ModelGuardError

    rng = np.random.default_rng(seed)
    result = CheckResult(model=model.spec.name, particles=particles, days=days)
    ps = model.initial(particles, rng)
    population = model.population.astype(np.int64)
    remainder = model.compartments.index(model.spec.initial.remainder)
    s0 = ps.states[:, :, remainder].sum(axis=1).astype(float)
    total = float(population.sum())
    infected_flows = [f.name for f in model.spec.flows if f.infection]
    try:
        result.r0 = model.basic_reproduction_number(ps)
        result.r_eff = model.reproduction_number(ps, 0.0)
        lows = {c: np.inf for c in model.compartments}
        highs = {c: -np.inf for c in model.compartments}
        rate_lo = {f.name: np.inf for f in model.spec.flows}
        rate_hi = {f.name: -np.inf for f in model.spec.flows}
        draws: dict[str, list[np.ndarray]] = {s.name: [] for s in model.series}
        phis: dict[str, list[np.ndarray]] = {s.name: [] for s in model.series if s.kind == "positivity" and s.noise != "binomial"}
        previous_s = s0.copy()
        infections = np.zeros(particles)
        daily_new = []
        for day in range(days + 1):
            totals = ps.states.sum(axis=1)
            for c, name in enumerate(model.compartments):
                lows[name] = min(lows[name], float(totals[:, c].min()))
                highs[name] = max(highs[name], float(totals[:, c].max()))
            for name, r in model.flow_rates(ps, float(day)).items():
                rate_lo[name] = min(rate_lo[name], float(r.min()))
                rate_hi[name] = max(rate_hi[name], float(r.max()))
            if not np.array_equal(ps.states.sum(axis=2), np.broadcast_to(population, ps.states.shape[:2])):
                result.flags.append(f"population not conserved on day {day}")
                break
            if day == days:
                break
            model.advance(ps, day, day + 1, rng)
            s_now = ps.states[:, :, remainder].sum(axis=1).astype(float)
            new = np.maximum(previous_s - s_now, 0.0)
            infections += new
            daily_new.append(new)
            previous_s = s_now
            if day + 1 == 7:
                result.attack_week = infections / total
            for name, values in model.sample_observation(ps, rng).items():
                draws[name].append(np.asarray(values, dtype=float))
            for name in phis:
                s = model.series_named(name)
                phis[name].append(np.broadcast_to(model._column(ps.params, s.dispersion_param, s.dispersion), (particles,)).astype(float))
        result.compartments = {c: (lows[c], highs[c]) for c in model.compartments}
        result.rates = {f: (rate_lo[f], rate_hi[f]) for f in rate_lo}
        result.series = {name: np.array(v) for name, v in draws.items() if v}
        result.positivity_phi = {name: np.array(v) for name, v in phis.items() if v}
        result.attack = infections / total
        if daily_new:
            stacked = np.array(daily_new)  # (days, n)
            result.peak_day = stacked.argmax(axis=0) + 1.0
            result.peak_size = stacked.max(axis=0)
    except ModelGuardError as exc:
        result.flags.append(f"model error: {exc}")
        return result
    if not infected_flows:
        result.flags.append("no flow has infection = true: nothing can spread")
    if result.attack is not None and result.r_eff is not None:
        fading = (result.r_eff < 1) & (result.attack < NO_OUTBREAK)
        if np.mean(fading) > 0.5:
            result.flags.append(
                f"the priors put most mass on no outbreak: {np.mean(fading):.1%} of the prior draws have R_eff below 1 "
                f"on day 0 and infect fewer than {NO_OUTBREAK:.0%} of the population in {days} days"
            )
    if result.attack_week is not None and np.mean(result.attack_week > EVERYONE) > 0.5:
        result.flags.append(
            f"the priors put most mass on everyone infected within a week: {np.mean(result.attack_week > EVERYONE):.1%} "
            f"of the prior epidemics infect over {EVERYONE:.0%} of the population by day 7"
        )
    return result


def _on_band_scale(model, history, i: int, name: str) -> tuple[float | None, float | None]:
    """Row ``i``'s value of ``name`` on the scale of the prior predictive draws, and the limit of
    detection it lies below (else None): a positivity series' draws are shares positive, so its
    positives are divided by their tests; a concentration below its limit is known only as that."""
    value = history.values[i].get(name)
    if value is None:
        return None, None
    kind = getattr(model.series_named(name), "kind", "incidence")
    tests, limits, _ = history.details(i)
    if kind == "positivity" and tests.get(name):
        return value / tests[name], None
    lod = limits.get(name)
    if kind == "concentration" and lod is not None and value < lod:
        return value, lod
    return value, None


def _band(result: CheckResult, model, history, i: int, name: str, day: int) -> tuple[float, float]:
    """The central 99 % prior predictive band of row ``i``'s value on day ``day``.

    A positivity row's share is positives / tests: the draws' shares positive p are turned into
    shares of the row's own number of tests (Binomial(tests, p), or beta-binomial with each
    draw's concentration), so the band holds the test-count noise a real share carries; with
    few tests it is much wider than the band of p."""
    draws = result.series[name][day - 1]
    tests = history.details(i)[0].get(name) if getattr(model.series_named(name), "kind", "") == "positivity" else None
    if tests:
        rng = np.random.default_rng([day, i])  # fixed: the same history gives the same band
        p = np.clip(draws, 0.0, 1.0)
        phi = result.positivity_phi.get(name)
        if phi is not None:
            a, b = p * phi[day - 1], (1.0 - p) * phi[day - 1]
            p = np.where((a > 0) & (b > 0), rng.beta(np.maximum(a, 1e-300), np.maximum(b, 1e-300)), p)
        draws = rng.binomial(int(tests), p) / tests
    lo, hi = np.quantile(draws, BAND)
    return float(lo), float(hi)


def _conflicts(result: CheckResult, model, history, start: dt.date) -> None:
    weekly = {s.name for s in model.series if s.weekly}
    for i, (period, date, counts) in enumerate(zip(history.periods, history.dates, history.values)):
        day = (date - start).days
        for name in counts:
            value, below = _on_band_scale(model, history, i, name)
            if value is None or name not in result.series or not 1 <= day <= result.series[name].shape[0]:
                continue
            if (name in weekly) != ("W" in period):
                continue
            lo, hi = _band(result, model, history, i, name, day)
            # a sample below its limit conflicts only if the band lies wholly above the limit
            if (lo > below) if below is not None else not lo <= value <= hi:
                result.conflicts.append({"period": period, "series": name, "observed": value, "band": [float(lo), float(hi)]})
    if result.conflicts:
        result.flags.append(
            f"{len(result.conflicts)} observation(s) outside the prior predictive 99 % band (prior-data conflict)"
        )


def _figure(result: CheckResult, history, start: dt.date, path: Path, model=None) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    names = list(result.series)
    fig, axes = plt.subplots(len(names), 1, figsize=(8, 2.6 * len(names)), squeeze=False)
    for ax, name in zip(axes[:, 0], names):
        draws = result.series[name]
        days = np.arange(1, draws.shape[0] + 1)
        lo, q25, mid, q75, hi = np.quantile(draws, [BAND[0], 0.25, 0.5, 0.75, BAND[1]], axis=1)
        ax.fill_between(days, lo, hi, color="#9ecae1", label="prior predictive 99 %")
        ax.fill_between(days, q25, q75, color="#4292c6", label="50 %")
        ax.plot(days, mid, color="#08519c", lw=1)
        if history is not None:
            pts = [((d - start).days, v) for i, d in enumerate(history.dates)
                   if (v := _on_band_scale(model, history, i, name)[0] if model is not None else history.values[i].get(name)) is not None]  # fmt: skip
            if pts:
                ax.plot(*zip(*pts), "k.", ms=4, label="observed")
        ax.set_title(f"{name}: prior predictive (before any data) against the history", fontsize=9)
        ax.set_xlabel("model day")
        ax.legend(fontsize=7, loc="upper right")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _fmt_q(values: np.ndarray | None) -> str:
    if values is None:
        return "n/a"
    lo, med, hi = np.quantile(values, [0.05, 0.5, 0.95])
    return f"median {med:.3g} (90 % {lo:.3g} to {hi:.3g})"


def render(result: CheckResult) -> str:
    lines = [
        f"casecloud check: model {result.model!r}, {result.particles} prior draws, {result.days} days",
        f"  R0 (everyone susceptible)   {_fmt_q(result.r0)}",
        f"  R_eff on day 0              {_fmt_q(result.r_eff)}",
        f"  attack by day {result.days:<14}{_fmt_q(result.attack)}",
        f"  peak day of new infections  {_fmt_q(result.peak_day)}",
        f"  peak new infections a day   {_fmt_q(result.peak_size)}",
        "  compartments (min to max over draws and days):",
        *(f"    {c:<10} {lo:12.4g} to {hi:.4g}" for c, (lo, hi) in result.compartments.items()),
        "  flow rates per person per day (min to max):",
        *(f"    {f:<10} {lo:12.4g} to {hi:.4g}" for f, (lo, hi) in result.rates.items()),
    ]
    for name, draws in result.series.items():
        last = draws[-1]
        lines.append(f"  series {name}: day {draws.shape[0]} prior predictive {_fmt_q(last)}")
    for c in result.conflicts[:20]:
        lines.append(f"  outside the 99 % band: {c['series']} {c['period']} = {c['observed']} (band {c['band'][0]:.4g} to {c['band'][1]:.4g})")
    lines.append("  flags: " + ("none" if not result.flags else ""))
    lines += [f"    - {f}" for f in result.flags]
    return "\n".join(lines)


def run_check_command(args: argparse.Namespace) -> int:
    from filters import CompartmentalModel, ModelError
    from schemas import EXAMPLE_MODELS, SpecError, example_model_path, load_history, load_model_spec

    def fail(message: str) -> int:
        print(f"casecloud check: {message}", file=sys.stderr)
        return 2

    if not 10 <= args.particles <= 100_000:
        return fail(f"--particles must be between 10 and 100000, got {args.particles}")
    if not 1 <= args.days <= 730:
        return fail(f"--days must be between 1 and 730, got {args.days}")
    try:
        path = example_model_path(args.model) if args.model in EXAMPLE_MODELS else Path(args.model)
        model = CompartmentalModel(load_model_spec(path))
    except (SpecError, ModelError) as exc:
        return fail(str(exc))
    history = start = None
    days = args.days
    if args.history:
        if not args.start:
            return fail("--history needs --start (the calendar date of model day 0)")
        try:
            start = dt.date.fromisoformat(args.start)
            history = load_history(args.history, [s.name for s in model.series])
            history.check_kinds({s.name: s.kind for s in model.spec.series}, f"model {model.spec.name!r}")
        except SpecError as exc:  # before ValueError, its base: a history problem is not the --start's
            return fail(str(exc))
        except ValueError as exc:
            return fail(f"--start {args.start!r}: {exc}")
        early = [p for p, d in zip(history.periods, history.dates) if d <= start]
        if early:
            return fail(
                f"--start {args.start}: the history has {len(early)} period(s) ending on or before it (first {early[0]!r}); "
                "allowed: a start before every period (model day 0 is the initial state)"
            )
        days = max(days, max((d - start).days for d in history.dates))
    result = check_spec(model, args.particles, days, args.seed)
    if history is not None and start is not None:
        _conflicts(result, model, history, start)
    if args.out:
        out = Path(args.out)
        out.mkdir(parents=True, exist_ok=True)
        (out / "check.json").write_bytes(orjson.dumps(result.summary(), option=orjson.OPT_INDENT_2) + b"\n")
        if result.series:
            _figure(result, history, start or dt.date(2000, 1, 1), out / "prior_predictive.png", model)
        print(f"wrote {out / 'check.json'}" + (f" and {out / 'prior_predictive.png'}" if result.series else ""), file=sys.stderr)
    if args.json:
        print(orjson.dumps(result.summary(), option=orjson.OPT_INDENT_2).decode())
    else:
        print(render(result))
    return 1 if result.flags else 0


def add_check_parser(sub: Any) -> None:
    p = sub.add_parser(
        "check",
        help="what a model spec and its priors imply before any data: ranges, R0, peaks, prior predictive, flags",
        description="Validate a model spec, draw its prior cloud and simulate it forward: report ranges of every "
        "compartment and flow rate, R0 and R_eff on day 0, peak timing and size, and each series' prior predictive "
        "quantiles; flag model errors, an unconserved population, and priors that mostly mean no outbreak or "
        "everyone infected in a week. With --history, also list observations outside the prior predictive 99 %% band. "
        "Exit status 1 when anything is flagged.",
    )
    p.add_argument("--model", required=True, help="a model spec TOML, or the name of a shipped example")
    p.add_argument("--particles", type=int, default=1000, help="prior draws (default 1000)")
    p.add_argument("--days", type=int, default=60, help="days to simulate (default 60; at least the history's span)")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--history", help="a history CSV to hold against the prior predictive band")
    p.add_argument("--start", help="with --history: the calendar date of model day 0")
    p.add_argument("--out", help="write check.json and prior_predictive.png here")
    p.add_argument("--json", action="store_true", help="print the JSON summary instead of the text report")
    p.set_defaults(handler=run_check_command)
