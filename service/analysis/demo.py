"""``casecloud demo``: a made-up season in the fictional Brackenford district.

A hidden "true" epidemic is simulated from the two-band SEIR example. Two
invented feeds report on it into one stream, which runs the
``seir_two_band_signals`` spec (the same epidemic model, observed by every feed):

* the ED feed: daily emergency-department visits per band (children,
  adults), final on arrival; on Sundays the children's and the adults'
  departments send their counts as separate messages (two feeds);
* the lab feed: weekly lab-confirmed positives by specimen date (ISO weeks).
  Reports of a week's specimens keep arriving for up to three weeks, so the
  lab sends each recent week's total *as of* its report day every Monday:
  first low, then revised upward (three vintages a week);
* the lab's test positivity: on weekdays, the day's positives with the number
  of tests run (people tested for other reasons test positive too, at a
  background rate);
* one wastewater site (the Millrace treatment works): samples taken on Mondays
  and Thursdays, their gene copies per litre sent the next day with the day's
  flow and the lab's limit of detection (early in the season some samples are
  below it and are sent as not detected).

The messages are written as an NDJSON feed, with a few mistakes slipped in,
and streamed through the same service code the Kafka deployment uses, over
the file transport. The service is stopped part-way and restarted, resuming
from its checkpoints without replaying history. The demo ends with a short
comparison of the estimates against the hidden truth, including the nowcast
of the last lab weeks against their eventual counts.

Beside the service's outputs it leaves what the other commands need:
``deployment.toml`` (the deployment config it ran with; relative paths, read
from the file's own directory, so it works from any working directory),
``history.csv`` (the clean ED feed, final counts, in the history CSV format),
``daily_history.csv`` (every daily feed: the ED counts, the lab's positives
with their tests and the wastewater samples with their limit and flow),
``lab_history.csv`` (the lab feed's vintages: a history CSV with an
``as_of`` column) and a copy of the example scenario file. Its closing lines
are the next commands (report, checkpoint show, scenario, a backtest of the
daily feeds, a backtest of the lab vintages when a lab week is complete,
calibrate), each runnable as printed from the directory the demo ran in.

Why several history files: the lab's vintages need an ``as_of`` column; and
``history.csv`` stays the ED feed alone, so models that observe the ED visits
only (``seir_two_band``, ``seir_two_band_lab``) read it as they always did.
"""

from __future__ import annotations

import asyncio
import datetime as dt
import shlex
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import orjson

from filters import CompartmentalModel, delay_kernel, reporting_cdf, simulate_season
from schemas import DeploymentConfig, example_model_path, load_model_spec

from ..runtime.app import Service
from ..runtime.metrics import Metrics
from ..runtime.processor import Outcome
from ..transports import FileTransport

__all__ = ["run_demo", "DEMO_STREAM", "CAUTION"]

DEMO_STREAM = "brackenford-ed-ili"
DEMO_START = dt.date(2025, 9, 1)
DEMO_MODEL = "seir_two_band_signals"  # the stream's model: the two-band SEIR observed by all four feeds
TRUTH_MODEL = "seir_two_band"  # the hidden epidemic and its ED counts are simulated from the same dynamics
CAUTION = (
    "Cautions: these are model-based estimates with stated uncertainty, for decision support only. "
    "Local public-health judgement and reporting rules prevail. casecloud handles aggregated counts only, "
    "never personal identifiers. The demo district, feeds and epidemic are invented."
)
# Known truth for the demo (the filter is not told these).
TRUE_PARAMS = {"beta": 0.20, "rho": 0.12, "k": 25.0}
TRUE_LAB = {"rho_lab": 0.04, "lab_delay": 5.0}  # share of onsets lab-confirmed; mean days from specimen to report
LAB_SERIES = "lab_confirmed"
POS_SERIES, WW_SERIES = "lab_positivity", "ww_millrace"
# The hidden truth of the two newer feeds (the filter is not told these): the background positivity among
# people tested for other reasons, and the site's gene copies per litre per shedding-weighted infection.
TRUE_SIGNALS = {"pos_background": 0.03, "ww_scale": 2.0}
TESTS_PER_DAY = 320.0  # mean tests the lab runs on a weekday (it reports Monday to Friday)
WW_WEEKDAYS = (0, 3)  # samples taken on Mondays and Thursdays, results sent the next day
WW_LOD = 60.0  # the lab's limit of detection, copies per litre
WW_FLOW_SD = 0.25  # day-to-day spread of the site's flow around its reference flow (log scale: rain)
LAB_WEEKDAY = 0  # the lab sends on Mondays (Monday = 0) ...
SPLIT_WEEKDAYS = (6,)  # ... and on Sundays each ED sends its own message
ED_FEED, LAB_FEED = "brackenford-ed-daily", "brackenford-lab-weekly"
POS_FEED, WW_FEED = "brackenford-lab-tests", "millrace-wastewater"
BAND_FEEDS = {"ed_child": "brackenford-ed-children", "ed_adult": "brackenford-ed-adults"}


