"""Calibrating a model's static parameters on past data.

Particle marginal Metropolis-Hastings (Andrieu, Doucet & Holenstein 2010):
the chain's state is the vector of the model's *static* parameters on their
unconstrained scale (log / logit / identity, as the spec implies); the target
is prior(theta) x the particle filter's unbiased likelihood estimate, so the
chain leaves the exact posterior invariant however noisy the estimate (only
its mixing suffers). The prior density on the unconstrained scale includes
the Jacobian of the transform.

Proposal: adaptive Gaussian random walk (Haario, Saksman & Tamminen 2001):
for the first ``adapt_start`` iterations a fixed diagonal covariance
(``initial_step`` x the prior sd of each unconstrained coordinate, squared),
then 2.38^2 / d x (covariance of the chain's own history + epsilon I).

Diagnostics: split-R-hat (Gelman & Rubin 1992, split form of Vehtari,
Gelman, Simpson, Carpenter & Burkner 2021, without rank normalisation) and a
multi-chain effective sample size from autocorrelations truncated by Geyer's
(1992) initial positive (monotone) sequence. Log-evidence noise: Doucet,
Pitt, Deligiannidis & Kohn (2015) recommend particles giving an sd of the
log-likelihood estimate of about 1.0-1.7 near the posterior mode (1.2 a
good compromise); we call sd in [0.5, 1.5] fine, above 1.5 too noisy (chains
stick) and below 0.5 wasteful, and suggest ceil(N x (sd / 1.2)^2) particles using
var(log-likelihood estimate) proportional to 1/N (never fewer than min(N, 50):
the rule extrapolates poorly to very few particles).

Fixed parameters stay fixed; drifting parameters keep their prior and drift;
initial conditions drawn from priors stay latent (per particle). The chain
loop is sequential; each likelihood estimate is one vectorised filter run.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any, Protocol

import numpy as np


from ._filter import FilterConfig, ParticleFilter
from ._observation import Observation
from ._priors import from_unconstrained, prior_logpdf, sample_prior, to_unconstrained
from ._rng import generator_state, restore_generator
from ._summary import weighted_quantiles
from ._weights import normalised_weights

__all__ = [
    "CalibrationParameter",
    "CalibrationSettings",
    "CalibrationResult",
    "CalibrationState",
    "CalibrationStateError",
    "NoiseCheck",
    "calibrate",
    "calibration_parameters",
    "history_observations",
    "log_likelihood_estimate",
    "log_evidence_noise",
    "mcmc_ess",
    "one_step_intervals",
    "split_rhat",
    "unconstrained_log_prior",
]

STATE_FORMAT = 1
TARGET_SD = 1.2
NOISE_RANGE = (0.5, 1.5)
MIN_SUGGESTED = 50


# --------------------------------------------------------------------------- parameters
@dataclass(frozen=True)
class CalibrationParameter:
    """One static parameter the chain moves: its column in the particle params,
    its prior (a ``schemas`` distribution) and its transform."""

    name: str
    column: int
    prior: Any
    transform: str  # "log" | "logit" | "identity"
    bounds: tuple[float, float]
    scale_given: bool = False  # the spec set 'scale' explicitly


def calibration_parameters(model: Any) -> list[CalibrationParameter]:
    """The static parameters of a model of either family (its spec's ``static`` ones), in spec order."""
    spec = getattr(model, "spec", None)
    if spec is None:
        raise TypeError("calibration_parameters needs a model with a spec (CompartmentalModel or IndividualModel); pass parameters= explicitly")
    out = []
    for j, name in enumerate(model.param_names):
        p = spec.parameters[name]
        if p.kind == "static":
            out.append(CalibrationParameter(name, j, p.prior, p.transform, p.bounds, p.scale is not None))
    if not out:
        raise ValueError(f"model {spec.name!r} has no static parameters to calibrate")
    return out


def unconstrained_log_prior(params: Sequence[CalibrationParameter], u: np.ndarray) -> float:
    """log prior density of the unconstrained vector ``u`` (Jacobian included)."""
    total = 0.0
    for p, y in zip(params, np.asarray(u, dtype=float)):
        x = float(from_unconstrained(np.array(y), p.transform, p.bounds))
        total += float(prior_logpdf(p.prior, x))
        if p.transform == "log":
            total += float(y)  # dx/dy = e^y
        elif p.transform == "logit":
            lo, hi = p.bounds
            # dx/dy = (hi - lo) s (1 - s), s = 1 / (1 + e^-y)
            total += math.log(hi - lo) - float(np.logaddexp(0.0, -y)) - float(np.logaddexp(0.0, y))
    return total if math.isfinite(total) else -math.inf


def _converted(params: Sequence[CalibrationParameter], values: np.ndarray, convert) -> np.ndarray:
    values = np.asarray(values, dtype=float)
    out = np.empty_like(values)
    for k, p in enumerate(params):
        out[..., k] = convert(values[..., k], p.transform, p.bounds)
    return out


def _natural(params: Sequence[CalibrationParameter], u: np.ndarray) -> np.ndarray:
    return _converted(params, u, from_unconstrained)


def _unconstrained(params: Sequence[CalibrationParameter], x: np.ndarray) -> np.ndarray:
    return _converted(params, x, to_unconstrained)


def history_observations(history: Any, start: Any) -> list[Observation]:
    """Observations (model day = (date - start).days) from a ``schemas.History``: counts, the
    positives of positivity series with their tests (``trials``), and concentrations (``nd`` as
    0.0) with their limits of detection and flows."""

    def given(d: dict) -> dict:
        return {k: float(v) for k, v in d.items() if v is not None}

    return [Observation(day, {k: (None if v is None else float(v)) for k, v in counts.items()},
                        given(tests), given(limits), given(flows))
            for day, counts, tests, limits, flows in history.by_day_detailed(start)]


# --------------------------------------------------------------------------- likelihood
def log_likelihood_estimate(
    model: Any,
    observations: Sequence[Observation],
    params: Sequence[CalibrationParameter],
    theta: np.ndarray,
    n_particles: int,
    rng: np.random.Generator,
    config: FilterConfig | None = None,
) -> float:
    """One particle-filter estimate of log p(y_1:T | theta) (``theta`` natural scale).

    The static columns are set to ``theta`` in every particle and never
    jittered (Liu-West off). A collapsed step makes the estimate -inf.
    """
    cfg = config or FilterConfig(n_particles=n_particles, liu_west_discount=None)
    if cfg.liu_west_discount is not None:
        raise ValueError("PMMH needs liu_west_discount=None: the static parameters must not be jittered")
    ps = model.initial(n_particles, rng)
    for p, value in zip(params, np.asarray(theta, dtype=float)):
        ps.params[:, p.column] = value
    pf = ParticleFilter(model, cfg, rng, particles=ps)
    total = 0.0
    for obs in observations:
        result = pf.step(obs, with_summary=False)
        if result.log_evidence_increment is None:
            return -math.inf
        total += result.log_evidence_increment
    return total if math.isfinite(total) else -math.inf


@dataclass(frozen=True)
class NoiseCheck:
    """Spread of repeated log-likelihood estimates at one theta."""

    theta: dict[str, float]
    particles: int
    repeats: int
    estimates: list[float]
    sd: float  # inf if any run collapsed
    suggested_particles: int | None
    advice: str  # "ok" | "too_noisy" | "wasteful" | "collapses"


def log_evidence_noise(
    model: Any,
    observations: Sequence[Observation],
    params: Sequence[CalibrationParameter],
    theta: np.ndarray,
    n_particles: int,
    rng: np.random.Generator,
    repeats: int = 20,
) -> NoiseCheck:
    """Run the filter ``repeats`` times at ``theta`` (natural scale); report the sd
    of the log-likelihood estimate and a particle count aiming at sd 1.2."""
    estimates = [log_likelihood_estimate(model, observations, params, theta, n_particles, rng) for _ in range(repeats)]
    values = np.array(estimates)
    named = {p.name: float(v) for p, v in zip(params, np.asarray(theta, dtype=float))}
    if not np.all(np.isfinite(values)):
        return NoiseCheck(named, n_particles, repeats, [float(v) for v in values], math.inf, None, "collapses")
    sd = float(values.std(ddof=1)) if repeats > 1 else 0.0
    # The 1/N rule extrapolates poorly to very few particles: never suggest fewer than
    # min(N, MIN_SUGGESTED).
    suggested = max(int(math.ceil(n_particles * (sd / TARGET_SD) ** 2)), min(n_particles, MIN_SUGGESTED))
    advice = "too_noisy" if sd > NOISE_RANGE[1] else "wasteful" if sd < NOISE_RANGE[0] else "ok"
    return NoiseCheck(named, n_particles, repeats, [float(v) for v in values], sd, suggested, advice)


def one_step_intervals(
    model: Any,
    observations: Sequence[Observation],
    params: Sequence[CalibrationParameter],
    theta: np.ndarray,
    n_particles: int,
    rng: np.random.Generator,
    level: float = 0.9,
) -> list[dict[str, tuple[float, float]]]:
    """One-day-ahead central prediction intervals of every reported series.

    For each observation: a copy of the cloud is propagated to its day and one
    report is drawn per particle from the observation model; the interval is
    the weighted (level/2, 1 - level/2) quantile pair. Then the filter
    assimilates the observation. Needs ``model.sample_observation``.
    """
    ps = model.initial(n_particles, rng)
    for p, value in zip(params, np.asarray(theta, dtype=float)):
        ps.params[:, p.column] = value
    pf = ParticleFilter(model, FilterConfig(n_particles=n_particles, liu_west_discount=None), rng, particles=ps)
    probs = np.array([(1 - level) / 2, (1 + level) / 2])
    out = []
    for obs in observations:
        ahead = pf.particles.take(np.arange(pf.particles.size))
        if obs.time > pf.time:
            model.advance(ahead, pf.time, obs.time, rng)
        drawn = model.sample_observation(ahead, rng)
        w = normalised_weights(ahead.log_weights)
        out.append({name: tuple(float(q) for q in weighted_quantiles(np.asarray(drawn[name], float), w, probs))
                    for name in obs.present()})
        pf.step(obs, with_summary=False)
    return out


# --------------------------------------------------------------------------- diagnostics
def split_rhat(draws: np.ndarray) -> np.ndarray:
    """Split-R-hat per parameter of ``draws`` (chains, iterations, d).

    Each chain is cut in halves (Vehtari et al. 2021), then the Gelman-Rubin
    (1992) potential scale reduction sqrt(var_plus / W) is taken over the
    2 x chains half-chains. NaN when there are fewer than 4 iterations.
    """
    draws = np.asarray(draws, dtype=float)
    m, n, d = draws.shape
    half = n // 2
    if half < 2:
        return np.full(d, np.nan)
    parts = np.concatenate([draws[:, :half], draws[:, n - half:]], axis=0)
    means = parts.mean(axis=1)
    b = half * means.var(axis=0, ddof=1)
    w = parts.var(axis=1, ddof=1).mean(axis=0)
    var_plus = (half - 1) / half * w + b / half
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.sqrt(var_plus / w)
    return np.where(w > 0, out, np.where(b > 0, np.inf, 1.0))


def _autocovariance(x: np.ndarray) -> np.ndarray:
    """Autocovariance of a 1-D series at lags 0..n-1 (biased, FFT)."""
    n = x.size
    size = 1 << (2 * n - 1).bit_length()
    centred = x - x.mean()
    f = np.fft.rfft(centred, size)
    acov = np.fft.irfft(f * np.conjugate(f), size)[:n]
    return acov / n


def mcmc_ess(draws: np.ndarray) -> np.ndarray:
    """Multi-chain effective sample size per parameter of ``draws`` (chains, iterations, d).

    rho_t = 1 - (W - mean over chains of autocov_t) / var_plus (the
    multi-chain form of Vehtari et al. 2021); the sum is truncated by Geyer's
    initial positive sequence of pair sums, made monotone.
    ESS = m n / (-1 + 2 sum_{t} P_t) with P_t the pair sums.
    """
    draws = np.asarray(draws, dtype=float)
    m, n, d = draws.shape
    out = np.empty(d)
    for k in range(d):
        x = draws[:, :, k]
        if n < 4 or np.all(x == x[0, 0]):
            out[k] = np.nan
            continue
        acov = np.array([_autocovariance(x[c]) for c in range(m)])
        chain_var = acov[:, 0] * n / (n - 1)
        w = chain_var.mean()
        var_plus = w * (n - 1) / n + (x.mean(axis=1).var(ddof=1) if m > 1 else 0.0)
        if var_plus <= 0:
            out[k] = np.nan
            continue
        rho = 1.0 - (w - acov.mean(axis=0)) / var_plus
        rho[0] = 1.0
        pairs = []
        t = 0
        while t + 1 < n:
            p = rho[t] + rho[t + 1]
            if p <= 0:
                break
            pairs.append(p)
            t += 2
        pairs_arr = np.minimum.accumulate(np.array(pairs)) if pairs else np.array([1.0])
        tau = -1.0 + 2.0 * pairs_arr.sum()
        out[k] = m * n / max(tau, 1.0 / math.log10(max(m * n, 10)))
    return out


# --------------------------------------------------------------------------- settings / result
@dataclass(frozen=True)
class CalibrationSettings:
    """How a PMMH calibration runs.

    particles : particles per likelihood estimate.
    iterations : iterations per chain, burn-in included (may be raised on resume).
    burn_in : iterations dropped from the start of each chain.
    chains : independent chains from dispersed starting points (prior draws).
    adapt_start : iterations before the proposal adapts to the chain's history.
    initial_step : sd of the first proposal as a fraction of each unconstrained prior sd.
    epsilon : the epsilon of Haario et al.'s epsilon I regularisation.
    start_candidates : prior draws per chain; the chain starts at the one with
        the highest estimated posterior (still overdispersed, never inside a collapse),
        with a fresh likelihood estimate there (the best of several noisy estimates
        is biased upwards and would make the chain stick).
    noise_repeats : filter runs in the log-evidence noise check (0: skip it).
    batch : iterations between saved states and progress calls.
    seed : seeds every chain's generator (SeedSequence(seed).spawn).
    """

    particles: int = 500
    iterations: int = 2000
    burn_in: int = 500
    chains: int = 4
    adapt_start: int = 100
    initial_step: float = 0.1
    epsilon: float = 1e-6
    start_candidates: int = 8
    noise_repeats: int = 20
    batch: int = 50
    seed: int = 0

    def __post_init__(self) -> None:
        for name in ("particles", "iterations", "chains", "start_candidates", "batch"):
            if int(getattr(self, name)) < 1:
                raise ValueError(f"{name} must be at least 1, got {getattr(self, name)!r}")
        if not 0 <= self.burn_in < self.iterations:
            raise ValueError(f"burn_in must be in [0, iterations), got {self.burn_in} with iterations {self.iterations}")
        if self.adapt_start < 2:
            raise ValueError(f"adapt_start must be at least 2, got {self.adapt_start}")
        if not self.initial_step > 0 or not self.epsilon > 0:
            raise ValueError("initial_step and epsilon must be > 0")
        if self.noise_repeats == 1 or self.noise_repeats < 0:
            raise ValueError(f"noise_repeats must be 0 (skip) or at least 2, got {self.noise_repeats}")

    def compatible(self) -> dict[str, Any]:
        """Settings that must match to resume a saved state: those that change the
        chains' draws (iterations may grow; burn-in, batch and the noise check are free)."""
        out = asdict(self)
        for name in ("iterations", "burn_in", "batch", "noise_repeats"):
            out.pop(name)
        return out


@dataclass(frozen=True)
class CalibrationResult:
    """A finished (or partial) calibration.

    draws : (chains, kept, d) natural-scale draws after burn-in.
    draws_unconstrained : the same on the unconstrained scale.
    log_posterior : (chains, kept) log prior + estimated log-likelihood of each draw.
    acceptance : acceptance rate per chain after burn-in.
    rhat, ess : per parameter (split-R-hat; multi-chain ESS with Geyer truncation).
    noise : the log-evidence noise check at the posterior mean (None if skipped).
    """

    parameters: list[CalibrationParameter]
    settings: CalibrationSettings
    draws: np.ndarray
    draws_unconstrained: np.ndarray
    log_posterior: np.ndarray
    acceptance: np.ndarray
    rhat: np.ndarray
    ess: np.ndarray
    noise: NoiseCheck | None
    iterations_done: int
    model_fingerprint: str = ""

    @property
    def names(self) -> list[str]:
        return [p.name for p in self.parameters]

    def pooled(self, name: str) -> np.ndarray:
        """All kept draws of one parameter (natural scale), chains pooled."""
        return self.draws[:, :, self.names.index(name)].ravel()

    def posterior_mean(self) -> np.ndarray:
        """Posterior mean on the natural scale."""
        return self.draws.reshape(-1, len(self.parameters)).mean(axis=0)

    def central_theta(self) -> np.ndarray:
        """Back-transformed mean of the unconstrained draws (a central point inside the support)."""
        return _natural(self.parameters, self.draws_unconstrained.reshape(-1, len(self.parameters)).mean(axis=0))

    def interval(self, name: str, level: float = 0.9) -> tuple[float, float]:
        x = self.pooled(name)
        lo, hi = np.quantile(x, [(1 - level) / 2, (1 + level) / 2])
        return float(lo), float(hi)

    def quantiles(self, probs: Sequence[float] = (0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975)) -> dict[str, dict[str, float]]:
        out = {}
        for name in self.names:
            x = self.pooled(name)
            q = np.quantile(x, list(probs))
            out[name] = {"mean": float(x.mean()), "sd": float(x.std(ddof=1)) if x.size > 1 else 0.0,
                         **{f"q{p:g}": float(v) for p, v in zip(probs, q)}}
        return out

    def summary(self) -> dict[str, Any]:
        """Everything a report needs, JSON-ready."""
        noise = None
        if self.noise is not None:
            noise = {
                "theta": self.noise.theta, "particles": self.noise.particles, "repeats": self.noise.repeats,
                "sd": self.noise.sd if math.isfinite(self.noise.sd) else None,
                "suggested_particles": self.noise.suggested_particles, "advice": self.noise.advice,
                "target_sd": TARGET_SD, "fine_range": list(NOISE_RANGE),
            }
        return {
            "model_fingerprint": self.model_fingerprint,
            "settings": asdict(self.settings),
            "iterations_done": self.iterations_done,
            "kept_per_chain": int(self.draws.shape[1]),
            "parameters": {
                name: {
                    "rhat": _json_float(self.rhat[k]),
                    "ess": _json_float(self.ess[k]),
                    **self.quantiles()[name],
                }
                for k, name in enumerate(self.names)
            },
            "acceptance": [float(a) for a in self.acceptance],
            "log_evidence_noise": noise,
        }

    def prior_block(self) -> str:
        """A TOML fragment of ``[parameters.<name>]`` tables with fitted priors.

        The family follows the transform: log scale -> lognormal (mean and sd
        of the draws' log); logit on (0, 1) -> beta fitted by moments; logit on
        other bounds -> uniform over the draws' 0.5 %-99.5 % range; identity
        -> normal. Marginals only: correlations between parameters are lost.
        """
        lines = [
            "# Posterior of the static parameters from `casecloud calibrate`, as priors for a",
            f"# streaming config (model fingerprint {self.model_fingerprint or 'n/a'}; {self.draws.shape[0]} chains x "
            f"{self.draws.shape[1]} kept draws).",
            "# Replace the matching [parameters.*] tables in a copy of the spec. Marginal fits only:",
            "# correlations between parameters are dropped. Do not calibrate again on the same data.",
        ]
        for k, p in enumerate(self.parameters):
            x = self.draws[:, :, k].ravel()
            if p.transform == "log":
                lx = np.log(x)
                prior = f'{{ dist = "lognormal", mean_log = {_num(lx.mean())}, sd_log = {_num(max(lx.std(ddof=1), 1e-9))} }}'
            elif p.transform == "logit" and p.bounds == (0.0, 1.0):
                mean, var = float(x.mean()), max(float(x.var(ddof=1)), 1e-12)
                common = max(mean * (1 - mean) / var - 1, 1e-6)
                prior = f'{{ dist = "beta", a = {_num(mean * common)}, b = {_num((1 - mean) * common)} }}'
            elif p.transform == "logit":
                lo, hi = np.quantile(x, [0.005, 0.995])
                if not hi > lo:
                    hi = lo + 1e-9 * max(abs(lo), 1.0)
                prior = f'{{ dist = "uniform", low = {_num(lo)}, high = {_num(hi)} }}'
            else:
                prior = f'{{ dist = "normal", mean = {_num(x.mean())}, sd = {_num(max(x.std(ddof=1), 1e-12))} }}'
            lines += ["", f"[parameters.{p.name}]", 'kind = "static"', f"prior = {prior}"]
            if p.scale_given:
                lines.append(f'scale = "{p.transform}"')
        return "\n".join(lines) + "\n"


def _num(v: float) -> str:
    return repr(float(f"{float(v):.6g}"))


def _json_float(v: float) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


class CalibrationStateError(ValueError):
    """A saved calibration state cannot be resumed (different model, data or settings, or damaged)."""


# --------------------------------------------------------------------------- state files
def _data_fingerprint(observations: Sequence[Observation]) -> str:
    text = json.dumps([[o.time, sorted(o.values.items())] for o in observations])
    return hashlib.sha256(text.encode()).hexdigest()[:16]


class CalibrationState(Protocol):
    """Where a calibration keeps its chains between runs (the service supplies a
    directory-backed one; the numerical core does no I/O)."""

    def load(self) -> tuple[dict[str, Any], dict[str, np.ndarray]] | None: ...

    def save(self, header: dict[str, Any], arrays: dict[str, np.ndarray]) -> None: ...


# --------------------------------------------------------------------------- the sampler
ProgressCallback = Callable[[int, int], None]


@dataclass
class _Chain:
    rng: np.random.Generator
    chain: np.ndarray  # (iterations, d) unconstrained
    log_target: np.ndarray  # (iterations,)
    accepted: np.ndarray  # (iterations,) bool
    done: int = 0
    current: np.ndarray = field(default_factory=lambda: np.zeros(0))
    current_lt: float = -math.inf


def _prior_sd_unconstrained(params: Sequence[CalibrationParameter], rng: np.random.Generator) -> np.ndarray:
    draws = np.column_stack([sample_prior(p.prior, rng, 2000) for p in params])
    u = _unconstrained(params, draws)
    sd = u.std(axis=0)
    return np.where(np.isfinite(sd) & (sd > 0), sd, 1.0)


def calibrate(
    model: Any,
    observations: Sequence[Observation],
    settings: CalibrationSettings = CalibrationSettings(),
    parameters: Sequence[CalibrationParameter] | None = None,
    state: CalibrationState | None = None,
    progress: ProgressCallback | None = None,
) -> CalibrationResult:
    """Run PMMH over the static parameters; see the module docstring.

    ``parameters`` defaults to the model's static parameters (needs a spec).
    ``state``: where the chains' state (a JSON-able header and plain arrays) is
    saved after every ``settings.batch`` iterations; a compatible saved state
    (same model fingerprint, data and settings; more iterations allowed) is
    resumed (``service.analysis.calibrate.StateDirectory`` keeps it as JSON + .npy files). Resuming gives the same draws as an
    uninterrupted run. ``progress(done, total)`` counts chain iterations.
    """
    params = list(parameters) if parameters is not None else calibration_parameters(model)
    observations = list(observations)
    if not observations:
        raise ValueError("calibration needs at least one observation")
    d = len(params)
    s = settings
    fingerprint = model.fingerprint()
    data_fp = _data_fingerprint(observations)
    names = [p.name for p in params]
    cfg = FilterConfig(n_particles=s.particles, liu_west_discount=None)
    seeds = np.random.SeedSequence(s.seed).spawn(s.chains + 2)
    scale_rng = np.random.Generator(np.random.PCG64(seeds[s.chains]))
    prior_sd = _prior_sd_unconstrained(params, scale_rng)
    c0 = np.diag((s.initial_step * prior_sd) ** 2)
    sd_factor = 2.38**2 / d

    def log_target(u: np.ndarray, rng: np.random.Generator) -> float:
        lp = unconstrained_log_prior(params, u)
        if not math.isfinite(lp):
            return -math.inf
        ll = log_likelihood_estimate(model, observations, params, _natural(params, u), s.particles, rng, cfg)
        return lp + ll if math.isfinite(ll) else -math.inf

    saved = state.load() if state is not None else None
    chains: list[_Chain] = []
    if saved is not None:
        header, arrays = saved
        problems = []
        if header.get("format") != STATE_FORMAT:
            problems.append(f"format {header.get('format')!r} (expected {STATE_FORMAT})")
        if header.get("model_fingerprint") != fingerprint:
            problems.append(f"model fingerprint {header.get('model_fingerprint')!r} (this model: {fingerprint!r})")
        if header.get("data_fingerprint") != data_fp:
            problems.append(f"data fingerprint {header.get('data_fingerprint')!r} (these observations: {data_fp!r})")
        if header.get("parameters") != names:
            problems.append(f"parameters {header.get('parameters')!r} (now {names!r})")
        if header.get("settings") != s.compatible():
            problems.append(f"settings {header.get('settings')!r} (now {s.compatible()!r})")
        if header.get("iterations_done", 0) > s.iterations:
            problems.append(f"{header.get('iterations_done')} iterations already done, more than the {s.iterations} asked")
        if problems:
            raise CalibrationStateError(
                f"saved calibration state ({state}) does not match this run: " + "; ".join(problems)
                + ". Use another state directory, or delete it to start afresh."
            )
        done = int(header["iterations_done"])
        for c in range(s.chains):
            ch = np.full((s.iterations, d), np.nan)
            lt = np.full(s.iterations, -np.inf)
            acc = np.zeros(s.iterations, dtype=bool)
            ch[:done] = arrays["chain"][c, :done]
            lt[:done] = arrays["log_target"][c, :done]
            acc[:done] = arrays["accepted"][c, :done]
            chains.append(_Chain(restore_generator(header["rng"][c]), ch, lt, acc, done, ch[done - 1].copy(), float(lt[done - 1])))
    else:
        for c in range(s.chains):
            rng = np.random.Generator(np.random.PCG64(seeds[c]))
            best_u, best_lt = None, -math.inf
            for _ in range(s.start_candidates):
                x = np.array([sample_prior(p.prior, rng, 1)[0] for p in params])
                u = _unconstrained(params, x)
                lt = log_target(u, rng)
                if best_u is None or lt > best_lt:
                    best_u, best_lt = u, lt
            if math.isfinite(best_lt):
                # A fresh estimate at the chosen start: the best of several noisy
                # estimates is biased upwards and would make the chain stick.
                best_lt = log_target(best_u, rng)
            if not math.isfinite(best_lt):
                raise ValueError(
                    f"chain {c}: none of {s.start_candidates} prior draws gives a finite likelihood estimate "
                    f"with {s.particles} particles (every one collapses); raise particles or start_candidates, "
                    "or check that the model can produce the data"
                )
            ch = np.full((s.iterations, d), np.nan)
            lt_arr = np.full(s.iterations, -np.inf)
            acc = np.zeros(s.iterations, dtype=bool)
            ch[0], lt_arr[0], acc[0] = best_u, best_lt, True
            chains.append(_Chain(rng, ch, lt_arr, acc, 1, best_u.copy(), best_lt))

    def save() -> None:
        if state is None:
            return
        done = chains[0].done
        header = {
            "format": STATE_FORMAT,
            "model_fingerprint": fingerprint,
            "data_fingerprint": data_fp,
            "parameters": names,
            "settings": s.compatible(),
            "iterations_done": done,
            "rng": [generator_state(ch.rng) for ch in chains],
        }
        arrays = {
            "chain": np.stack([ch.chain[:done] for ch in chains]),
            "log_target": np.stack([ch.log_target[:done] for ch in chains]),
            "accepted": np.stack([ch.accepted[:done] for ch in chains]),
        }
        state.save(header, arrays)

    total = s.iterations * s.chains
    if saved is None:
        save()
    if progress is not None:
        progress(sum(ch.done for ch in chains), total)
    while chains[0].done < s.iterations:
        stop = min(s.iterations, (chains[0].done // s.batch + 1) * s.batch)
        for ch in chains:
            for t in range(ch.done, stop):
                if t >= s.adapt_start:
                    hist = ch.chain[:t]
                    cov = sd_factor * (np.cov(hist, rowvar=False).reshape(d, d) + s.epsilon * np.eye(d))
                else:
                    cov = c0
                proposal = ch.current + ch.rng.multivariate_normal(np.zeros(d), cov, method="cholesky")
                lt = log_target(proposal, ch.rng)
                accept = math.isfinite(lt) and (
                    not math.isfinite(ch.current_lt) or math.log(ch.rng.uniform()) < lt - ch.current_lt
                )
                if accept:
                    ch.current, ch.current_lt = proposal, lt
                ch.chain[t], ch.log_target[t], ch.accepted[t] = ch.current, ch.current_lt, accept
            ch.done = stop
        save()
        if progress is not None:
            progress(sum(ch.done for ch in chains), total)

    noise_rng = np.random.Generator(np.random.PCG64(seeds[s.chains + 1]))
    return _result(model, observations, params, s, chains, fingerprint, noise_rng)


def _result(model, observations, params, s, chains, fingerprint, noise_rng) -> CalibrationResult:
    kept = np.stack([ch.chain[s.burn_in:] for ch in chains])
    kept_lt = np.stack([ch.log_target[s.burn_in:] for ch in chains])
    acceptance = np.array([ch.accepted[max(s.burn_in, 1):].mean() for ch in chains])
    natural = _natural(params, kept)
    noise = None
    if s.noise_repeats:
        theta = _natural(params, kept.reshape(-1, len(params)).mean(axis=0))
        noise = log_evidence_noise(model, observations, params, theta, s.particles, noise_rng, s.noise_repeats)
    return CalibrationResult(
        parameters=list(params),
        settings=s,
        draws=natural,
        draws_unconstrained=kept,
        log_posterior=kept_lt,
        acceptance=acceptance,
        rhat=split_rhat(kept),
        ess=mcmc_ess(kept),
        noise=noise,
        iterations_done=chains[0].done,
        model_fingerprint=fingerprint,
    )
