"""``casecloud backtest``: how good would the forecasts and alerts have been on past data?

The history CSV (``schemas.load_history``) is replayed offline through the
**same service path** as live data: every row becomes an observation message
(``{"stream", "period", "counts"}``, empty cells as ``null``), the messages go
through :class:`service.runtime.app.Service` on a :class:`MemoryTransport` with a
temporary checkpoint directory, so validation, ordering, gap bridging, the
filter step, the published estimates, the alert state machine and the
checkpoints are exactly the service's. ``today`` is pinned to the day after the
last row, so no row is refused as "future" and nothing depends on the clock.

Forecasts to score
------------------
Estimates carry quantiles only; CRPS and the log score need draws. After each
applied record (``Service.on_outcome``, which runs once the record is stepped
and published and before the next is read) the stream's cloud is forecast
read-only with :func:`filters.forecast` and ``seed`` derived from (deployment
seed, stream id, filter step). This uses its own random numbers, so the
stream's Generator, checkpoints and published messages are those of a plain
replay. ``--trajectories`` defaults to the stream's ``forecast_trajectories``.

For every forecast origin, horizon h (days) and observed series, the realised
count of the row whose period ends h days after the origin's is scored
(origins with fewer than 3 observed values of the series so far are left out
for every method, so all methods are scored on the same targets):

- WIS over the 23 levels of ``filters.FORECAST_LEVELS`` (Bracher et al. 2021),
  CRPS from the draws (Gneiting & Raftery 2007), coverage of the central 50 %
  (q25-q75) and 90 % (q05-q95) intervals, the log score ``-log p(y)`` (draws
  smoothed as in :func:`filters.log_score_from_samples`), and the bias of
  Funk et al. (2019). Lower is better for WIS, CRPS and the log score.
  Quantiles are numpy's linear interpolation of the draws.

Evidence other than counts
--------------------------
``per_origin`` rows say each target's ``kind`` (the series kind), ``tests`` (positivity),
``lod`` and ``censored`` (concentration; 1: the sample was below its limit or not detected).

Positivity series. A forecast holds each trajectory's share positive, but how many tests a future
day brings is not known at the origin. Positives are scored **conditional on the realised number
of tests** (the target row's ``<series>.tests``): each trajectory's share is turned into positives
out of those tests with the series' own noise (binomial, or beta-binomial with the trajectory's
concentration), and those draws are scored as counts (all the scores above). The number of tests is
taken as given, not forecast: scores say how well the share positive was foreseen, on the scale of
what was reported. (Scoring the positive fraction y / n against shares without test noise would
reward an over-confident forecast on days with few tests.)

Concentration series (continuous). Draws are the trajectories' measured levels (at the sample's
flow when the series has a ``reference_flow``). CRPS, WIS, coverage and bias come from the draws
(Gneiting & Raftery 2007's sample CRPS; bias ``1 - 2 P(X <= y)``, the continuous form of Funk et
al. 2019). A target with a limit of detection is scored on the scale the lab sees, max(value, lod)
for both draws and observation: a sample not detected is then exactly "lod", and the CRPS is the
threshold-weighted CRPS with weight 1{z >= lod} (Gneiting & Ranjan 2011, "Comparing density
forecasts using threshold- and quantile-weighted scoring rules", JBES 29). The log score is exact,
not smoothed: ``-log`` of the predictive density at the value, the equally weighted mixture over
trajectories of the series' measurement law (log-normal or log-Student-t around each trajectory's
expected level, with its noise sd), which the model knows in closed form, so no kernel density
estimate or bandwidth enters; a censored sample is scored by ``-log`` of the predictive probability
of falling below its limit. (A noise sd or concentration that drifts is read at the origin.)

Baselines (same origins and targets, same number of draws, scored the same way)
------------------------------------------------------------------------------
``persistence``
    The last observed count ``c`` carried forward, with negative binomial
    noise: mean ``max(c, 0.5)``, variance ``mean + s2 * h / spacing``, where
    ``s2`` is the mean squared one-step change of the series so far (a random
    walk's increment variance, fitted on past changes only) and ``spacing`` the
    median days between rows; Poisson when that variance does not exceed the
    mean.
``trend``
    Least squares of ``log(y + 1)`` on the day over the observed rows of the
    last 14 days (at least the last 3 rows), projected to the target day. The
    log-mean is drawn from the normal predictive of the fit (residual variance
    times ``1 + 1/n + (x - xbar)^2 / Sxx``), then ``count ~ Poisson(exp(eta) - 1)``
    (clipped at 0 and at 10^9).

For a positivity series both baselines work on the empirical logit of the share positive,
``log((y + 0.5) / (n - y + 0.5))``, and draw positives binomially out of the target's realised
tests; for a concentration series on ``log(value)`` (a past sample below its limit enters at half
the limit, common practice), the predictive level being log-normal, so its log score is exact. On
these scales persistence is a random walk (normal, variance ``s2 * h / spacing``) and trend the
least-squares line's normal predictive, the sd at least 0.1 (a flat past, e.g. samples all
below the limit, would otherwise give a near point mass).

Alerts
------
For each alert rule of the stream and each origin, the service's own
exceedance probability (from the published estimate) is paired with the
realised event "some row whose period ends within the next ``horizon_days``
days has the series above the threshold" (origins whose window runs past the
end of the history, or holds no observed value, are left out); ROC and AUC
follow (AUC null when only one outcome occurred). An *episode* is a run of
consecutive observed rows above the threshold; its lead time is the days from
the service's ``raised`` alert that was active on the episode's first
exceeding day (raised on or before it, not cleared before it, and raised after
the previous episode ended) to that day; null if there was none.

Data vintages: backtests in real time
-------------------------------------
A history CSV with an ``as_of`` column (``schemas.load_history``: one row per
period and vintage, in the order the counts were learnt) is replayed as it
was known on each date: every row becomes a message with its ``as_of``
(none for a final row), in file order, through the same service path, so
revisions of event-dated series are assimilated by increment and the
service's own rules (duplicates, stale vintages, lower totals, the
assimilation window) apply. A *forecast origin* is taken after the last row
of each as-of date that the service applied (``as_of`` column of
``per_origin``). Everything is scored against the **eventual counts**: each
period's value in its last row that gives it. Of an event-dated series
(``dated_by = "event"``) only periods whose eventual count is complete are
targets: a final row, or a history whose last as-of date is at least the
series' ``reporting_delay.max_days`` after the period's end (periods nearer
the end are still being reported when the history ends). Rows need only be
written when a count changes, so the last as-of date is taken as the day the
history was extracted: if the last days brought no change, end the file with
a row dated that day repeating a count (the service skips it as a duplicate). The persistence and trend baselines
see the counts as known at the origin (partial ones included), not the
eventual ones. Alerts are paired with the estimate published last at each
origin, and an alert's ``raised_period`` in ``episodes`` is the as-of date
on which it was raised.

Nowcasts (runs with vintages; event-dated series). At each origin and for
every period of the series with a partial count (its latest row known at the
origin has an ``as_of``) and a complete eventual count, three predictive
distributions of the eventual count are scored, ``--trajectories`` draws
each, the same scores as forecasts, per ``periods_back`` (0 = the newest
period of the series known at the origin, 1 the one before, ...):

``casecloud``
    :func:`filters.nowcast_draws` on the stream's cloud after the origin's
    last record (particles picked by weight; the reports still to come drawn
    with the series' reporting delay); its own random numbers, seeded from
    (deployment seed, stream id, filter step), so the replay is untouched.
``reported``
    The count as reported so far, as if it were final (a point mass: its WIS
    is the absolute error).
``chain_ladder``
    The chain-ladder nowcast (Mack 1993, :func:`filters.chain_ladder`) of the
    reporting triangle known at the origin only (no look-ahead), lags 0 to
    the series' ``reporting_delay.max_days``, factors volume-weighted over all
    periods known so far; eventual count = reported + negative binomial
    pending reports with the chain-ladder mean and Mack's mean squared error
    as variance (Poisson when that does not exceed the mean). Origins at which
    a factor a target needs is not estimable yet (no period has both lags
    known) leave that target out for every method.

Periods still in progress at the origin (ending after the as-of date), final
ones and ones the stream's cloud does not hold as pending (outside its
assimilation window) are not nowcast targets.

Outputs (``--out DIR``): ``backtest.json`` (everything), ``scores.csv`` (the
``scores`` rows) and ``per_origin.csv`` (the ``per_origin`` rows). In the
ROC, ``thresholds[0]`` is ``null`` in JSON: +infinity, "never alert", the
point (0, 0). Score rows with no scorable target are left out. Runs with
vintages add ``nowcast_methods``, ``nowcast_scores`` and
``nowcast_per_origin`` to ``backtest.json`` (and the files
``nowcast_scores.csv`` and ``nowcast_per_origin.csv``), the ``history``
entry gains ``vintages`` (rows), ``first_as_of`` and ``last_as_of``, and
``per_origin`` rows gain ``as_of`` (last column).

Exit status: 0 done; 2 unusable arguments, config or history; 1 nothing could
be scored.
"""