CONFIG_NAME = "deployment.toml"
HISTORY_NAME = "history.csv"
DAILY_HISTORY_NAME = "daily_history.csv"
LAB_HISTORY_NAME = "lab_history.csv"
SCENARIO_EXAMPLE = "brackenford_schools"
# The calibrate command the demo prints: a short trial (about half a minute on
# the default 120 days); the command's own defaults run far longer.
CALIBRATE_TRIAL = ("--particles", "200", "--iterations", "60", "--chains", "2", "--noise-repeats", "5")


def demo_config_toml(particles: int) -> str:
    """The deployment config the demo runs with, as the TOML file it writes beside its outputs.

    Paths are relative, and the loader reads relative paths from the config
    file's own directory: the file works from any working directory and keeps
    working when the whole demo directory is moved or copied.
    """
    return f"""\
# casecloud deployment config, written by `casecloud demo` for the fictional Brackenford district.
# The demo ran with exactly this file. Edit it and give its path to any command that takes --config
# (serve, replay, scenario, checkpoint, backtest). `casecloud serve --config <this file> --exit-at-end`,
# run from the directory the demo ran in, picks the feed up after the last record the cloud has seen
# (append days to observations.ndjson first): the file transport keys its position by the input path
# as the command sees it.
# Relative paths below are read from this file's directory, not from where a command runs.
transport = "file"                  # "kafka" reads and publishes through a broker ([kafka] table)

[service]
seed = 7                            # each stream's random numbers derive from (seed, stream id)
checkpoint_dir = "checkpoints"      # one sub-directory per stream; the last keep_checkpoints kept
keep_checkpoints = 3

[metrics]
enabled = false                     # true: Prometheus /metrics, /healthz and /readyz on 127.0.0.1:9464

[file]
input = "observations.ndjson"       # the feed: one observation message per line
output_dir = "."                    # estimates.ndjson, alerts.ndjson, dead_letters.ndjson, committed.json

[[streams]]
id = "{DEMO_STREAM}"
# A shipped example model, or the path of a model spec TOML. This one observes four feeds: daily ED
# visits per band (final on arrival), weekly lab positives by specimen date, revised upward as
# reports arrive (values up to 21 days old are assimilated; each estimate carries their nowcast),
# the lab's weekday positives out of the tests it ran, and a wastewater site's samples.
model = "{DEMO_MODEL}"
start = "{DEMO_START.isoformat()}"                # calendar date of model day 0
particles = {int(particles)}
forecast_trajectories = 300       # simulated futures per estimate (forecast quantiles, alert probabilities)

[[streams.alerts]]                  # P(ed_child > 40 on some day of the next 7) with hysteresis
name = "child_ed_surge"
series = "ed_child"
threshold = 40
horizon_days = 7
raise_level = 0.7
clear_level = 0.4
persistence = 2
"""


# ---------------------------------------------------------------- the hidden truth of the lab feed
@dataclass(frozen=True)
class LabWeek:
    """One ISO week of lab-confirmed positives by specimen date, as the hidden truth has it.

    end : model day of the week's Sunday; period : ``YYYY-Www``.
    eventual : the week's complete count (every report in).
    arrivals : reports arriving per model day (index = day of arrival).
    """

    end: int
    period: str
    eventual: int
    arrivals: np.ndarray

    def known(self, day: int) -> int:
        """The total reported as of model day ``day`` (reports of that day included)."""
        return int(self.arrivals[: day + 1].sum())


def _period_of(day: int, weekly: bool = False) -> str:
    date = DEMO_START + dt.timedelta(days=day)
    if not weekly:
        return date.isoformat()
    year, week, _ = date.isocalendar()
    return f"{year}-W{week:02d}"


def simulate_lab(lab_model: CompartmentalModel, truth, days: int, rng: np.random.Generator) -> list[LabWeek]:
    """Weekly lab positives of the hidden epidemic, by specimen date, and when each is reported.

    The lab series of the stream's spec, with the true parameters: a week's
    count is negative binomial around ``rho_lab`` times the onsets of its days
    (the spec's dispersion); it is spread over the week's days in proportion
    to their onsets, and each day's positives over report delays drawn from the
    spec's delay distribution (true mean ``lab_delay``, the spec's sd and
    maximum), so the totals known as of a date rise towards the eventual count.
    Onsets come from the truth's compartments: everyone leaving S enters E,
    so onsets(t) = E(t-1) - E(t) + S(t-1) - S(t) per band. Full ISO weeks of
    days 1..``days`` only.
    """
    spec = next(s for s in lab_model.spec.series if s.name == LAB_SERIES)
    delay, dispersion = spec.reporting_delay, spec.noise.dispersion
    assert delay is not None and isinstance(delay.sd, float) and isinstance(dispersion, float)
    comps = list(lab_model.compartments)
    s_, e_ = comps.index("S"), comps.index("E")
    states = truth.states.astype(np.int64)
    onsets = np.zeros(days + 1)
    flows = (states[:-1, :, e_] - states[1:, :, e_]) + (states[:-1, :, s_] - states[1:, :, s_])
    onsets[1:] = flows[:days].sum(axis=1)
    cdf = reporting_cdf(delay.dist, TRUE_LAB["lab_delay"], delay.sd, delay.max_days)[0]
    q = np.diff(np.concatenate([[0.0], cdf]))
    weeks = []
    for end in range(7, days + 1):
        if (DEMO_START + dt.timedelta(days=end)).weekday() != 6:
            continue
        share = onsets[end - 6 : end + 1]
        mu = TRUE_LAB["rho_lab"] * share.sum()
        eventual = int(rng.poisson(rng.gamma(dispersion, mu / dispersion))) if mu > 0 else 0
        by_day = rng.multinomial(eventual, share / share.sum()) if share.sum() > 0 else np.zeros(7, dtype=np.int64)
        arrivals = np.zeros(end + delay.max_days + 1, dtype=np.int64)
        for k, count in enumerate(by_day):
            arrivals[end - 6 + k : end - 6 + k + q.size] += rng.multinomial(int(count), q)
        weeks.append(LabWeek(end, _period_of(end, weekly=True), eventual, arrivals))
    return weeks