from __future__ import annotations

import argparse
import asyncio
import csv
import datetime as dt
import hashlib
import math
import sys
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from filters import (
    FORECAST_LEVELS,
    auc,
    bias,
    chain_ladder,
    chain_ladder_draws,
    crps_from_samples,
    forecast,
    log_score_from_samples,
    nowcast_draws,
    reporting_triangle,
    roc_curve,
    weighted_interval_score,
)
from filters._observation import log_concentration_loglik

__all__ = [
    "CAUTIONS",
    "CAUTIONS_VINTAGES",
    "METHODS",
    "NOWCAST_METHODS",
    "BacktestError",
    "add_backtest_parser",
    "alert_episodes",
    "origin_seed",
    "persistence_draws",
    "trend_draws",
    "vintage_messages",
    "format_backtest_table",
    "run_backtest",
    "run_backtest_command",
    "write_backtest_outputs",
]

METHODS = ("casecloud", "persistence", "trend")
NOWCAST_METHODS = ("casecloud", "reported", "chain_ladder")
CAUTIONS = (
    "Model-based estimates with uncertainty; decision support only; local public-health judgement and "
    "reporting rules prevail. Backtest scores describe this history only (replayed as finally reported, "
    "without the reporting delays and revisions of real time) and do not guarantee future performance."
)
CAUTIONS_VINTAGES = (  # runs on a history with data vintages (an as_of column)
    "Model-based estimates with uncertainty; decision support only; local public-health judgement and "
    "reporting rules prevail. Backtest scores describe this history only (replayed as known on each as-of "
    "date and scored against the last vintage of each period, which later reports may still revise) and do "
    "not guarantee future performance."
)
MIN_PAST = 3  # observed values of a series needed at an origin before it is scored
MIN_LOG_SD = 0.1  # baselines' predictive sd on the log (logit) scale is at least this: a flat past gives no point mass
_NOWCAST_KEY = 99  # last word of the nowcast draws' seed (deployment seed, stream words, step, this)
TREND_DAYS = 14
_LEVELS = np.asarray(FORECAST_LEVELS)
_IDX = {lv: int(np.flatnonzero(np.isclose(_LEVELS, lv))[0]) for lv in (0.05, 0.25, 0.5, 0.75, 0.95)}
SCORE_KEYS = ("method", "series", "horizon", "n", "wis", "crps", "coverage_50", "coverage_90", "log_score", "bias")
ORIGIN_KEYS = (
    "method", "series", "origin_period", "origin_day", "horizon", "target_period", "observed",
    "median", "q05", "q25", "q75", "q95", "wis", "crps", "log_score",
    "kind", "tests", "lod", "censored",
)  # fmt: skip
VINTAGE_ORIGIN_KEYS = ORIGIN_KEYS + ("as_of",)  # per_origin rows of runs with vintages
NOWCAST_SCORE_KEYS = ("method", "series", "periods_back", "n", "wis", "crps", "coverage_50", "coverage_90", "log_score", "bias")
NOWCAST_ORIGIN_KEYS = (
    "method", "series", "as_of", "origin_day", "periods_back", "target_period", "reported", "eventual",
    "median", "q05", "q25", "q75", "q95", "wis", "crps", "log_score",
)  # fmt: skip


class BacktestError(Exception):
    """An unusable request (unknown stream, history with nothing the model observes, ...)."""


@dataclass
class _Origin:
    period: str
    day: int
    date: dt.date
    step: int
    draws: dict[str, np.ndarray]  # series -> (M, len(horizons)) reported-count draws
    as_of: dt.date | None = None  # runs with vintages: the as-of date the origin closes
    nowcast: dict[tuple[str, int], np.ndarray] | None = None  # (series, model day) -> (M,) eventual-count draws
    estimate: int | None = None  # index of the estimate published last at the origin
    extra: dict[str, Any] | None = None  # concentration series: expected levels and trajectory parameters


def _words(stream: str) -> list[int]:
    digest = hashlib.sha256(stream.encode("utf-8")).digest()
    return [int.from_bytes(digest[i : i + 4], "little") for i in range(0, 16, 4)]


def origin_seed(seed: int, stream: str, step: int) -> int:
    """The forecast seed of the origin after filter step ``step``: from (deployment seed, stream id, step)."""
    return int(np.random.SeedSequence([int(seed), *_words(stream), int(step)]).generate_state(1, np.uint64)[0])


def _baseline_rng(seed: int, stream: str, step: int, method: int, series: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([int(seed), *_words(stream), int(step), 1 + method, series]))


# ----------------------------------------------------------------- baselines
def _negbin(rng: np.random.Generator, mean: float, var: float, size: tuple[int, ...]) -> np.ndarray:
    if var <= mean * (1 + 1e-9):
        return rng.poisson(mean, size)
    n = mean * mean / (var - mean)
    return rng.negative_binomial(n, n / (n + mean), size)


def persistence_draws(past_days: np.ndarray, past: np.ndarray, horizons: list[int], m: int, rng) -> np.ndarray:
    """(m, len(horizons)) draws of the persistence baseline (see the module docstring)."""
    last = float(past[-1])
    diffs = np.diff(past.astype(float))
    s2 = float(np.mean(diffs**2)) if diffs.size else 0.0
    spacing = float(np.median(np.diff(past_days))) if past_days.size > 1 else 1.0
    mean = max(last, 0.5)
    out = np.empty((m, len(horizons)), dtype=np.int64)
    for j, h in enumerate(horizons):
        out[:, j] = _negbin(rng, mean, mean + s2 * h / max(spacing, 1.0), (m,))
    return out


def _trend_normal(past_days: np.ndarray, z: np.ndarray, origin_day: int, horizons: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """Normal predictive (mean, variance) per horizon of a least-squares line through ``z`` (a
    transformed series) over the rows of the last TREND_DAYS days (at least the last MIN_PAST)."""
    recent = past_days > origin_day - TREND_DAYS
    if recent.sum() < MIN_PAST:
        recent = np.zeros(z.size, dtype=bool)
        recent[-MIN_PAST:] = True
    x = past_days[recent].astype(float)
    z = z[recent]
    n = x.size
    xbar = x.mean()
    sxx = float(np.sum((x - xbar) ** 2))
    slope = float(np.sum((x - xbar) * (z - z.mean())) / sxx) if sxx > 0 else 0.0
    intercept = float(z.mean() - slope * xbar)
    resid = z - (intercept + slope * x)
    s2 = float(np.sum(resid**2) / (n - 2)) if n > 2 else 0.0
    x1 = origin_day + np.asarray(horizons, dtype=float)
    var = s2 * (1 + 1 / n + ((x1 - xbar) ** 2 / sxx if sxx > 0 else 0.0))
    return intercept + slope * x1, var


def trend_draws(past_days: np.ndarray, past: np.ndarray, origin_day: int, horizons: list[int], m: int, rng) -> np.ndarray:
    """(m, len(horizons)) draws of the log-linear trend baseline (see the module docstring)."""
    mean, var = _trend_normal(past_days, np.log(past.astype(float) + 1.0), origin_day, horizons)
    out = np.empty((m, len(horizons)), dtype=np.int64)
    for j in range(len(horizons)):
        eta = float(mean[j]) + math.sqrt(float(var[j])) * rng.standard_normal(m)
        lam = np.clip(np.expm1(np.minimum(eta, math.log(1e9))), 0.0, 1e9)
        out[:, j] = rng.poisson(lam)
    return out


def _persistence_normal(past_days: np.ndarray, z: np.ndarray, horizons: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """Random-walk predictive (mean, variance) per horizon of a transformed series ``z``: the last
    value, variance ``s2 * h / spacing`` (``s2`` the mean squared one-step change so far)."""
    diffs = np.diff(z)
    s2 = float(np.mean(diffs**2)) if diffs.size else 0.0
    spacing = float(np.median(np.diff(past_days))) if past_days.size > 1 else 1.0
    h = np.asarray(horizons, dtype=float)
    return np.full(h.size, float(z[-1])), s2 * h / max(spacing, 1.0)


def _scale_baseline(kind: str, method: str, past_days, past, past_tests, origin_day, horizons, target_tests, m, rng):
    """Baseline draws for a positivity or concentration series, and the normal predictive (mean, sd)
    of their log-scale level (concentration) for the exact log score (module docstring, "Evidence
    other than counts")."""
    if kind == "positivity":
        z = np.log((past + 0.5) / (past_tests - past + 0.5))  # empirical logit of the share positive
    else:
        z = np.log(past)
    mean, var = (_persistence_normal(past_days, z, horizons) if method == "persistence"
                 else _trend_normal(past_days, z, origin_day, horizons))  # fmt: skip
    sd = np.sqrt(np.maximum(var, MIN_LOG_SD**2))
    eta = mean + sd * rng.standard_normal((m, len(horizons)))
    if kind == "positivity":
        return rng.binomial(np.asarray(target_tests, dtype=np.int64), 1.0 / (1.0 + np.exp(-eta))), None
    return np.exp(np.minimum(eta, 700.0)), (mean, sd)


# -------------------------------------------------------------------- replay
def _service(config, history, stream_id: str, checkpoint_dir: Path, today: dt.date):
    """A Service for ``stream_id`` alone on a memory transport, checkpoints in ``checkpoint_dir``."""
    from ..runtime.app import Service
    from ..state import LocalCheckpointStore
    from ..transports import MemoryTransport

    scfg = next(s for s in config.streams if s.id == stream_id)
    config = config.model_copy(
        update={
            "streams": [scfg],
            "metrics": config.metrics.model_copy(update={"enabled": False}),
            "service": config.service.model_copy(update={"checkpoint_dir": checkpoint_dir, "checkpoint_store": "local"}),
        }
    )
    store = LocalCheckpointStore(checkpoint_dir, keep=config.service.keep_checkpoints)
    transport = MemoryTransport([])
    service = Service(config, transport, store=store, today=lambda: today)
    model = service.registry.models[stream_id]
    series_names = [s.name for s in model.series if s.name in history.series]
    return config, scfg, transport, service, model, series_names


def _published(transport) -> tuple[list[dict], list[dict], list[dict]]:
    return tuple([orjson.loads(r.value) for r in transport.published[topic]] for topic in ("estimates", "alerts", "dead_letters"))  # type: ignore[return-value]


def _forecast_draws(config, runtime, stream_id: str, series_names, hmax: int, cols: list[int], trajectories: int):
    """(draws, extra): series -> (M, len(cols)) draws; ``extra`` holds, for concentration series, the
    trajectories' expected (median) levels (``expected``) and the parameters of the particle each
    trajectory started from (``params``, (M, n_params)), which the exact log score needs."""
    pf = runtime.filter
    fc = forecast(
        runtime.model, pf.particles, pf.weights(), pf.time, hmax, trajectories,
        seed=origin_seed(config.service.seed, stream_id, pf.step_count),
    )  # fmt: skip
    draws = {name: np.array(fc.reported[name][:, cols]) for name in series_names}
    kinds = _kinds(runtime.model)
    extra: dict[str, Any] = {"expected": {}, "params": None}
    if any(kinds.get(name) in ("positivity", "concentration") for name in series_names):
        extra["params"] = np.array(pf.particles.params[fc.ancestors])
        extra["expected"] = {name: np.array(fc.expected[name][:, cols]) for name in series_names if kinds.get(name) == "concentration"}
    return draws, extra


def _replay(config, history, stream_id: str, horizons: list[int], trajectories: int, checkpoint_dir: Path, progress=None):
    today = max(history.dates) + dt.timedelta(days=1)
    config, scfg, transport, service, model, series_names = _service(config, history, stream_id, checkpoint_dir, today)
    from schemas import message_fields

    kinds = _kinds(model)
    messages = []
    for i, (period, counts) in enumerate(zip(history.periods, history.values)):
        fields = message_fields(counts, *history.details(i), kinds, series_names)
        messages.append(orjson.dumps({"stream": stream_id, "period": period, **fields}))
    for value in messages:
        transport.feed(value)
    origins: list[_Origin] = []
    hmax = max(horizons)
    cols = [h - 1 for h in horizons]

    handled = [0]

    def hook(outcome) -> None:
        handled[0] += 1
        if progress is not None:
            progress(handled[0], len(messages))
        if outcome.status != "applied" or outcome.stream != stream_id:
            return
        runtime = service.registry.runtimes[stream_id]
        pf = runtime.filter
        draws, extra = _forecast_draws(config, runtime, stream_id, series_names, hmax, cols, trajectories)
        date = scfg.start + dt.timedelta(days=int(runtime.last_day))
        origins.append(_Origin(str(runtime.last_period), int(runtime.last_day), date, pf.step_count, draws, extra=extra))

    service.on_outcome = hook
    counts = asyncio.run(service.run(until_exhausted=True))
    estimates, alerts, dead = _published(transport)
    return model, scfg, series_names, origins, estimates, alerts, dead, counts


def _kinds(model) -> dict[str, str]:
    return {s.name: getattr(s, "kind", "incidence") for s in model.series}


def vintage_messages(history, stream_id: str, series_names: list[str], kinds: dict[str, str] | None = None) -> list[bytes]:
    """The messages a history with vintages is replayed as: one per row, in file order, with the
    row's ``as_of`` (none for a final row) and its values of ``series_names`` (empty cells null):
    counts, positivity series' tests and concentration series' samples (``kinds``: series -> kind;
    None: every series a count)."""
    from schemas import message_fields

    out = []
    for v in history.vintages:
        body: dict[str, Any] = {"stream": stream_id, "period": v.period}
        if v.as_of is not None:
            body["as_of"] = v.as_of.isoformat()
        body.update(message_fields(v.counts, v.tests, v.limits, v.flows, kinds or {}, series_names))
        out.append(orjson.dumps(body))
    return out


def _replay_vintages(config, history, stream_id: str, horizons: list[int], trajectories: int, checkpoint_dir: Path, progress=None):
    """Replay every vintage row in file order; an origin after the last row of each as-of date (if the
    service applied any row of that date): forecast draws, nowcast draws and the latest estimate."""
    today = max([*history.dates, *(v.known for v in history.vintages)]) + dt.timedelta(days=1)
    config, scfg, transport, service, model, series_names = _service(config, history, stream_id, checkpoint_dir, today)
    messages = vintage_messages(history, stream_id, series_names, _kinds(model))
    for value in messages:
        transport.feed(value)
    known = [v.known for v in history.vintages]
    closes = [i == len(known) - 1 or known[i + 1] != known[i] for i in range(len(known))]
    origins: list[_Origin] = []
    hmax = max(horizons)
    cols = [h - 1 for h in horizons]
    handled = [0]
    applied = [False]
    raised: list[tuple[dt.date, dict]] = []  # (as-of date, alert) in publishing order

    def hook(outcome) -> None:
        i = handled[0]
        handled[0] += 1
        if progress is not None:
            progress(handled[0], len(messages))
        if outcome.status == "applied" and outcome.stream == stream_id:
            applied[0] = True
            raised.extend((known[i], orjson.loads(r.value)) for r in outcome.outputs if r.kind == "alerts")
        if not closes[i]:
            return
        if not applied[0]:
            return
        applied[0] = False
        runtime = service.registry.runtimes[stream_id]
        pf = runtime.filter
        draws, extra = _forecast_draws(config, runtime, stream_id, series_names, hmax, cols, trajectories)
        rng = np.random.default_rng(np.random.SeedSequence([int(config.service.seed), *_words(stream_id), int(pf.step_count), _NOWCAST_KEY]))
        nowcasts = nowcast_draws(runtime.model, pf.particles, pf.weights(), runtime.known, pf.time, trajectories, rng)
        date = scfg.start + dt.timedelta(days=int(runtime.last_day))
        origins.append(
            _Origin(str(runtime.last_period), int(runtime.last_day), date, pf.step_count, draws,
                    as_of=known[i], nowcast=nowcasts, estimate=len(transport.published["estimates"]) - 1, extra=extra)
        )  # fmt: skip

    service.on_outcome = hook
    counts = asyncio.run(service.run(until_exhausted=True))
    estimates, _, dead = _published(transport)
    alerts = [{**a, "period": when.isoformat()} for when, a in raised]  # dated by the as-of date they were raised on
    return model, scfg, series_names, origins, estimates, alerts, dead, counts


# ------------------------------------------------------------------- scoring
def _r(x: Any) -> float | None:
    x = float(x)
    return round(x, 6) if math.isfinite(x) else None


def _quantile_scores(q: Any, sc: dict[str, Any], k: int) -> dict[str, Any]:
    """The median, the 5/25/75/95 % quantiles and the scores of target ``k``, as a row's columns."""
    return {
        "median": _r(q[_IDX[0.5]]),
        "q05": _r(q[_IDX[0.05]]),
        "q25": _r(q[_IDX[0.25]]),
        "q75": _r(q[_IDX[0.75]]),
        "q95": _r(q[_IDX[0.95]]),
        "wis": _r(sc["wis"][k]),
        "crps": _r(sc["crps"][k]),
        "log_score": _r(sc["log"][k]),
    }


def _sample_scores(draws: np.ndarray, y: np.ndarray) -> dict[str, np.ndarray]:
    """Quantiles, WIS, CRPS and 50 % / 90 % interval coverage of (M, k) draws against k values."""
    q = np.quantile(draws, _LEVELS, axis=0)  # (23, k)
    return {
        "q": q,
        "wis": weighted_interval_score(_LEVELS, q, y),
        "crps": crps_from_samples(draws, y),
        "cov50": ((q[_IDX[0.25]] <= y) & (y <= q[_IDX[0.75]])).astype(float),
        "cov90": ((q[_IDX[0.05]] <= y) & (y <= q[_IDX[0.95]])).astype(float),
    }


def _score_block(draws: np.ndarray, y: np.ndarray) -> dict[str, np.ndarray]:
    """Scores of (M, k) draws against k observations."""
    return {**_sample_scores(draws, y), "log": log_score_from_samples(draws, y), "bias": bias(draws, y)}


def _realised(history, series: str) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """(days since the first row's date, values, periods) of the observed rows of ``series``."""
    first = history.dates[0]
    keep = [i for i, v in enumerate(history.values) if v.get(series) is not None]
    days = np.array([(history.dates[i] - first).days for i in keep], dtype=np.int64)
    vals = np.array([history.values[i][series] for i in keep], dtype=np.int64)
    return days, vals, [history.periods[i] for i in keep]


def alert_episodes(history, rule, alerts: list[dict]) -> list[dict[str, Any]]:
    from schemas import parse_period

    events = [(parse_period(a["period"]), a["status"], a["period"]) for a in alerts if a["rule"] == rule.name]
    rows = [(p, d, v[rule.series]) for p, d, v in zip(history.periods, history.dates, history.values) if v.get(rule.series) is not None]
    out: list[dict[str, Any]] = []
    prev_above = False
    prev_end: dt.date | None = None  # last exceeding day of the previous episode
    last_above: dt.date | None = None
    for period, date, value in rows:
        above = value > rule.threshold
        if above and not prev_above:
            active: tuple[dt.date, str] | None = None
            for when, status, raised_period in events:
                if when > date:
                    break
                if status == "raised":
                    active = (when, raised_period)
                elif status == "cleared" and when < date:
                    active = None
            if active is not None and prev_end is not None and active[0] <= prev_end:
                active = None  # still the alert of an earlier episode
            out.append(
                {
                    "first_exceeding_period": period,
                    "raised_period": None if active is None else active[1],
                    "lead_days": None if active is None else (date - active[0]).days,
                }
            )
        if not above and prev_above:
            prev_end = last_above
        if above:
            last_above = date
        prev_above = above
    return out


def _alert_rows(history, scfg, origins: list[_Origin], estimates: list[dict], alerts: list[dict]) -> list[dict[str, Any]]:
    by_period = {e["period"]: e for e in estimates}
    last = history.dates[-1]
    rows = []
    for rule in scfg.alerts:
        dates = np.array([d.toordinal() for d in history.dates])
        vals = [v.get(rule.series) for v in history.values]
        probs, events = [], []
        for o in origins:
            est = by_period.get(o.period) if o.estimate is None else estimates[o.estimate]
            if est is None or rule.name not in (est.get("exceedance") or {}):
                continue
            end = o.date + dt.timedelta(days=rule.horizon_days)
            if end > last:
                continue
            window = [vals[i] for i in np.flatnonzero((dates > o.date.toordinal()) & (dates <= end.toordinal())) if vals[i] is not None]
            if not window:
                continue
            probs.append(est["exceedance"][rule.name]["probability"])
            events.append(any(v > rule.threshold for v in window))
        roc: dict[str, list] = {"fpr": [], "tpr": [], "thresholds": []}
        area = None
        if events and any(events) and not all(events):
            fpr, tpr, thr = roc_curve(probs, events)
            roc = {"fpr": [_r(v) for v in fpr], "tpr": [_r(v) for v in tpr], "thresholds": [_r(v) for v in thr]}
            area = _r(auc(probs, events))
        rows.append(
            {
                "rule": rule.name,
                "series": rule.series,
                "threshold": rule.threshold,
                "horizon_days": rule.horizon_days,
                "auc": area,
                "roc": roc,
                "episodes": alert_episodes(history, rule, alerts),
                "n_origins": len(events),
                "n_events": int(sum(events)),
            }
        )
    return rows


def run_backtest(
    config,
    history,
    stream_id: str,
    horizons: list[int] = (1, 7, 14),  # type: ignore[assignment]
    trajectories: int | None = None,
    checkpoint_dir: Path | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> dict[str, Any]:
    """Replay ``history`` through the service for ``stream_id`` and score it; returns the
    ``backtest.json`` document (see the module docstring) plus a private ``_replay`` entry
    (service counts, published estimates and alerts, dead-letter reasons) that is not written.

    ``checkpoint_dir``: where the replay's checkpoints go (must be empty or absent); default a
    temporary directory removed afterwards. ``progress(done, total)``, if given, is called after
    each history row the service has handled (the replay is nearly all of the time)."""
    horizons = sorted({int(h) for h in horizons})
    if not horizons or horizons[0] < 1 or horizons[-1] > 90:
        raise BacktestError(f"horizons must be whole days in 1..90, got {horizons}")
    scfg = next((s for s in config.streams if s.id == stream_id), None)
    if scfg is None:
        raise BacktestError(f"stream {stream_id!r} is not configured; configured: {sorted(s.id for s in config.streams)}")
    from ..runtime.streams import load_stream_model

    stream_model = load_stream_model(scfg)
    observed = [s.name for s in stream_model.series]
    if not set(observed) & set(history.series):
        raise BacktestError(
            f"the history's series {history.series} include none that the model of stream {stream_id!r} observes ({observed})"
        )
    history.check_kinds({s.name: getattr(s, "kind", "incidence") for s in stream_model.series},
                        f"model {stream_model.name!r} of stream {stream_id!r}")
    m = int(trajectories or scfg.forecast_trajectories)
    if m < 10:
        raise BacktestError(f"trajectories must be at least 10, got {m}")
    if checkpoint_dir is not None and Path(checkpoint_dir).exists() and any(Path(checkpoint_dir).iterdir()):
        raise BacktestError(f"checkpoint directory {checkpoint_dir} is not empty; a backtest replays from scratch")
    vintaged = history.vintages is not None
    with tempfile.TemporaryDirectory(prefix="casecloud-backtest-") as tmp:
        where = Path(checkpoint_dir) if checkpoint_dir is not None else Path(tmp)
        replay = _replay_vintages if vintaged else _replay
        model, scfg, series_names, origins, estimates, alerts, dead, counts = replay(config, history, stream_id, horizons, m, where, progress)
    seed = config.service.seed
    complete = _complete(history, model, scfg.start) if vintaged else None
    per_origin, scores = _score_forecasts(history, origins, series_names, horizons, m, seed, stream_id, complete, model)
    alert_rows = _alert_rows(history, scfg, origins, estimates, alerts)
    for row in alert_rows:  # kept internal: not part of the documented document
        row.pop("n_origins"), row.pop("n_events")
    doc: dict[str, Any] = {
        "stream": stream_id,
        "model": model.spec.name,
        "history": {"first": history.periods[0], "last": history.periods[-1], "n": len(history)},
        "horizons": horizons,
        "methods": list(METHODS),
        "scores": scores,
        "per_origin": per_origin,
        "alerts": alert_rows,
        "cautions": CAUTIONS,
    }
    if vintaged:
        as_ofs = [v.known for v in history.vintages]
        doc["history"].update(vintages=len(history.vintages), first_as_of=min(as_ofs).isoformat(), last_as_of=max(as_ofs).isoformat())
        nc_rows, nc_scores = _score_nowcasts(history, model, scfg.start, origins, series_names, m, seed, stream_id, complete)
        doc.update(nowcast_methods=list(NOWCAST_METHODS), nowcast_scores=nc_scores, nowcast_per_origin=nc_rows,
                   cautions=CAUTIONS_VINTAGES)  # fmt: skip
    doc["_replay"] = {"counts": counts, "estimates": estimates, "alerts": alerts,
                      "dead_letters": [d["reason"] for d in dead], "trajectories": m,
                      "origins": origins}  # fmt: skip
    return doc


def _complete(history, model, start: dt.date) -> dict[str, np.ndarray]:
    """series -> (P,) bool: is the period's eventual count complete (see the module docstring)?
    Report-dated series are final on arrival; an event-dated one is complete after a final row, or
    when the history's last as-of date is at least its reporting delay's max_days after the period's end."""
    out: dict[str, np.ndarray] = {}
    index = {d: i for i, d in enumerate(history.dates)}
    end_of_history = max(v.known for v in history.vintages)
    for spec in model.spec.series:
        if spec.name not in history.series:
            continue
        ok = np.array([v.get(spec.name) is not None for v in history.values])
        if spec.dated_by == "event" and spec.reporting_delay is not None:
            final = {index[v.date] for v in history.vintages if v.as_of is None and v.counts.get(spec.name) is not None}
            lag = dt.timedelta(days=spec.reporting_delay.max_days)
            ok &= np.array([i in final or history.dates[i] + lag <= end_of_history for i in range(len(history))])
        out[spec.name] = ok
    return out


def _casecloud_positives(model, series: str, o: _Origin, targets: list[int], tests: np.ndarray, rng) -> np.ndarray:
    """(M, k) positives out of the realised ``tests`` per target, from each trajectory's share positive:
    binomial, or beta-binomial with the trajectory's concentration phi (its particle's parameter)."""
    s = model.series_named(series)
    p = np.clip(o.draws[series][:, targets], 0.0, 1.0)
    if s.noise == "betabinomial":
        phi = s.dispersion if s.dispersion_param is None else o.extra["params"][:, [s.dispersion_param]]
        phi = np.broadcast_to(phi, p.shape)
        inner = (p > 0) & (p < 1)  # p of exactly 0 or 1 is a point mass
        p = np.where(inner, rng.beta(np.where(inner, p * phi, 1.0), np.where(inner, (1.0 - p) * phi, 1.0)), p)
    return rng.binomial(np.broadcast_to(tests.astype(np.int64), p.shape), p)


def _level_log_score(y: float, medians: np.ndarray, sd: np.ndarray | float, lod: float | None, df: float | None) -> float:
    """-log of the predictive density of a concentration ``y`` (or of P(below ``lod``) when censored):
    the equally weighted mixture over trajectories of the measurement law around each median."""
    logs = log_concentration_loglik(y, medians, sd, lod, df)
    return float(-(np.logaddexp.reduce(logs) - math.log(logs.size)))


def _censored(y: float, lod: float | None) -> bool:
    return lod is not None and y < lod


def _score_levels(draws: np.ndarray, y: np.ndarray, lods: list[float | None], log_scores: np.ndarray) -> dict[str, np.ndarray]:
    """Scores of (M, k) level draws against k samples, each on the scale of what its lab can see: a
    target with a limit of detection compares max(X, lod) with max(y, lod) (censored from below; for a
    sample not detected, max(y, lod) = lod is exactly what is known). CRPS on that scale is the
    threshold-weighted CRPS with weight 1{z >= lod} (Gneiting & Ranjan 2011). The bias is the
    continuous form 1 - 2 P(X <= y) (Funk et al. 2019); ``log_scores`` come exact from the densities."""
    floor = np.array([0.0 if v is None else v for v in lods])
    x = np.maximum(draws, floor)
    yy = np.maximum(y, floor)
    return {
        **_sample_scores(x, yy),
        "log": np.asarray(log_scores, dtype=float),
        "bias": 1.0 - 2.0 * np.mean(x <= yy, axis=0),
    }


def _score_forecasts(history, origins, series_names, horizons, m, seed, stream_id, complete, model=None):
    """per_origin rows and scores rows of the forecasts (module docstring). ``complete`` is None for a
    history without vintages; with vintages it marks the periods whose eventual count can be a target,
    and the baselines see the counts known at each origin's as-of date. ``model``: the stream's model
    (series kinds and measurement laws; None: every series a count)."""
    kinds = _kinds(model) if model is not None else {}
    first = history.dates[0]
    per_origin: list[dict[str, Any]] = []
    acc: dict[tuple[str, str, int], dict[str, list[float]]] = {}
    date_index = {d: i for i, d in enumerate(history.dates)}
    all_days = np.array([(d - first).days for d in history.dates], dtype=np.int64)
    known_at: dict[dt.date, list[dict[str, Any]]] = {}
    tests_of = lambda i, name: history.tests[i].get(name) if history.tests else None
    lod_of = lambda i, name: history.limits[i].get(name) if history.limits else None
    flow_of = lambda i, name: history.flows[i].get(name) if history.flows else None
    for si, series in enumerate(series_names):
        kind = kinds.get(series, "incidence")
        level = kind == "concentration"
        for o in origins:
            oday = (o.date - first).days
            if complete is None:
                rows = history.values
            else:
                if o.as_of not in known_at:
                    known_at[o.as_of] = history.as_known(o.as_of)
                rows = known_at[o.as_of]
            seen = [i for i, v in enumerate(rows) if all_days[i] <= oday and v.get(series) is not None]
            past_days = all_days[seen]
            past_vals = np.array([rows[i][series] for i in seen], dtype=float if level else np.int64)
            if past_days.size < MIN_PAST:
                continue
            targets, ys, hs, rows_t = [], [], [], []
            for j, h in enumerate(horizons):
                i = date_index.get(o.date + dt.timedelta(days=h))
                if i is not None and history.values[i].get(series) is not None and (complete is None or complete[series][i]):
                    targets.append(j)
                    ys.append(history.values[i][series])
                    hs.append(h)
                    rows_t.append(i)
            if not targets:
                continue
            y = np.asarray(ys, dtype=float)
            brng = (_baseline_rng(seed, stream_id, o.step, 0, si), _baseline_rng(seed, stream_id, o.step, 1, si))
            tests_t = np.array([tests_of(i, series) or 0 for i in rows_t], dtype=np.int64)
            lods_t = [lod_of(i, series) for i in rows_t]
            if kind == "positivity":
                past_tests = np.array([tests_of(i, series) for i in seen], dtype=float)
                draws = {"casecloud": _casecloud_positives(model, series, o, targets, tests_t, _baseline_rng(seed, stream_id, o.step, 3, si))}
                for b, method in enumerate(("persistence", "trend")):
                    draws[method], _ = _scale_baseline(kind, method, past_days, past_vals.astype(float), past_tests, oday, hs, tests_t, m, brng[b])
                sc = {method: _score_block(draws[method], y) for method in METHODS}
            elif level:
                # past samples not detected (or below their limit) enter the baselines at half the limit (common practice)
                past_lods = [lod_of(i, series) for i in seen]
                past = np.array([v / 2 if _censored(x, v) else x for x, v in zip(past_vals, past_lods)], dtype=float)
                spec = model.series_named(series)
                sh = spec.shedding
                dil = np.array([sh.reference_flow / f if (f := flow_of(i, series)) and sh.reference_flow else 1.0 for i in rows_t])
                sd = sh.noise_sd[0] if sh.noise_sd[1] is None else o.extra["params"][:, sh.noise_sd[1]]
                medians = o.extra["expected"][series][:, targets] * dil
                draws = {"casecloud": o.draws[series][:, targets] * dil}
                logs = {"casecloud": np.array([_level_log_score(y[k], medians[:, k], sd, lods_t[k], sh.df) for k in range(len(hs))])}
                for b, method in enumerate(("persistence", "trend")):
                    draws[method], (mu, bsd) = _scale_baseline(kind, method, past_days, past, None, oday, hs, None, m, brng[b])
                    logs[method] = np.array([_level_log_score(y[k], np.exp([mu[k]]), bsd[k], lods_t[k], None) for k in range(len(hs))])
                sc = {method: _score_levels(draws[method], y, lods_t, logs[method]) for method in METHODS}
            else:
                draws = {
                    "casecloud": o.draws[series][:, targets],
                    "persistence": persistence_draws(past_days, past_vals, hs, m, brng[0]),
                    "trend": trend_draws(past_days, past_vals, oday, hs, m, brng[1]),
                }
                sc = {method: _score_block(draws[method], y) for method in METHODS}
            for method in METHODS:
                for k, h in enumerate(hs):
                    q = sc[method]["q"][:, k]
                    row = {
                        "method": method,
                        "series": series,
                        "origin_period": o.period,
                        "origin_day": o.day,
                        "horizon": h,
                        "target_period": history.periods[rows_t[k]],
                        "observed": _r(ys[k]) if level else int(ys[k]),
                        **_quantile_scores(q, sc[method], k),
                        "kind": kind,
                        "tests": int(tests_t[k]) if kind == "positivity" else None,
                        "lod": lods_t[k] if level else None,
                        "censored": int(_censored(ys[k], lods_t[k])) if level else None,
                    }
                    if complete is not None:
                        row["as_of"] = o.as_of.isoformat()
                    per_origin.append(row)
                    bucket = acc.setdefault((method, series, h), {k2: [] for k2 in ("wis", "crps", "cov50", "cov90", "log", "bias")})
                    for k2 in bucket:
                        bucket[k2].append(float(sc[method][k2][k]))
    scores = []
    for method in METHODS:
        for series in series_names:
            for h in horizons:
                b = acc.get((method, series, h))
                if not b:
                    continue
                scores.append({"method": method, "series": series, "horizon": h, **_means(b)})
    return per_origin, scores


def _means(b: dict[str, list[float]]) -> dict[str, Any]:
    return {
        "n": len(b["wis"]),
        "wis": _r(np.mean(b["wis"])),
        "crps": _r(np.mean(b["crps"])),
        "coverage_50": _r(np.mean(b["cov50"])),
        "coverage_90": _r(np.mean(b["cov90"])),
        "log_score": _r(np.mean(b["log"])),
        "bias": _r(np.mean(b["bias"])),
    }


def _score_nowcasts(history, model, start: dt.date, origins, series_names, m, seed, stream_id, complete):
    """nowcast_per_origin and nowcast_scores rows (module docstring, "Nowcasts")."""
    rows: list[dict[str, Any]] = []
    acc: dict[tuple[str, str, int], dict[str, list[float]]] = {}
    ends = np.array([(d - start).days for d in history.dates], dtype=np.int64)
    index = {d: i for i, d in enumerate(history.dates)}
    event = [sp for sp in model.spec.series if sp.name in series_names and sp.dated_by == "event" and sp.reporting_delay is not None]
    for spec in event:
        si = series_names.index(spec.name)
        given = [v for v in history.vintages if v.counts.get(spec.name) is not None]  # in known-date order
        vp = np.array([index[v.date] for v in given], dtype=np.intp)
        va = np.array([(v.known - start).days for v in given], dtype=np.int64)
        vv = np.array([v.counts[spec.name] for v in given], dtype=float)
        final = np.array([v.as_of is None for v in given], dtype=bool)
        for o in origins:
            a = (o.as_of - start).days
            seen = va <= a
            # latest row known at the origin, per period (rows are in known-date order)
            latest: dict[int, int] = {int(p): j for j, p in zip(np.flatnonzero(seen), vp[seen])}
            newest_first = sorted((p for p in latest if ends[p] <= a), key=lambda p: -ends[p])
            fit = chain_ladder(reporting_triangle(ends, vp, va, vv, a, spec.reporting_delay.max_days))
            targets, back = [], []
            for k, p in enumerate(newest_first):
                j = latest[p]
                if final[j] or not complete[spec.name][p] or (spec.name, int(ends[p])) not in o.nowcast:
                    continue
                if not (np.isfinite(fit.ultimate[p]) and np.isfinite(fit.mse[p])):
                    continue
                targets.append(p)
                back.append(k)
            if not targets:
                continue
            tp = np.array(targets, dtype=np.intp)
            y = np.array([history.values[p][spec.name] for p in targets], dtype=float)
            reported = vv[[latest[p] for p in targets]]
            draws = {
                "casecloud": np.stack([o.nowcast[(spec.name, int(ends[p]))] for p in targets], axis=1),
                "reported": np.broadcast_to(reported, (m, len(targets))),
                "chain_ladder": chain_ladder_draws(fit, tp, m, _baseline_rng(seed, stream_id, o.step, 2, si)),
            }
            for method in NOWCAST_METHODS:
                sc = _score_block(draws[method], y)
                for k, p in enumerate(targets):
                    q = sc["q"][:, k]
                    rows.append(
                        {
                            "method": method,
                            "series": spec.name,
                            "as_of": o.as_of.isoformat(),
                            "origin_day": a,
                            "periods_back": back[k],
                            "target_period": history.periods[p],
                            "reported": int(reported[k]),
                            "eventual": int(y[k]),
                            **_quantile_scores(q, sc, k),
                        }
                    )
                    bucket = acc.setdefault((method, spec.name, back[k]), {k2: [] for k2 in ("wis", "crps", "cov50", "cov90", "log", "bias")})
                    for k2 in bucket:
                        bucket[k2].append(float(sc[k2][k]))
    scores = []
    for method in NOWCAST_METHODS:
        for spec in event:
            for back in sorted(k for (mm, name, k) in acc if mm == method and name == spec.name):
                scores.append({"method": method, "series": spec.name, "periods_back": back, **_means(acc[(method, spec.name, back)])})
    return rows, scores


# ------------------------------------------------------------------- outputs
def _csv(path: Path, keys: tuple[str, ...], rows: list[dict[str, Any]]) -> None:
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.DictWriter(f, fieldnames=list(keys), lineterminator="\n")
        w.writeheader()
        for row in rows:
            w.writerow({k: "" if row[k] is None else row[k] for k in keys})


def write_backtest_outputs(result: dict[str, Any], out: Path) -> list[Path]:
    """Write backtest.json, scores.csv and per_origin.csv into ``out`` (runs with vintages: also
    nowcast_scores.csv and nowcast_per_origin.csv)."""
    out.mkdir(parents=True, exist_ok=True)
    doc = {k: v for k, v in result.items() if not k.startswith("_")}
    vintaged = "nowcast_scores" in doc
    paths = [out / "backtest.json", out / "scores.csv", out / "per_origin.csv"]
    paths[0].write_bytes(orjson.dumps(doc, option=orjson.OPT_INDENT_2) + b"\n")
    _csv(paths[1], SCORE_KEYS, doc["scores"])
    _csv(paths[2], VINTAGE_ORIGIN_KEYS if vintaged else ORIGIN_KEYS, doc["per_origin"])
    if vintaged:
        paths += [out / "nowcast_scores.csv", out / "nowcast_per_origin.csv"]
        _csv(paths[3], NOWCAST_SCORE_KEYS, doc["nowcast_scores"])
        _csv(paths[4], NOWCAST_ORIGIN_KEYS, doc["nowcast_per_origin"])
    return paths


def _f(x: Any, fmt: str = "{:.2f}") -> str:
    return "-" if x is None else fmt.format(x)


def format_backtest_table(result: dict[str, Any]) -> str:
    """Readable summary: per series, method x horizon (WIS, CRPS, cov50, cov90), then alerts and cautions."""
    h = result["history"]
    lines = [
        f"casecloud backtest: stream {result['stream']} (model {result['model']}), "
        f"history {h['first']} .. {h['last']} ({h['n']} rows), horizons {result['horizons']} days",
    ]
    series = sorted({r["series"] for r in result["scores"]})
    kinds = {r["series"]: r.get("kind") for r in result.get("per_origin", [])}
    for s in series:
        level = kinds.get(s) == "concentration"
        what = {"concentration": "; levels, censored below the lab's limit; log = -log predictive density",
                "positivity": "; positives out of the realised tests"}.get(kinds.get(s) or "", "")  # fmt: skip
        lines += ["", f"series {s}  (lower WIS/CRPS{'/log' if level else ''} is better; nominal coverage 0.50 / 0.90{what})"]
        lines.append(f"{'method':<12}{'horizon':>8}{'n':>6}{'WIS':>10}{'CRPS':>10}{'cov50':>8}{'cov90':>8}" + (f"{'log':>9}" if level else ""))
        for r in result["scores"]:
            if r["series"] == s:
                lines.append(
                    f"{r['method']:<12}{r['horizon']:>8}{r['n']:>6}{_f(r['wis']):>10}{_f(r['crps']):>10}"
                    f"{_f(r['coverage_50']):>8}{_f(r['coverage_90']):>8}" + (f"{_f(r['log_score']):>9}" if level else "")
                )
    nowcast_series = sorted({r["series"] for r in result.get("nowcast_scores", [])})
    for s in nowcast_series:
        lines += ["", f"nowcast {s}: eventual counts by periods back (0 = latest; lower WIS/CRPS is better; nominal coverage 0.50 / 0.90)"]
        lines.append(f"{'method':<14}{'back':>6}{'n':>6}{'WIS':>10}{'CRPS':>10}{'cov50':>8}{'cov90':>8}")
        for r in result["nowcast_scores"]:
            if r["series"] == s:
                lines.append(
                    f"{r['method']:<14}{r['periods_back']:>6}{r['n']:>6}{_f(r['wis']):>10}{_f(r['crps']):>10}"
                    f"{_f(r['coverage_50']):>8}{_f(r['coverage_90']):>8}"
                )
    for a in result["alerts"]:
        leads = [e["lead_days"] for e in a["episodes"]]
        warned = [x for x in leads if x is not None]
        lines += [
            "",
            f"alert {a['rule']} ({a['series']} > {a['threshold']:g} within {a['horizon_days']} days): "
            f"AUC {_f(a['auc'], '{:.3f}')}; {len(leads)} realised episode(s), {len(warned)} with an alert raised"
            + (f" (lead days {warned})" if warned else ""),
        ]
    lines += ["", f"Cautions: {result['cautions']}"]
    return "\n".join(lines)


# ----------------------------------------------------------------------- CLI
def _horizons(text: str) -> list[int]:
    try:
        values = [int(part) for part in text.split(",") if part.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"horizons must be comma-separated whole days, e.g. 1,7,14; got {text!r}") from None
    if not values or min(values) < 1 or max(values) > 90:
        raise argparse.ArgumentTypeError(f"horizons must be whole days in 1..90, got {text!r}")
    return values


def add_backtest_parser(sub) -> None:
    p = sub.add_parser("backtest", help="replay a history through the service and score its forecasts and alerts")
    p.add_argument("--config", required=True, help="deployment config TOML")
    p.add_argument("--history", required=True,
                   help="CSV: period,<series...> (empty cell = not reported); with data vintages "
                        "period,as_of,<series...>, replayed as known on each as-of date")  # fmt: skip
    p.add_argument("--stream", required=True, help="stream id in the config")
    p.add_argument("--horizons", type=_horizons, default=[1, 7, 14], help="days ahead to score (default 1,7,14)")
    p.add_argument("--trajectories", type=int, help="draws per forecast (default: the stream's forecast_trajectories)")
    p.add_argument("--out", help="directory for backtest.json, scores.csv and per_origin.csv "
                                 "(with vintages also nowcast_scores.csv and nowcast_per_origin.csv)")
    p.set_defaults(handler=run_backtest_command)


def run_backtest_command(args: argparse.Namespace) -> int:
    from schemas import SpecError, load_deployment_config, load_history

    from ..console import Progress
    from ..errors import ServiceError

    def fail(message: str, code: int) -> int:
        print(f"casecloud backtest: {message}", file=sys.stderr)
        return code

    try:
        config = load_deployment_config(args.config)
        history = load_history(args.history)
        rows = len(history.vintages) if history.vintages is not None else len(history)
        with Progress("backtest", rows, "history rows") as shown:
            result = run_backtest(config, history, args.stream, args.horizons, args.trajectories,
                                  progress=lambda done, total: shown.update(done, total))
    except (SpecError, BacktestError) as exc:
        return fail(str(exc), 2)
    except ServiceError as exc:
        return fail(str(exc), 2)
    dead = result["_replay"]["dead_letters"]
    if dead:
        print(f"casecloud backtest: {len(dead)} history row(s) refused by the service: {sorted(set(dead))}", file=sys.stderr)
    if args.out:
        for path in write_backtest_outputs(result, Path(args.out)):
            print(path, file=sys.stderr)
    print(format_backtest_table(result))
    if not result["scores"] and not result.get("nowcast_scores"):
        return fail("nothing could be scored (no origin had an observed target at the requested horizons)", 1)
    return 0