# ---------------------------------------------------------------- the hidden truth of the newer feeds
@dataclass(frozen=True)
class Signals:
    """What the positivity feed and the wastewater site report of the hidden epidemic.

    Arrays run over model days 0..days. share : the true probability that a test is
    positive; tests, positives : the lab's daily numbers (0 tests: no report that day).
    level : the site's true median concentration at its reference flow (copies per
    litre). samples : (day taken, value or None when below ``WW_LOD``, flow).
    """

    share: np.ndarray
    tests: np.ndarray
    positives: np.ndarray
    level: np.ndarray
    samples: list[tuple[int, float | None, float]]


def simulate_signals(model: CompartmentalModel, truth, days: int, rng: np.random.Generator) -> Signals:
    """The positivity feed and the wastewater site of the stream's spec, with the true parameters.

    Positivity: x(t) = I(t) / N over the district, p(t) = 1 - (1 - background) exp(-enrichment x(t))
    (the spec's enrichment), the day's share Beta(p phi, (1 - p) phi) (the spec's dispersion phi) and
    the positives binomial out of the day's tests (Poisson around ``TESTS_PER_DAY``, weekdays only).
    Wastewater: new infections I(t) = S(t-1) - S(t) (everyone leaving S is infected), convolved with
    the spec's shedding profile (``filters.delay_kernel``, as the series compiles it), times the true
    scale and the catchment; a sample's flow is log-normal around the reference flow, its value
    the level diluted by reference / flow times exp(sd e), e standard normal (the spec's sd), and
    below ``WW_LOD`` it is reported as not detected.
    """
    spec = {s.name: s for s in model.spec.series}
    pos, ww = spec[POS_SERIES], spec[WW_SERIES]
    comps = list(model.compartments)
    states = truth.states[: days + 1].astype(np.int64)
    infected = states[:, :, comps.index(pos.compartment)].sum(axis=1)
    x = infected / states.sum(axis=(1, 2))
    background = TRUE_SIGNALS["pos_background"]
    share = 1.0 - (1.0 - background) * np.exp(-float(pos.positivity.enrichment) * x)
    weekday = np.array([(DEMO_START + dt.timedelta(days=d)).weekday() for d in range(days + 1)])
    lab_open = (weekday < 5) & (np.arange(days + 1) >= 1)
    tests = np.where(lab_open, rng.poisson(TESTS_PER_DAY, days + 1), 0)
    phi = float(pos.noise.dispersion)
    positives = rng.binomial(tests, rng.beta(share * phi, (1.0 - share) * phi))

    s_ = comps.index("S")
    infections = np.zeros(days + 1)
    infections[1:] = (states[:-1, :, s_] - states[1:, :, s_]).sum(axis=1)
    sh = ww.shedding
    w = delay_kernel(sh.dist, float(sh.mean), float(sh.sd), sh.max_days)
    level = TRUE_SIGNALS["ww_scale"] * float(ww.catchment) * np.convolve(infections, w)[: days + 1]
    taken = np.flatnonzero(np.isin(weekday, WW_WEEKDAYS) & (np.arange(days + 1) >= 1) & (np.arange(days + 1) < days))
    flow = float(ww.reference_flow) * np.exp(WW_FLOW_SD * rng.standard_normal(taken.size))
    value = level[taken] * (float(ww.reference_flow) / flow) * np.exp(float(ww.noise.sd) * rng.standard_normal(taken.size))
    samples = [(int(d), None if v < WW_LOD else round(float(v), 1), round(float(f), -3))
               for d, v, f in zip(taken, value, flow)]
    return Signals(share, tests, positives, level, samples)


# ---------------------------------------------------------------- the feed
def _history_csv(observations, series: list[str], days: int, signals: Signals | None = None) -> str:
    """The clean daily feeds as a history CSV (``schemas.load_history``): period, one column per ED series
    and, with ``signals``, the lab's positives with their tests (``<series>.tests``) on weekdays and the
    wastewater samples on the days they were taken (``nd``: not detected, with ``.lod`` and ``.flow``)."""
    header = ["period", *series]
    samples = {}
    if signals is not None:
        header += [POS_SERIES, f"{POS_SERIES}.tests", WW_SERIES, f"{WW_SERIES}.lod", f"{WW_SERIES}.flow"]
        samples = {d: (v, f) for d, v, f in signals.samples}
    rows = [",".join(header)]
    for obs in observations[:days]:
        cells = [_period_of(obs.time)] + ["" if obs.values.get(name) is None else str(int(obs.values[name])) for name in series]
        if signals is not None:
            tests = int(signals.tests[obs.time])
            cells += [str(int(signals.positives[obs.time])), str(tests)] if tests else ["", ""]
            if obs.time in samples:
                value, flow = samples[obs.time]
                cells += ["nd" if value is None else repr(value), repr(WW_LOD), repr(flow)]
            else:
                cells += ["", "", ""]
        rows.append(",".join(cells))
    return "\n".join(rows) + "\n"


def _lab_reports(weeks: list[LabWeek], day: int, window: int) -> list[tuple[LabWeek, int]]:
    """What the lab sends on model day ``day``: (week, total known as of that day) for every full week
    that ended before ``day`` and at most ``window`` days before it (its reports are still arriving)."""
    if (DEMO_START + dt.timedelta(days=day)).weekday() != LAB_WEEKDAY:
        return []
    return [(w, w.known(day)) for w in weeks if w.end < day and day - w.end <= window]


def _lab_history_csv(weeks: list[LabWeek], days: int, window: int) -> str:
    """The lab feed as a history CSV with an ``as_of`` column: one row per week and report day, in the
    order the lab sent them (what ``casecloud backtest`` replays as known on each date)."""
    rows = [f"period,as_of,{LAB_SERIES}"]
    for day in range(1, days + 1):
        rows += [f"{w.period},{_period_of(day)},{total}" for w, total in _lab_reports(weeks, day, window)]
    return "\n".join(rows) + "\n"


def _feed_days(observations, weeks: list[LabWeek], days: int, window: int, signals: Signals | None = None) -> list[list[bytes]]:
    """Per model day 1..days, the messages that arrive that day: ED counts (one message, or one per band
    on Sundays), on Mondays the lab totals of the recent weeks as of that day, on weekdays the lab's
    positives out of the day's tests, and the day after a wastewater sample its result."""
    out = []
    sent = {d + 1: (d, v, f) for d, v, f in signals.samples} if signals is not None else {}
    for obs in observations[:days]:
        period = _period_of(obs.time)
        counts = {k: int(v) for k, v in obs.values.items()}
        if (DEMO_START + dt.timedelta(days=obs.time)).weekday() in SPLIT_WEEKDAYS:
            msgs = [{"stream": DEMO_STREAM, "period": period, "counts": {k: v}, "metadata": {"feed": BAND_FEEDS[k]}} for k, v in counts.items()]
        else:
            msgs = [{"stream": DEMO_STREAM, "period": period, "counts": counts, "metadata": {"feed": ED_FEED}}]
        for w, total in _lab_reports(weeks, obs.time, window):
            msgs.append({"stream": DEMO_STREAM, "period": w.period, "as_of": period, "counts": {LAB_SERIES: total},
                         "metadata": {"feed": LAB_FEED}})
        if signals is not None and signals.tests[obs.time] > 0:
            msgs.append({"stream": DEMO_STREAM, "period": period, "counts": {POS_SERIES: int(signals.positives[obs.time])},
                         "tests": {POS_SERIES: int(signals.tests[obs.time])}, "metadata": {"feed": POS_FEED}})
        if obs.time in sent:
            taken, value, flow = sent[obs.time]
            msgs.append({"stream": DEMO_STREAM, "period": _period_of(taken), "counts": {},
                         "concentrations": {WW_SERIES: {"value": value, "lod": WW_LOD, "flow": flow}},
                         "metadata": {"feed": WW_FEED}})
        out.append([orjson.dumps(m) for m in msgs])
    return out


def _with_mistakes(per_day: list[list[bytes]]) -> list[bytes]:
    """A real feed is not clean: one truncated line (day 20), one negative count (day 31), one re-sent
    ED message (day 44). Short feeds (``--days`` below 44) get the mistakes that fit, the re-sent one
    on the last day."""
    out: list[bytes] = []
    for day, lines in enumerate(per_day, start=1):
        out += lines
        if day == 20:
            out.append(lines[0][: len(lines[0]) // 2])
        if day == 31:
            bad = orjson.loads(next(x for x in lines if b'"ed_child"' in x))
            bad["counts"]["ed_child"] = -3
            out.append(orjson.dumps(bad))
        if day == min(44, len(per_day)):
            out.append(lines[0])
    return out


async def _run_service(config: DeploymentConfig, progress, metrics: Metrics) -> dict[str, int]:
    transport = FileTransport(config.file.input, config.file.output_dir)
    service = Service(config, transport, metrics=metrics, today=lambda: DEMO_START + dt.timedelta(days=400), on_outcome=progress)
    return await service.run(until_exhausted=True)


def stream_with_a_restart(config: DeploymentConfig, feed: Path, lines: list[bytes], progress, quiet: bool, more: str):
    """Serve the first three fifths of the feed, stop, append the rest and serve again: the second run
    resumes from the checkpoints. Returns both runs' counts and their one metrics registry (the
    counters add up over the restart)."""
    first = len(lines) * 3 // 5
    feed.write_bytes(b"\n".join(lines[:first]) + b"\n")
    metrics = Metrics()
    counts1 = asyncio.run(_run_service(config, progress, metrics))
    if not quiet:
        print(f"  (service stopped; {more}; restarting from checkpoints)", file=sys.stderr)
    with open(feed, "ab") as f:
        f.write(b"\n".join(lines[first:]) + b"\n")
    counts2 = asyncio.run(_run_service(config, progress, metrics))
    return counts1, counts2, metrics


def _start_afresh(out: Path) -> None:
    """Remove what an earlier demo (or the commands it suggested) left in ``out`` that this run would contradict."""
    for name in ("observations.ndjson", "estimates.ndjson", "alerts.ndjson", "dead_letters.ndjson", "committed.json"):
        (out / name).unlink(missing_ok=True)
    ckpt = out / "checkpoints"
    if ckpt.exists():
        for f in sorted(ckpt.rglob("*"), reverse=True):
            f.unlink() if f.is_file() else f.rmdir()
    # The suggested calibrate run resumes from its saved chains; chains of another feed
    # (a different --days or --seed) would be refused, so they go with the old feed.
    calibration = out / "calibration"
    if calibration.is_dir():
        for f in [calibration / "pmmh_state.json", *calibration.glob("pmmh_*.npy")]:
            f.unlink(missing_ok=True)


def run_demo(out: Path, days: int = 120, particles: int = 3000, seed: int = 7, quiet: bool = False) -> str:
    """Run the demo into ``out``; returns the readable summary (also written to summary.txt).

    Besides the service's outputs, ``out`` receives the deployment config the
    demo ran with (``deployment.toml``), the ED feed as a history CSV
    (``history.csv``), every daily feed (``daily_history.csv``), the lab
    feed's vintages (``lab_history.csv``) and a
    copy of the example scenario file, so that every command listed at the
    end runs as printed on these files.
    """
    from schemas import example_scenario_path, load_deployment_config

    out.mkdir(parents=True, exist_ok=True)
    _start_afresh(out)
    truth_model = CompartmentalModel(load_model_spec(example_model_path(TRUTH_MODEL)))
    model = CompartmentalModel(load_model_spec(example_model_path(DEMO_MODEL)))
    truth = simulate_season(truth_model, days, np.random.default_rng(seed), params=TRUE_PARAMS)
    # The lab's own random numbers: the hidden epidemic and its ED counts do not depend on them.
    lab = simulate_lab(model, truth, days, np.random.default_rng([seed, 1]))
    signals = simulate_signals(model, truth, days, np.random.default_rng([seed, 2]))  # and the newer feeds' own
    lines = _with_mistakes(_feed_days(truth.observations, lab, days, model.window_days, signals))
    (out / CONFIG_NAME).write_text(demo_config_toml(particles), encoding="utf-8")
    ed_series = [s.name for s in truth_model.series]
    (out / HISTORY_NAME).write_text(_history_csv(truth.observations, ed_series, days), encoding="utf-8")
    (out / DAILY_HISTORY_NAME).write_text(_history_csv(truth.observations, ed_series, days, signals), encoding="utf-8")
    (out / LAB_HISTORY_NAME).write_text(_lab_history_csv(lab, days, model.window_days), encoding="utf-8")
    scenario = example_scenario_path(SCENARIO_EXAMPLE)
    (out / scenario.name).write_bytes(scenario.read_bytes())
    # The demo runs with the file it wrote; environment overrides (e.g.
    # CASECLOUD_CHECKPOINT_DIR) are not applied, so it stays inside ``out``.
    config = load_deployment_config(out / CONFIG_NAME, environ={})
    seen = {"n": 0}
    skipped: dict[str, int] = {}

    def progress(outcome: Outcome) -> None:
        seen["n"] += 1
        if outcome.status == "skipped":
            skipped[outcome.reason or "?"] = skipped.get(outcome.reason or "?", 0) + 1
        if not quiet and (seen["n"] % 25 == 0 or seen["n"] == len(lines)):
            print(f"  record {seen['n']}/{len(lines)}", file=sys.stderr, flush=True)

    if not quiet:
        print(f"casecloud demo: {days} days of made-up ED visits, lab reports, test positivity and wastewater samples, "
              f"{particles} particles -> {out}", file=sys.stderr)
    counts1, counts2, metrics = stream_with_a_restart(config, out / "observations.ndjson", lines, progress, quiet, "more data arrives")
    revisions = metrics.registry.get_sample_value("casecloud_revisions_total", {"stream": DEMO_STREAM}) or 0.0
    # The lab backtest scores nowcasts against complete counts: a week whose reports are all in by the
    # last report day (the history CSV's last as-of date); a short demo has none, and does not offer it.
    max_days = next(s for s in model.spec.series if s.name == LAB_SERIES).reporting_delay.max_days
    reported_on = [d for d in range(1, days + 1) if _lab_reports(lab, d, model.window_days)]
    scorable = bool(reported_on) and any(w.end + max_days <= reported_on[-1] for w in lab)
    feeds = {"revisions": int(revisions), "skipped": skipped, "lab_backtest": scorable}
    summary = summarise_demo(out, model, truth_model, truth, lab, counts1, counts2, feeds, signals)
    (out / "summary.txt").write_text(summary, encoding="utf-8")
    return summary


def _read(path: Path) -> list[dict]:
    return [orjson.loads(line) for line in path.read_bytes().splitlines() if line]


def summarise_demo(out: Path, model, truth_model, truth, lab: list[LabWeek], counts1: dict, counts2: dict, feeds: dict,
                   signals: Signals | None = None) -> str:
    estimates = _read(out / "estimates.ndjson")
    alerts = _read(out / "alerts.ndjson")
    dead = _read(out / "dead_letters.ndjson")
    messages = []
    for line in (out / "observations.ndjson").read_bytes().splitlines():
        try:
            messages.append(orjson.loads(line))
        except orjson.JSONDecodeError:
            continue
    lab_messages = [m for m in messages if LAB_SERIES in m.get("counts", {})]
    pos_messages = [m for m in messages if POS_SERIES in m.get("counts", {})]
    ww_messages = [m for m in messages if WW_SERIES in (m.get("concentrations") or {})]
    not_detected = sum(1 for m in ww_messages if m["concentrations"][WW_SERIES]["value"] is None)
    split = sum(1 for m in messages if m.get("metadata", {}).get("feed") in BAND_FEEDS.values())
    # The cloud after the last record of each day it reached: what it believed at the end of that day.
    by_day: dict[int, dict] = {}
    for e in estimates:
        by_day[e["cloud_day"]] = e
    daily = [by_day[d] for d in sorted(by_day)]
    # An alert is dated by the day the cloud stood at when it was raised (a lab revision's period is a past week).
    day_of_step = {e["step"]: _period_of(e["cloud_day"]) for e in estimates}
    unchanged, last_total = 0, {}
    for m in lab_messages:
        unchanged += last_total.get(m["period"]) == m["counts"][LAB_SERIES]
        last_total[m["period"]] = m["counts"][LAB_SERIES]
    skipped = sum(feeds["skipped"].values())
    lines = [
        "casecloud demo: Brackenford district (fictional), ED visits for influenza-like illness, lab-confirmed positives,",
        "test positivity and wastewater",
        "=" * 78,
        f"records: first run applied {counts1['applied']}, skipped {counts1['skipped']}, dead-lettered {counts1['dead_letter']};",
        f"         after restart applied {counts2['applied']}, skipped {counts2['skipped']}, dead-lettered {counts2['dead_letter']}",
        f"dead letters: {', '.join(sorted(d['reason'] for d in dead)) or 'none'}",
        f"skipped as already known: {skipped} ({', '.join(f'{n} {r}' for r, n in sorted(feeds['skipped'].items())) or 'none'}): "
        f"{unchanged} lab totals unchanged since the lab's previous report, {skipped - unchanged} re-sent ED message(s)",
        f"feeds: ED daily ({split} Sunday messages for one band each); lab weekly by specimen date: {len(lab_messages)} messages "
        f"as of {len({m['as_of'] for m in lab_messages})} report days, {feeds['revisions']} revisions applied (higher totals: increments only);",
        f"       lab positivity: {len(pos_messages)} weekdays of positives out of tests; wastewater (Millrace works): "
        f"{len(ww_messages)} samples, {not_detected} below the limit of detection ({WW_LOD:g} copies/l)",
        "",
        "How well the cloud tracked the hidden truth (90% interval = 5%..95% posterior quantiles, at the end of each day):",
        f"{'quantity':<14}{'days covered by 90% interval':>30}{'mean |error| of median':>26}",
    ]
    for comp in ("E", "I"):
        for g, gname in enumerate(model.groups):
            name = f"{comp}[{gname}]"
            c = model.compartments.index(comp)
            hits, errs = 0, []
            for e in daily:
                true = truth.states[e["cloud_day"], g, c]
                q = e["quantities"][name]["quantiles"]
                hits += q["0.05"] <= true <= q["0.95"]
                errs.append(abs(q["0.5"] - true))
            lines.append(f"{name:<14}{f'{hits}/{len(daily)} ({100 * hits / len(daily):.0f}%)':>30}{np.mean(errs):>26.1f}")
    beta_idx = truth_model.param_names.index("beta")
    last = estimates[-1]
    lq = last["quantities"]

    def q90(name: str, fmt: str) -> str:
        g = lq[name]["quantiles"]
        return f"{g['0.5']:{fmt}} (90%: {g['0.05']:{fmt}}-{g['0.95']:{fmt}})"

    lines += [
        "",
        f"transmission rate beta at the end: truth {truth.params[last['cloud_day'], beta_idx]:.3f}, estimate {q90('beta', '.3f')}",
        f"effective reproduction number at the end: {q90('R_eff', '.2f')}",
    ]
    if "lab_delay" in lq:
        lines.append(f"lab reporting delay, mean days (learned from the revisions): truth {TRUE_LAB['lab_delay']:.1f}, "
                     f"estimate {q90('lab_delay', '.2f')}")
    if "pos_background" in lq:
        lines.append(f"background positivity among other tests: truth {TRUE_SIGNALS['pos_background']:.3f}, "
                     f"estimate {q90('pos_background', '.3f')}")
    if "ww_scale" in lq:
        lines.append(f"wastewater scale, copies/l per shedding-weighted infection: truth {TRUE_SIGNALS['ww_scale']:.2f}, "
                     f"estimate {q90('ww_scale', '.2f')}")
    lines += _predictive_lines(estimates)
    lines += _nowcast_lines(last, lab)
    lines += [
        f"alerts published: {len(alerts)} ("
        + ", ".join(f"{a['status']} on {day_of_step.get(a['step'], a['period'])} p={a['probability']:.2f}" for a in alerts)
        + ")",
        f"outputs in {out}/: estimates.ndjson, alerts.ndjson, dead_letters.ndjson, checkpoints/ (the service's);",
        f"  {CONFIG_NAME} (the deployment config this run used: edit it, pass it to serve, replay, scenario, checkpoint,",
        f"  backtest), {HISTORY_NAME} (the ED feed as a history CSV, final counts), {DAILY_HISTORY_NAME} (every daily",
        f"  feed: ED, positives with their tests, wastewater samples), {LAB_HISTORY_NAME} (the lab feed's vintages: a",
        f"  history CSV with an as_of column), {SCENARIO_EXAMPLE}.toml (example intervention scenarios)",
        "",
        CAUTION,
        "",
        *next_commands(out, lab_backtest=feeds.get("lab_backtest", True)),
    ]
    return "\n".join(lines) + "\n"


def predictive_check(estimates: list[dict]) -> dict[str, dict[str, float]]:
    """Per series, its values against their one-step-ahead predictive (the estimates' ``predictive``):
    how many values, the share inside the central 50 % and 90 % predictive intervals and the mean
    PIT (a calibrated cloud: about 0.5, 0.9 and 0.5); samples below the limit of detection are
    counted apart, with the mean predictive probability of falling below it."""
    out: dict[str, dict[str, float]] = {}
    for e in estimates:
        for name, p in (e.get("predictive") or {}).items():
            row = out.setdefault(name, {"n": 0, "in50": 0, "in90": 0, "pit": 0.0, "censored": 0, "p_below": 0.0})
            if p["observed"] is None:
                row["censored"] += 1
                row["p_below"] += p["p_below_lod"] or 0.0
                continue
            q, y = p["quantiles"], p["observed"]
            row["n"] += 1
            row["in50"] += q["0.25"] <= y <= q["0.75"]
            row["in90"] += q["0.05"] <= y <= q["0.95"]
            row["pit"] += p["pit"]
    return out


def _predictive_lines(estimates: list[dict]) -> list[str]:
    check = predictive_check(estimates)
    if not check:
        return []
    lines = [
        "",
        "Each signal against the cloud's one-step-ahead predictive (before the value re-weighted it):",
        f"{'series':<16}{'values':>8}{'inside 50%':>13}{'inside 90%':>13}{'mean PIT':>10}  below the limit (mean P(below) predicted)",
    ]
    for name, r in check.items():
        n = max(r["n"], 1)
        censored = f"{r['censored']} ({r['p_below'] / r['censored']:.2f})" if r["censored"] else "-"
        lines.append(f"{name:<16}{r['n']:>8}{100 * r['in50'] / n:>12.0f}%{100 * r['in90'] / n:>12.0f}%{r['pit'] / n:>10.2f}  {censored}")
    lines.append("  (a calibrated cloud puts about 50 % and 90 % of values inside, with a mean PIT near 0.5; lab totals "
                 "include revisions, judged by their increments)")
    return lines


def _nowcast_lines(last: dict, lab: list[LabWeek]) -> list[str]:
    """The last estimate's nowcast of the recent lab weeks beside the eventual counts of the hidden truth."""
    periods = (last.get("nowcast") or {}).get(LAB_SERIES) or []
    if not periods:
        return ["lab nowcast: no lab week is still being reported at the end (none inside the assimilation window)", ""]
    eventual = {w.period: w.eventual for w in lab}
    lines = [
        "",
        f"Lab-confirmed positives of the last weeks: reported so far against the nowcast of the eventual count (final estimate, {last['period']}):",
        f"{'week':<10}{'as of':>12}{'reported':>10}{'pending':>9}{'nowcast mean':>14}{'90% interval':>15}{'truth':>7}  covered",
    ]
    hits = 0
    for p in periods:
        g = p["eventual"]["quantiles"]
        true = eventual.get(p["period"])
        inside = true is not None and g["0.05"] <= true <= g["0.95"]
        hits += inside
        interval = f"{g['0.05']:.0f}-{g['0.95']:.0f}"
        lines.append(
            f"{p['period']:<10}{p['as_of'] or 'final':>12}{p['reported']:>10}{100 * p['share_pending']:>8.0f}%"
            f"{p['eventual']['mean']:>14.1f}{interval:>15}{'?' if true is None else true:>7}  {'yes' if inside else 'no'}"
        )
    lines.append(f"  ({hits} of {len(periods)} eventual counts inside the 90% interval; 'pending': the share of the eventual count "
                 "still expected when the total was reported)")
    lines.append("")
    return lines


def quoted_in(out: Path):
    """``name -> out/name`` quoted for a POSIX shell, as the printed commands spell paths."""

    def path(name: str) -> str:
        return shlex.quote(str(Path(str(out)) / name))

    return path


def first_next_commands(out: Path, checkpoint_note: str) -> list[str]:
    """The opening lines of a demo's next commands: the report and the checkpoint."""
    path = quoted_in(out)
    return [
        "Next, from the directory you ran the demo in (each line runs as printed):",
        "  # pictures: an HTML page of the estimates, forecasts, alerts and feed",
        f"  casecloud report --estimates {path('estimates.ndjson')} --alerts {path('alerts.ndjson')} "
        f"--observations {path('observations.ndjson')} --out {path('report')}",
        f"  # {checkpoint_note}",
        f"  casecloud checkpoint show --config {path(CONFIG_NAME)}",
    ]


def next_commands(out: Path, lab_backtest: bool = True) -> list[str]:
    """The closing lines: what to run next, each command runnable as printed from the
    directory the demo ran in (paths are ``out`` as given, quoted for a POSIX shell).
    ``lab_backtest``: offer the backtest of the lab vintages (a demo of a few weeks has no
    complete lab week to score, so it does not)."""
    path = quoted_in(out)
    config = path(CONFIG_NAME)
    return [
        *first_next_commands(out, "the cloud as saved: step, period, particles, effective sample size, alert states (--json: everything)"),
        "  # what if: school closure and vaccination scenarios from the cloud as it stands, against no change",
        f"  casecloud scenario --config {config} --stream {DEMO_STREAM} --scenarios {path(SCENARIO_EXAMPLE + '.toml')} "
        f"--out {path('scenarios')}",
        "  # how good the forecasts and alerts were: replay the daily feeds (ED, positivity, wastewater) through the",
        "  # service and score them against baselines (counts, positives out of tests, censored wastewater levels)",
        f"  casecloud backtest --config {config} --history {path(DAILY_HISTORY_NAME)} --stream {DEMO_STREAM} --out {path('backtest')}",
        *([
            "  # how good the lab nowcasts were: replay the lab feed's vintages alone, as known on each date, and score",
            "  # the nowcasts against the eventual counts beside the counts reported so far and the chain-ladder nowcast",
            f"  casecloud backtest --config {config} --history {path(LAB_HISTORY_NAME)} --stream {DEMO_STREAM} "
            f"--out {path('backtest-lab')}",
        ] if lab_backtest else []),
        "  # fit the ED model's static parameters to the ED history (seir_two_band: the stream's model with the ED",
        "  # series only): a short trial (about half a minute; its diagnostics will ask for more: a real fit uses the",
        "  # defaults and runs far longer)",
        f"  casecloud calibrate --model seir_two_band --history {path(HISTORY_NAME)} --start {DEMO_START.isoformat()} "
        f"{' '.join(CALIBRATE_TRIAL)} --out {path('calibration')}",
    ]


def cmd_demo(args) -> int:
    if args.town:
        from .demo_town import run_town_demo

        summary = run_town_demo(Path(args.out or "casecloud-town"), days=args.days or 84, particles=args.particles or 1000,
                                seed=args.seed, quiet=args.quiet)
    else:
        # 3000 particles: with its four feeds the district's stream covered the hidden epidemic well below
        # the nominal rate with 2000 (fewer distinct latent paths survive the more frequent re-weighting)
        summary = run_demo(Path(args.out or "casecloud-demo"), days=args.days or 120, particles=args.particles or 3000,
                           seed=args.seed, quiet=args.quiet)
    print(summary)
    return 0


def add_demo_parser(sub) -> None:
    demo = sub.add_parser("demo", help="run a made-up season end to end over the file transport (no broker)")
    demo.add_argument("--town", action="store_true",
                      help="the individual-based demo instead: a season person by person in the invented town of "
                      "Pellingwold (20,000 people; households, schools, workplaces)")
    demo.add_argument("--out", help="output directory (default: ./casecloud-demo; with --town ./casecloud-town)")
    demo.add_argument("--days", type=int, help="days to simulate (default 120; with --town 84)")
    demo.add_argument("--particles", type=int, help="particles in the cloud (default 3000; with --town 1000 towns)")
    demo.add_argument("--seed", type=int, default=7, help="seed of the hidden truth (default 7)")
    demo.add_argument("--quiet", action="store_true", help="no progress lines")
    demo.set_defaults(handler=cmd_demo)
