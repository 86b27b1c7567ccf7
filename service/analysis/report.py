"""``casecloud report``: a static HTML page of PNG figures for analysts.

Two kinds of page, both ``OUT/index.html`` with the PNG files beside it
(relative links, inline CSS, no JavaScript, no external resources):

* **History page** (``--estimates``): built from the published estimates of
  one stream (``estimates.ndjson``), optionally with its alerts, the
  observation feed and a backtest. Fan charts per observed series, the
  susceptible build-up, the other compartments, R_eff, the drifting
  parameters, the effective sample size, exceedance probabilities with alert
  periods, a summary table of the latest estimate, for event-dated series
  (when the estimates carry nowcasts) the counts reported so far against the
  nowcast of their eventual counts and, with ``--backtest``, scores, coverage
  and ROC curves.
* **Current-state page** (``--checkpoint-dir`` + ``--stream``): built from the
  stream's newest readable checkpoint alone (read-only). A summary table of
  the weighted cloud and weighted histograms of the parameters, R_eff and the
  susceptible share per group. The model must be a shipped example named in
  the checkpoint or given with ``--model``; its fingerprint must match the
  checkpoint's.

Input rules: the estimates file is our own output and is read strictly (a
line that is not a valid estimate stops the report with the file, line and
reason). The observation feed is read leniently, as the service reads it: a
line that is not JSON or not a valid observation is skipped and counted on the
page. The page holds no wall-clock time, so the same inputs give the same
``index.html``.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import html
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import orjson
from pydantic import ValidationError

from schemas import AlertMessage, EstimateMessage, NowcastPeriod, ObservationMessage, parse_period

__all__ = ["ReportError", "CAUTIONS", "build_history_report", "build_checkpoint_report", "add_report_parser"]

CAUTIONS = (
    "Model-based estimates with stated uncertainty; decision support only. "
    "Local public-health judgement and reporting rules prevail. "
    "Aggregated counts only: casecloud never needs personal identifiers."
)
BACKTEST_METHODS = ("casecloud", "persistence", "trend")


class ReportError(Exception):
    """An input the report cannot use: says what, where and what is expected."""


# ---------------------------------------------------------------- reading
def _lines(path: Path) -> list[tuple[int, bytes]]:
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise ReportError(f"{path}: no such file") from None
    except OSError as exc:
        raise ReportError(f"{path}: cannot read ({exc.strerror})") from None
    return [(n, line) for n, line in enumerate(data.splitlines(), start=1) if line.strip()]


def _strict(path: Path, model, what: str) -> list[Any]:
    out = []
    for n, line in _lines(path):
        try:
            obj = orjson.loads(line)
        except orjson.JSONDecodeError as exc:
            raise ReportError(f"{path} line {n}: not JSON ({exc}); expected one {what} message per line") from None
        try:
            out.append(model.model_validate(obj))
        except ValidationError as exc:
            first = exc.errors()[0]
            where = ".".join(str(p) for p in first["loc"]) or "(message)"
            raise ReportError(f"{path} line {n}: not a valid {what} message: field {where}: {first['msg']}") from None
    return out


def load_estimates(path: Path, stream: str | None) -> list[EstimateMessage]:
    estimates = _strict(path, EstimateMessage, "estimate")
    if not estimates:
        raise ReportError(f"{path}: no estimates in the file")
    streams = sorted({e.stream for e in estimates})
    if stream is None:
        if len(streams) > 1:
            raise ReportError(f"{path} holds several streams ({', '.join(streams)}); choose one with --stream")
        stream = streams[0]
    chosen = [e for e in estimates if e.stream == stream]
    if not chosen:
        raise ReportError(f"{path}: no estimates for stream {stream!r}; the file holds {', '.join(streams)}")
    # At-least-once delivery: a message re-published after a crash repeats its id; keep one.
    unique: dict[str, EstimateMessage] = {}
    for e in chosen:
        unique.setdefault(e.id, e)
    return sorted(unique.values(), key=lambda e: (e.step, e.day))


def load_alerts(path: Path, stream: str) -> list[AlertMessage]:
    return [a for a in _strict(path, AlertMessage, "alert") if a.stream == stream]


@dataclass
class Feed:
    counts: dict[str, dict[dt.date, int]] = field(default_factory=dict)  # series -> date -> count (first wins)
    # series -> date -> as-of date of the count kept ("~" for a final count): a later vintage's higher
    # total replaces an earlier one, as the service applies revisions
    vintages: dict[str, dict[dt.date, str]] = field(default_factory=dict)
    tests: dict[str, dict[dt.date, int]] = field(default_factory=dict)  # positivity series: tests behind the count
    levels: dict[str, dict[dt.date, float]] = field(default_factory=dict)  # concentration series: detected samples
    skipped: int = 0
    other_streams: int = 0


def load_observations(path: Path, stream: str) -> Feed:
    feed = Feed()
    for _n, line in _lines(path):
        try:
            msg = ObservationMessage.model_validate(orjson.loads(line))
        except (orjson.JSONDecodeError, ValidationError):
            feed.skipped += 1
            continue
        if msg.stream != stream:
            feed.other_streams += 1
            continue
        when = parse_period(msg.period)
        vintage = msg.as_of or "~"  # a final count is the last word ("~" sorts after any date)
        for name, value in msg.counts.items():
            counts, vintages = feed.counts.setdefault(name, {}), feed.vintages.setdefault(name, {})
            if value is not None and vintage > vintages.get(when, "") and value >= counts.get(when, 0):
                counts[when], vintages[when] = value, vintage
                if (msg.tests or {}).get(name):
                    feed.tests.setdefault(name, {})[when] = msg.tests[name]  # type: ignore[index]
        for name, sample in (msg.concentrations or {}).items():
            if sample is not None and sample.value is not None and (sample.lod is None or sample.value >= sample.lod):
                feed.levels.setdefault(name, {}).setdefault(when, sample.value)
    return feed


_SCORE_KEYS = ("method", "series", "horizon", "n", "wis", "crps", "coverage_50", "coverage_90", "log_score", "bias")
_ALERT_KEYS = ("rule", "series", "threshold", "horizon_days", "auc", "roc", "episodes")


def load_backtest(where: Path) -> dict[str, Any]:
    path = where / "backtest.json" if where.is_dir() else where
    try:
        data = orjson.loads(path.read_bytes())
    except FileNotFoundError:
        raise ReportError(f"{path}: no such file (--backtest takes the directory holding backtest.json, or the file)") from None
    except orjson.JSONDecodeError as exc:
        raise ReportError(f"{path}: not JSON ({exc})") from None
    if not isinstance(data, dict):
        raise ReportError(f"{path}: expected a JSON object, got {type(data).__name__}")
    for key in ("stream", "model", "history", "horizons", "methods", "scores", "alerts"):
        if key not in data:
            raise ReportError(f"{path}: missing field {key!r}")
    for i, row in enumerate(data["scores"]):
        missing = [k for k in _SCORE_KEYS if k not in row]
        if missing:
            raise ReportError(f"{path}: scores[{i}] lacks {', '.join(missing)}")
    for i, row in enumerate(data["alerts"]):
        missing = [k for k in _ALERT_KEYS if k not in row]
        if missing:
            raise ReportError(f"{path}: alerts[{i}] lacks {', '.join(missing)}")
    data["_path"] = str(path)
    return data


def _file_fact(path: Path) -> str:
    data = path.read_bytes()
    return f"{path.name} ({len(data):,} bytes, sha256 {hashlib.sha256(data).hexdigest()[:12]})"


# ---------------------------------------------------------------- model (optional)
def _load_model(name_or_path: str | None, fingerprint: str | None):
    """The model (either family) for a shipped example name or a spec path; None if unknown.

    Raises ReportError when a model is found but its fingerprint differs."""
    from filters import build_model
    from schemas import EXAMPLE_INDIVIDUAL_MODELS, EXAMPLE_MODELS, SpecError, load_named_spec

    if not name_or_path:
        return None
    if name_or_path not in (*EXAMPLE_MODELS, *EXAMPLE_INDIVIDUAL_MODELS) and not Path(name_or_path).is_file():
        return None
    try:
        model = build_model(load_named_spec(name_or_path))
    except SpecError as exc:
        raise ReportError(f"model spec {name_or_path}: {exc}") from None
    if fingerprint is not None and model.fingerprint() != fingerprint:
        raise ReportError(
            f"model spec {name_or_path} has fingerprint {model.fingerprint()}, but the data were produced by a model with "
            f"fingerprint {fingerprint}; pass the spec that produced them with --model"
        )
    return model


# ---------------------------------------------------------------- helpers
_QNAME = re.compile(r"^([A-Za-z_][A-Za-z0-9_]*)\[(.+)\]$")


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_-]+", "_", name).strip("_") or "x"


def _fmt(x: float | None) -> str:
    if x is None or not math.isfinite(x):
        return "–"
    a = abs(x)
    if a == 0:
        return "0"
    if x == round(x) and a < 1e15:
        return f"{int(round(x)):,}"
    if a >= 1000:
        return f"{x:,.0f}"
    if a >= 10:
        return f"{x:.1f}"
    if a >= 0.01:
        return f"{x:.3f}"
    return f"{x:.3g}"


def _esc(x: Any) -> str:
    return html.escape(str(x), quote=True)


def _table(head: Sequence[str] | None, rows: Sequence[Sequence[Any]], cls: str = "") -> str:
    out = [f'<table class="{cls}">']
    if head:
        out.append("<thead><tr>" + "".join(f"<th>{_esc(h)}</th>" for h in head) + "</tr></thead>")
    out.append("<tbody>")
    for row in rows:
        out.append("<tr>" + "".join(f"<td>{c if isinstance(c, _Raw) else _esc(c)}</td>" for c in row) + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


class _Raw(str):
    """Already-escaped HTML for a table cell."""


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,Helvetica,Arial,sans-serif;margin:0;color:#1b1b1b;background:#f6f7f9}
main{max-width:1140px;margin:0 auto;padding:18px 24px 40px;background:#fff}
h1{font-size:1.5em;margin:.2em 0 .1em}h2{font-size:1.2em;margin-top:1.6em;border-bottom:2px solid #1f5f8b;padding-bottom:3px}
.sub{color:#555;margin:0 0 12px}
.caution{border:2px solid #c0392b;background:#fdf1ef;padding:10px 14px;margin:12px 0 18px;font-size:1.02em}
.caution strong{color:#a5281b}
table{border-collapse:collapse;margin:8px 0 14px;font-size:.9em}
th,td{border:1px solid #d5d9de;padding:3px 8px;text-align:right}th{background:#eef2f6}
td:first-child,th:first-child{text-align:left}
table.facts td{text-align:left}table.facts td:first-child{font-weight:600;background:#f4f6f8}
figure{margin:10px 0 22px}figure img{max-width:100%;border:1px solid #e2e5e9}
figcaption{font-size:.88em;color:#444;margin-top:4px}
.note{font-size:.9em;color:#555}
td.best{font-weight:700;background:#e8f3ea}
nav{font-size:.9em;margin:6px 0 10px}nav a{margin-right:12px}
footer{margin-top:30px;font-size:.82em;color:#666;border-top:1px solid #ddd;padding-top:8px}
"""


@dataclass
class _Page:
    out: Path
    title: str
    subtitle: str
    sections: list[tuple[str, str, list[str]]] = field(default_factory=list)  # (anchor, heading, html parts)
    figures: list[str] = field(default_factory=list)

    def section(self, anchor: str, heading: str) -> list[str]:
        parts: list[str] = []
        self.sections.append((anchor, heading, parts))
        return parts

    def figure(self, parts: list[str], name: str, alt: str, caption: str) -> Path:
        if name in self.figures:
            raise AssertionError(f"figure {name} written twice")
        self.figures.append(name)
        parts.append(
            f'<figure><img src="{_esc(name)}" alt="{_esc(alt)}"><figcaption>{caption}</figcaption></figure>'
        )
        return self.out / name

    def render(self, facts: list[tuple[str, str]], footer: str) -> str:
        nav = "".join(f'<a href="#{a}">{_esc(h)}</a>' for a, h, _ in self.sections)
        body = [
            "<!DOCTYPE html>",
            '<html lang="en"><head><meta charset="utf-8">',
            '<meta name="viewport" content="width=device-width, initial-scale=1">',
            f"<title>{_esc(self.title)}</title><style>{_CSS}</style></head><body><main>",
            f"<h1>{_esc(self.title)}</h1><p class=\"sub\">{_esc(self.subtitle)}</p>",
            f'<div class="caution" id="cautions"><strong>Cautions.</strong> {_esc(CAUTIONS)}</div>',
            _table(None, facts, "facts"),
            f"<nav>{nav}</nav>",
        ]
        for anchor, heading, parts in self.sections:
            body.append(f'<section id="{anchor}"><h2>{_esc(heading)}</h2>{"".join(parts)}</section>')
        body.append(f"<footer>{footer}</footer></main></body></html>")
        return "\n".join(body) + "\n"


def _write(out: Path, page: str) -> Path:
    index = out / "index.html"
    index.write_text(page, encoding="utf-8")
    return index


def _prepare_out(out: Path) -> None:
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ReportError(f"{out}: cannot create the output directory ({exc.strerror})") from None
    for old in out.glob("*.png"):  # figures of an earlier report would otherwise linger
        old.unlink()


# ---------------------------------------------------------------- history page
def _dates(estimates: Sequence[EstimateMessage]) -> list[dt.date]:
    """The date each estimate describes: the day its cloud stands at (``cloud_day``: a late or revised
    value for a past period moves nothing back), else its period's last day."""
    return [parse_period(e.period) + dt.timedelta(days=(e.cloud_day - e.day) if e.cloud_day is not None else 0)
            for e in estimates]


def _band(estimates: Sequence[EstimateMessage], dates: list[dt.date], name: str):
    from .report_figures import Band

    cols = {k: [] for k in ("0.5", "0.25", "0.75", "0.05", "0.95")}
    for e in estimates:
        q = e.quantities.get(name)
        for k in cols:
            cols[k].append(q.quantiles.get(k, math.nan) if q is not None else math.nan)
    if all(math.isnan(v) for v in cols["0.5"]):
        return None
    return Band(dates, cols["0.5"], cols["0.25"], cols["0.75"], cols["0.05"], cols["0.95"])


def _forecast_band(block: dict[str, Any], entry: dict[str, Any], origin: dt.date):
    """Median, 50 % and 90 % bands of a forecast entry from its 23 levels (+ the mean)."""
    from .report_figures import Band

    levels = [round(float(p), 6) for p in block["levels"]]
    need = (0.05, 0.25, 0.5, 0.75, 0.95)
    if not all(p in levels for p in need):
        return None, None
    q = entry["quantiles"]
    rows = {p: np.array([np.nan if v is None else v for v in q[levels.index(p)]], dtype=float) for p in need}
    horizon = len(rows[0.5])
    dates = [origin + dt.timedelta(days=h) for h in range(1, horizon + 1)]
    band = Band(dates, rows[0.5], rows[0.25], rows[0.75], rows[0.05], rows[0.95])
    mean = [np.nan if v is None else v for v in entry.get("mean", [])]
    return band, ((dates, mean) if len(mean) == horizon else None)


def _alert_periods(alerts: Sequence[AlertMessage], rule: str,
                   when: dict[int, dt.date] | None = None) -> list[tuple[dt.date, dt.date | None]]:
    """(raised, cleared or None) dates per alert episode. ``when`` maps a step to the date the cloud stood
    at (an alert raised on a revision of a past week is dated by the day it was raised, not by that week)."""
    periods: list[tuple[dt.date, dt.date | None]] = []
    start: dt.date | None = None

    def date(a: AlertMessage) -> dt.date:
        return (when or {}).get(a.step) or parse_period(a.period)

    for a in sorted((a for a in alerts if a.rule == rule), key=lambda a: a.step):
        if a.status == "raised" and start is None:
            start = date(a)
        elif a.status == "cleared" and start is not None:
            periods.append((start, date(a)))
            start = None
    if start is not None:
        periods.append((start, None))
    return periods


def build_history_report(
    estimates_path: Path,
    out: Path,
    alerts_path: Path | None = None,
    observations_path: Path | None = None,
    backtest_path: Path | None = None,
    stream: str | None = None,
    model_path: str | None = None,
) -> Path:
    """Write ``out/index.html`` and its figures from one stream's estimates; returns the page path."""
    from . import report_figures as rf

    estimates = load_estimates(estimates_path, stream)
    latest = estimates[-1]
    stream = latest.stream
    alerts = load_alerts(alerts_path, stream) if alerts_path else []
    feed = load_observations(observations_path, stream) if observations_path else None
    backtest = load_backtest(backtest_path) if backtest_path else None
    model = _load_model(model_path or latest.model, latest.model_fingerprint)
    _prepare_out(out)

    dates = _dates(estimates)
    last_date = dates[-1]
    fingerprints = sorted({e.model_fingerprint for e in estimates})
    # The cloud's day, not the latest period: a late value for a past period moves nothing back.
    last_day = latest.cloud_day if latest.cloud_day is not None else latest.day
    page = _Page(out, f"casecloud report: {stream}", f"model {latest.model}, {len(estimates)} updates, "
                 f"{dates[0].isoformat()} to {last_date.isoformat()}")

    facts = [
        ("stream", stream),
        ("model", latest.model),
        ("model fingerprint", ", ".join(fingerprints) + ("  (more than one: the model changed)" if len(fingerprints) > 1 else "")),
        ("data window", f"{dates[0].isoformat()} to {last_date.isoformat()} (model days {estimates[0].day} to {last_day})"
                        + (f"; the latest update was a value for {latest.period}" if last_day != latest.day else "")),
        ("updates", f"{len(estimates)} estimates (steps {estimates[0].step} to {latest.step})"),
        ("particles", f"{latest.particles:,}"),
    ]
    if latest.forecast:
        facts.append(("forecast", f"{latest.forecast.get('n_trajectories')} trajectories, "
                                  f"{latest.forecast.get('horizon')} days ahead from {last_date.isoformat()}"))
    inputs = [f"estimates: {_file_fact(estimates_path)}"]
    if alerts_path:
        inputs.append(f"alerts: {_file_fact(alerts_path)} ({len(alerts)} messages for this stream)")
    if observations_path:
        inputs.append(f"observations: {_file_fact(observations_path)}")
    if backtest:
        inputs.append(f"backtest: {_file_fact(Path(backtest['_path']))}")
    facts.append(("generated from", _Raw("<br>".join(_esc(i) for i in inputs))))
    if model is None:
        facts.append(("model spec", f"not found ({latest.model!r} is not a shipped example; pass --model PATH to "
                                    "link series to their latent incidence)"))

    # ---- latest summary
    parts = page.section("latest", f"Latest estimate ({latest.period})")
    rows = []
    for name, q in latest.quantities.items():
        g = q.quantiles
        rows.append((name, _fmt(q.mean), _fmt(g.get("0.5")), f"{_fmt(g.get('0.25'))} – {_fmt(g.get('0.75'))}",
                     f"{_fmt(g.get('0.05'))} – {_fmt(g.get('0.95'))}", f"{_fmt(g.get('0.025'))} – {_fmt(g.get('0.975'))}"))
    parts.append(_table(("quantity", "mean", "median", "50 % interval", "90 % interval", "95 % interval"), rows))
    parts.append(f'<p class="note">Effective sample size {latest.ess:,.0f} of {latest.particles:,} particles'
                 f"{'; resampled' if latest.resampled else ''}{'; <strong>collapsed</strong>' if latest.collapsed else ''}."
                 + (f" Probability that latent new infections grow (days 8–14 vs 1–7 ahead): "
                    f"{latest.growth_probability:.2f}." if latest.growth_probability is not None else "") + "</p>")
    if latest.exceedance:
        parts.append(_table(
            ("alert rule", "series", "threshold", "within days", "P(exceed)", "expected first day"),
            [(r, x.series, _fmt(x.threshold), x.horizon_days, f"{x.probability:.3f}",
              _fmt(x.expected_first_day) if x.expected_first_day is not None else "–") for r, x in latest.exceedance.items()],
        ))

    # ---- observed series
    block = latest.forecast or {}
    series_names: list[str] = list(block.get("series", {}))
    for x in latest.exceedance.values():
        if x.series not in series_names:
            series_names.append(x.series)
    if feed:
        series_names += [s for s in sorted({*feed.counts, *feed.levels}) if s not in series_names]
    if model is not None:
        series_names += [s.name for s in model.spec.series if s.name not in series_names]
    thresholds = {x.series: x.threshold for x in latest.exceedance.values()}
    parts = page.section("series", "Observed series and forecasts")
    if feed is None:
        parts.append('<p class="note">No observation feed given (--observations): the charts show forecasts only.</p>')
    elif feed.skipped or feed.other_streams:
        parts.append(f'<p class="note">Observation feed: {feed.skipped} line(s) skipped as malformed or invalid '
                     f"(the service dead-letters those too), {feed.other_streams} line(s) for other streams.</p>")
    applied = {parse_period(e.period) for e in estimates}
    spec_series = {s.name: s for s in model.spec.series} if model is not None else {}
    for name in series_names:
        obs = unmatched = None
        if feed and (name in feed.counts or name in feed.levels):
            # positivity: the share positive (what its forecast is of); concentrations: detected samples
            tests = feed.tests.get(name)
            pts = (sorted((d, v / tests[d]) for d, v in feed.counts[name].items() if d in tests) if tests
                   else sorted(feed.levels[name].items()) if name in feed.levels else sorted(feed.counts[name].items()))
            obs = ([d for d, _ in pts if d in applied], [v for d, v in pts if d in applied])
            unmatched = ([d for d, _ in pts if d not in applied], [v for d, v in pts if d not in applied])
        fband = fmean = None
        entry = block.get("series", {}).get(name)
        if entry:
            fband, fmean = _forecast_band(block, entry, last_date)
        latent = latent_label = None
        s = spec_series.get(name)
        if s is not None and s.kind == "incidence":
            groups = s.groups or list(model.groups)
            if len(groups) == 1:
                qname = f"incidence.{s.flow}[{groups[0]}]"
                latent = _band(estimates, dates, qname)
                latent_label = f"{qname}: latent daily incidence behind {name} (before reporting fraction and delay)"
        if fband is None and latent is None and not (obs and obs[0]) and not (unmatched and unmatched[0]):
            continue  # nothing to draw for this series
        kind = s.kind if s is not None else ("positivity" if feed and name in feed.tests else
                                             "concentration" if feed and name in feed.levels else "incidence")
        what, ylabel = {"positivity": ("share of tests positive", "share positive"),
                        "concentration": ("samples (at their flow) and the level forecast (at the reference flow)",
                                          "concentration")}.get(kind, ("reported counts", "count per period"))
        dots = {"positivity": "observed shares positive (positives / tests)",
                "concentration": 'detected samples (those below the limit are drawn under <a href="#predictive">one-step predictive</a>)'}.get(kind, "observed counts")
        path = page.figure(parts, f"series_{_safe(name)}.png", f"fan chart of {name}",
                           f"<b>{_esc(name)}</b>: black dots are {dots} of periods the stream applied"
                           + (" (open red circles: periods without an estimate, e.g. rejected or not yet applied)" if unmatched and unmatched[0] else "")
                           + "; purple: the latest estimate's forecast (median, 50 % and 90 % bands, dotted mean) "
                           "including observation noise"
                           + ("; lower panel: posterior of the latent incidence this series counts, per update." if latent is not None else ".")
                           + (" Counts of this series rise as reports arrive: each dot is the latest total the feed gave, "
                              'so the last periods still read low (see <a href="#nowcast">Nowcasts</a>).'
                              if any((e.nowcast or {}).get(name) for e in estimates) else ""))
        rf.series_figure(path, name, obs, unmatched, fband, fmean, latent, latent_label, thresholds.get(name), last_date,
                         first_date=dates[0], what=what, ylabel=ylabel)

    _nowcast_section(page, estimates)
    _predictive_section(page, estimates, spec_series)

    # ---- compartments
    comps: dict[str, list[str]] = {}
    for qname in latest.quantities:
        m = _QNAME.match(qname)
        if m and not qname.startswith("incidence."):
            comps.setdefault(m.group(1), []).append(m.group(2))
    # The susceptible compartment: the source of the model's infection flow, else "S", else the first.
    susceptible = "S"
    if model is not None and hasattr(model.spec, "flows"):  # individual-based models publish S[band] as is
        sources = [f.source for f in model.spec.flows if f.infection]
        susceptible = sources[0] if sources else susceptible
    if susceptible not in comps and comps:
        susceptible = next(iter(comps))
    if comps:
        parts = page.section("compartments", "Latent compartments")
        if susceptible in comps:
            panels = [(f"{susceptible}[{g}]", _band(estimates, dates, f"{susceptible}[{g}]"), "people") for g in comps[susceptible]]
            path = page.figure(parts, "susceptibles.png", "susceptibles per group",
                               f"<b>Susceptibles</b> ({_esc(susceptible)}) per group: posterior median with 50 % and 90 % "
                               "bands at each update. A rising or high susceptible pool is fuel for the next wave even "
                               "while counts are flat.")
            rf.band_panels(path, [p for p in panels if p[1] is not None], cols=min(2, len(panels)))
        others = [c for c in comps if c != susceptible]
        if others:
            groups = comps[others[0]]
            panels = [(f"{c}[{g}]", _band(estimates, dates, f"{c}[{g}]"), "people") for c in others for g in comps[c]]
            path = page.figure(parts, "compartments.png", "other compartments per group",
                               "Other compartments (rows) per group (columns): posterior median, 50 % and 90 % bands.")
            rf.band_panels(path, [p for p in panels if p[1] is not None], cols=max(1, len(groups)))

    # ---- R_eff and parameters
    reff = _band(estimates, dates, "R_eff")
    if reff is not None:
        parts = page.section("reff", "Effective reproduction number")
        fb = None
        lat = block.get("latent", {}).get("R_eff")
        if lat:
            fb, _ = _forecast_band(block, lat, last_date)
        path = page.figure(parts, "r_eff.png", "effective reproduction number over time",
                           "R_eff at each update (blue; median, 50 % and 90 % bands) and its forecast from the latest "
                           "cloud (purple; reflects depleting susceptibles and drifting transmission). Dashed line: 1.")
        rf.reff_figure(path, reff, fb)
    params = [n for n in latest.quantities if not _QNAME.match(n) and n != "R_eff" and not n.startswith("incidence.")]
    if params:
        parts = page.section("parameters", "Parameters")
        path = page.figure(parts, "parameters.png", "parameters over time",
                           "Estimated parameters at each update (median, 50 % and 90 % bands). Drifting parameters "
                           "follow the epidemic; static ones should narrow as data accrue.")
        rf.band_panels(path, [(p, _band(estimates, dates, p), "value") for p in params], cols=min(3, len(params)))

    # ---- ESS
    parts = page.section("ess", "Effective sample size")
    collapsed = [e.collapsed for e in estimates]
    path = page.figure(parts, "ess.png", "effective sample size over time",
                       f"ESS as a fraction of the particles at each update; triangles: the cloud was resampled "
                       f"({sum(e.resampled for e in estimates)} times); red bars: collapses, where no particle could explain "
                       f"the observation and it was not assimilated ({sum(collapsed)}).")
    rf.ess_figure(path, dates, [e.ess / e.particles for e in estimates], [e.resampled for e in estimates], collapsed)

    # ---- exceedance and alerts
    rules: list[str] = []
    for e in estimates:
        rules += [r for r in e.exceedance if r not in rules]
    rules += sorted({a.rule for a in alerts} - set(rules))
    if rules:
        parts = page.section("alerts", "Exceedance and alerts")
        if not alerts_path:
            parts.append('<p class="note">No alerts file given (--alerts): raise/clear levels and alert periods are not shown.</p>')
        for rule in rules:
            pts = [(d, e.exceedance[rule]) for d, e in zip(dates, estimates) if rule in e.exceedance]
            ra = [a for a in alerts if a.rule == rule]
            x = pts[-1][1] if pts else None
            subtitle = (f"P({x.series} > {x.threshold:g} on some day within {x.horizon_days} days)" if x else
                        (f"{ra[0].series} > {ra[0].threshold:g}" if ra else ""))
            periods = _alert_periods(alerts, rule, {e.step: d for e, d in zip(estimates, dates)})
            path = page.figure(parts, f"exceedance_{_safe(rule)}.png", f"exceedance probability of {rule}",
                               f"<b>{_esc(rule)}</b>: exceedance probability at each update; orange: alert active "
                               f"(raised to cleared, {len(periods)} episode(s)); dashed red: raise level; dotted green: clear level.")
            rf.exceedance_figure(path, rule, [d for d, _ in pts], [p.probability for _, p in pts],
                                 ra[0].raise_level if ra else None, ra[0].clear_level if ra else None, periods, last_date, subtitle)
        if alerts:
            parts.append(_table(("rule", "status", "period", "step", "probability", "alert id"),
                                [(a.rule, a.status, a.period, a.step, f"{a.probability:.3f}", a.id[:8]) for a in alerts]))

    if backtest:
        _backtest_section(page, backtest)

    footer = (f"casecloud report of stream {_esc(stream)}; no wall-clock time is recorded, so the same inputs give "
              "the same page. Figures are PNG files beside this page.")
    index = _write(out, page.render(facts, footer))
    return index


def _short_date(iso: str | None) -> str:
    return "final" if iso is None else dt.date.fromisoformat(iso).strftime("%d %b")


def _period_label(period: str) -> str:
    """An axis label: the period, and for a week the Monday-to-Sunday dates it covers."""
    end = parse_period(period)
    if "W" not in period:
        return period
    return f"{period}\n{(end - dt.timedelta(days=6)).strftime('%d %b')}–{end.strftime('%d %b')}"


def _nowcast_section(page: _Page, estimates: Sequence[EstimateMessage]) -> None:
    """Reported so far against the nowcast of the eventual count, for each event-dated series
    (a section only when some estimate carries a nowcast period; none otherwise)."""
    from . import report_figures as rf

    names: list[str] = []
    for e in estimates:
        names += [n for n, periods in (e.nowcast or {}).items() if periods and n not in names]
    if not names:
        return
    latest = estimates[-1]
    parts = page.section("nowcast", "Nowcasts: counts still being reported")
    parts.append(
        '<p class="note">Series counted by event date (onset, specimen) keep rising for days or weeks after a '
        "period ends, as reports arrive: the latest periods always read low. Each estimate carries a "
        "<em>nowcast</em> for the recent periods of such a series: the total reported so far (as of the date "
        "the feed gave), and the eventual complete count the cloud expects (posterior predictive of the reports "
        "still to come under the series' reporting delay). Alerts judge eventual counts, never partial ones. "
        "The eventual count is a model-based estimate too: read it with its interval.</p>"
    )
    for name in names:
        first: dict[str, NowcastPeriod] = {}  # period -> its nowcast in the first estimate after its first report
        last: dict[str, NowcastPeriod] = {}  # period -> the last published nowcast of it
        for e in estimates:
            for p in (e.nowcast or {}).get(name, []):
                if p.as_of is not None:
                    first.setdefault(p.period, p)
                last[p.period] = p
        now = [p for p in (latest.nowcast or {}).get(name, [])]
        now.sort(key=lambda p: parse_period(p.period))
        bars = [
            rf.NowcastBar(_period_label(p.period), p.reported, p.eventual.mean, p.eventual.quantiles,
                          note=f"as of {_short_date(p.as_of)}" + (f"\n{p.share_pending:.0%} pending" if p.as_of else ""))
            for p in now
        ]
        order = sorted(first, key=parse_period)
        season = [
            rf.NowcastBar(_period_label(k), first[k].reported, first[k].eventual.mean, first[k].eventual.quantiles,
                          later=last[k].reported)
            for k in order
        ]
        latest_title = (f"reported so far and the nowcast in the latest estimate ({latest.period}, cloud day "
                        f"{latest.cloud_day if latest.cloud_day is not None else latest.day})")
        season_title = "each period's first nowcast (at its first report) against the total reported since"
        if not bars and not season:  # only final totals were ever known: nothing is being nowcast
            parts.append(f'<p class="note">Every period of {_esc(name)} was reported final: nothing to nowcast.</p>')
            continue
        path = page.figure(
            parts, f"nowcast_{_safe(name)}.png", f"reported so far against the nowcast of {name}",
            f"<b>{_esc(name)}</b>"
            + (": top, the latest estimate: grey bars are the totals reported so far (as of the date above each, "
               "with the share of the eventual count still expected); blue, the nowcast of the eventual count "
               "(diamond: mean; thick: 50 % interval; thin: 90 % interval)." if bars else
               ": no period of the latest estimate is still being reported.")
            + (" Bottom, the season: for every period, the nowcast published right after its first report "
               "(grey: the total then; blue: the nowcast) beside the total reported by the latest estimate (hatched), "
               "which for the newest periods is itself still partial." if season else ""),
        )
        rf.nowcast_figure(path, name, bars, latest_title, season if len(season) > len(bars) else None, season_title)
        if now:
            rows = []
            for p in now:
                g = p.eventual.quantiles
                rows.append((p.period, _fmt(p.reported), p.as_of or "final", f"{p.share_pending:.0%}", _fmt(p.eventual.mean),
                             _fmt(g.get("0.5")), f"{_fmt(g.get('0.25'))} – {_fmt(g.get('0.75'))}",
                             f"{_fmt(g.get('0.05'))} – {_fmt(g.get('0.95'))}"))
            parts.append(_table(("period", "reported so far", "as of", "still pending", "eventual: mean", "median",
                                 "50 % interval", "90 % interval"), rows))
        else:
            parts.append(f'<p class="note">No period of {_esc(name)} is still being reported in the latest estimate.</p>')


def _predictive_kind(name: str, spec_series: dict[str, Any], entries: Sequence[Any]) -> str:
    """'share' (positivity), 'level' (concentration) or 'count': from the spec when known, else from the values."""
    s = spec_series.get(name)
    if s is not None:
        return {"positivity": "share", "concentration": "level"}.get(s.kind, "count")
    if any(p.tests is not None for p in entries):
        return "share"
    if any(p.lod is not None or p.flow is not None or p.p_below_lod is not None for p in entries):
        return "level"
    return "count"


def _predictive_section(page: _Page, estimates: Sequence[EstimateMessage], spec_series: dict[str, Any]) -> None:
    """Each observed signal against its one-step-ahead predictive (omitted when the estimates carry none)."""
    from . import report_figures as rf

    entries: dict[str, list[Any]] = {}
    for e in estimates:
        for name, p in (e.predictive or {}).items():
            entries.setdefault(name, []).append(p)
    if not entries:
        return
    parts = page.section("predictive", "Each signal against its one-step-ahead predictive")
    parts.append(
        '<p class="note">Before each value re-weighted the cloud, the cloud (moved to the value\'s day) said what it '
        "expected of it: the one-step-ahead predictive, observation noise included. A calibrated cloud puts about "
        "half the values inside the 50 % interval and nine in ten inside the 90 % interval, and the probability "
        "integral transform (PIT: the predictive probability below the value) averages about 0.5; PITs near 0 or 1 "
        "are surprises (the prequential check, Dawid 1984). Lab totals that rise as reports arrive are judged by "
        "each report's increment, and drawn at the date they are known as of.</p>"
    )
    panels, rows = [], []
    units = {"count": "count per period", "share": "share of tests positive", "level": "concentration (log scale)"}
    for name, ps in entries.items():
        kind = _predictive_kind(name, spec_series, ps)
        scale = [float(p.tests) if kind == "share" and p.tests else 1.0 for p in ps]
        dates = [dt.date.fromisoformat(p.as_of) if p.as_of else parse_period(p.period) for p in ps]
        observed = [np.nan if p.observed is None else p.observed / k for p, k in zip(ps, scale)]
        q = {lv: [p.quantiles.get(lv, np.nan) / k for p, k in zip(ps, scale)] for lv in ("0.05", "0.25", "0.5", "0.75", "0.95")}
        lods = [np.nan if p.lod is None else p.lod for p in ps]
        panels.append(rf.PredictivePanel(name, kind, dates, observed, q, lods, units[kind]))
        seen = [(p, k) for p, k in zip(ps, scale) if p.observed is not None]
        n = len(seen)
        in50 = sum(p.quantiles["0.25"] <= p.observed <= p.quantiles["0.75"] for p, _ in seen)
        in90 = sum(p.quantiles["0.05"] <= p.observed <= p.quantiles["0.95"] for p, _ in seen)
        pits = [p.pit for p, _ in seen if p.pit is not None]
        below = len(ps) - n
        rows.append((name, {"count": "counts", "share": "positives out of tests", "level": "concentration"}[kind], n,
                     f"{100 * in50 / n:.0f} %" if n else "–", f"{100 * in90 / n:.0f} %" if n else "–",
                     f"{np.mean(pits):.2f}" if pits else "–", below if kind == "level" else "–"))
    path = page.figure(parts, "predictive.png", "each observed signal against its one-step-ahead predictive",
                       "One panel per signal (" + ", ".join(f"<b>{_esc(n)}</b>" for n in entries) + "): dots are the "
                       "values (red: outside the 90 % interval), bars the one-step-ahead predictive (thin: 90 %, thick: "
                       "50 %, tick: median). Positivity as the share of tests positive; concentrations on a log axis, "
                       "samples below the laboratory's limit of detection as open triangles at the limit.")
    rf.predictive_figure(path, panels)
    parts.append(_table(("series", "evidence", "values", "inside 50 %", "inside 90 %", "mean PIT", "below the limit"), rows))


def _backtest_section(page: _Page, bt: dict[str, Any]) -> None:
    from . import report_figures as rf

    parts = page.section("backtest", "Backtest")
    hist = bt.get("history") or {}
    parts.append(f'<p class="note">Backtest of stream {_esc(bt.get("stream"))}, model {_esc(bt.get("model"))}: '
                 f"{_esc(hist.get('n'))} periods from {_esc(hist.get('first'))} to {_esc(hist.get('last'))}; "
                 f"horizons {', '.join(str(h) for h in bt.get('horizons', []))} days; methods "
                 f"{', '.join(_esc(m) for m in bt.get('methods', []))}. Persistence and trend are naive baselines.</p>")
    if bt.get("cautions"):
        parts.append(f'<div class="caution"><strong>Backtest cautions.</strong> {_esc(bt["cautions"])}</div>')
    scores = bt["scores"]
    if scores:
        wis: dict[str, dict[str, tuple[list[int], list[float]]]] = {}
        cov: dict[str, dict[str, tuple[list[int], list[float], list[float]]]] = {}
        for row in sorted(scores, key=lambda r: (r["series"], r["method"], r["horizon"])):
            w = wis.setdefault(row["series"], {}).setdefault(row["method"], ([], []))
            w[0].append(row["horizon"])
            w[1].append(np.nan if row["wis"] is None else row["wis"])
            c = cov.setdefault(row["series"], {}).setdefault(row["method"], ([], [], []))
            c[0].append(row["horizon"])
            c[1].append(np.nan if row["coverage_50"] is None else row["coverage_50"])
            c[2].append(np.nan if row["coverage_90"] is None else row["coverage_90"])
        path = page.figure(parts, "backtest_wis.png", "weighted interval score by horizon",
                           "Mean weighted interval score by horizon, casecloud against the baselines (lower is better).")
        rf.backtest_score_figure(path, wis, "WIS")
        path = page.figure(parts, "backtest_coverage.png", "interval coverage by horizon",
                           "Share of observed counts inside the 50 % (dashed) and 90 % (solid) forecast intervals; "
                           "a calibrated forecast sits on the black reference lines.")
        rf.backtest_coverage_figure(path, cov)
        best: dict[tuple[str, int], float] = {}
        for r in scores:
            if r["wis"] is not None:
                key = (r["series"], r["horizon"])
                best[key] = min(best.get(key, math.inf), r["wis"])
        rows = []
        for r in sorted(scores, key=lambda r: (r["series"], r["horizon"], BACKTEST_METHODS.index(r["method"])
                                                if r["method"] in BACKTEST_METHODS else 9, r["method"])):
            wis_cell = _fmt(r["wis"])
            if r["wis"] is not None and r["wis"] == best.get((r["series"], r["horizon"])):
                wis_cell = _Raw(f"<b>{_esc(wis_cell)}</b> ★")
            rows.append((r["series"], r["horizon"], r["method"], r["n"], wis_cell, _fmt(r["crps"]),
                         _fmt(r["coverage_50"]), _fmt(r["coverage_90"]), _fmt(r["log_score"]), _fmt(r["bias"])))
        parts.append(_table(("series", "horizon", "method", "n", "WIS", "CRPS", "cov. 50 %", "cov. 90 %", "log score", "bias"), rows))
        parts.append('<p class="note">★ lowest WIS for that series and horizon.</p>')
    if bt["alerts"]:
        curves = []
        rows = []
        for a in bt["alerts"]:
            roc = a.get("roc") or {}
            auc = a.get("auc")
            curves.append((f"{a['rule']} ({a['series']} > {a['threshold']:g}, {a['horizon_days']} d)",
                           list(roc.get("fpr", [])), list(roc.get("tpr", [])), auc))
            eps = a.get("episodes", [])
            leads = [e.get("lead_days") for e in eps if e.get("lead_days") is not None]
            missed = sum(1 for e in eps if e.get("raised_period") is None)
            rows.append((a["rule"], a["series"], _fmt(a["threshold"]), a["horizon_days"],
                         "undefined" if auc is None else f"{auc:.3f}", len(eps), missed,
                         ", ".join(str(v) for v in leads) or "–"))
        path = page.figure(parts, "backtest_roc.png", "ROC curves of the alert rules",
                           "ROC curve of each alert rule's exceedance probability against what happened "
                           "(AUC in the legend; the dotted diagonal is a coin toss).")
        rf.roc_figure(path, curves)
        parts.append(_table(("rule", "series", "threshold", "within days", "AUC", "episodes", "missed", "lead days"), rows))


# ---------------------------------------------------------------- current-state page
def build_checkpoint_report(checkpoint_dir: Path, stream: str | None, out: Path, model_path: str | None = None) -> Path:
    """Write ``out/index.html`` from a stream's newest readable checkpoint (read-only)."""
    from filters import (
        ParticleSet,
        effective_sample_size,
        normalised_weights,
        summarise,
    )

    from ..state import CheckpointError, LocalCheckpointStore, model_fingerprint_of
    from . import report_figures as rf

    store = LocalCheckpointStore(checkpoint_dir)
    if not Path(checkpoint_dir).is_dir():
        raise ReportError(f"{checkpoint_dir}: no such checkpoint directory")
    if stream is None:
        streams = store.streams()
        if len(streams) != 1:
            raise ReportError(f"{checkpoint_dir} holds {len(streams)} streams ({', '.join(streams) or 'none'}); choose one with --stream")
        stream = streams[0]
    try:
        loaded = store.load_latest(stream, None)
    except CheckpointError as exc:
        raise ReportError(str(exc)) from None
    except ValueError as exc:
        raise ReportError(f"stream {stream!r}: {exc}") from None
    if loaded is None:
        raise ReportError(f"stream {stream!r} has no checkpoint under {checkpoint_dir}")
    ckpt = loaded.checkpoint
    header = ckpt.header
    fingerprint = model_fingerprint_of(header)
    name = header.get("model")
    model = _load_model(model_path or name, fingerprint)
    if model is None:
        raise ReportError(f"the checkpoint's model {name!r} is not a shipped example; pass its spec with --model PATH")
    try:
        particles = ParticleSet.from_arrays(ckpt.arrays)
    except ValueError as exc:
        raise ReportError(f"{loaded.path}: {exc}") from None
    _prepare_out(out)
    w = normalised_weights(particles.log_weights)
    t = float(header.get("last_day") or 0)
    quantities = model.describe(particles, t)
    for s in model.spec.series:
        quantities[f"expected.{s.name}"] = model.expected(particles, s.name)
    summary = summarise(quantities, w).as_dict()
    n = particles.size
    ess = effective_sample_size(w)

    page = _Page(out, f"casecloud current state: {stream}",
                 f"model {model.spec.name}, step {ckpt.step}, last period {header.get('last_period')}")
    facts = [
        ("stream", stream),
        ("model", model.spec.name),
        ("model fingerprint", fingerprint or "–"),
        ("state after", f"step {ckpt.step}, last period {header.get('last_period')} (model day {header.get('last_day')})"),
        ("particles", f"{n:,}; effective sample size of the current weights {ess:,.0f} ({ess / n:.0%})"),
        ("generated from", f"checkpoint {_file_fact(loaded.path)}, the stream's newest readable one"),
    ]
    if loaded.skipped:
        facts.append(("skipped", "; ".join(f"{p.name}: {r}" for p, r in loaded.skipped) + " (corrupt, older file used)"))
    parts = page.section("state", "Current state")
    rows = []
    for qname, q in summary.items():
        g = q["quantiles"]
        rows.append((qname, _fmt(q["mean"]), _fmt(g.get("0.5")), f"{_fmt(g.get('0.25'))} – {_fmt(g.get('0.75'))}",
                     f"{_fmt(g.get('0.05'))} – {_fmt(g.get('0.95'))}"))
    parts.append(_table(("quantity", "mean", "median", "50 % interval", "90 % interval"), rows))
    parts.append('<p class="note"><code>expected.SERIES</code> is the expected reported count of the series for the '
                 "checkpoint's last period (before observation noise). Weighted by the current particle weights, "
                 "without resampling.</p>")
    alerts = header.get("alerts") or {}
    if alerts:
        parts.append(_table(("alert rule", "active", "last probability", "consecutive updates at or above the raise level"),
                            [(r, "yes" if s.get("active") else "no", _fmt(s.get("last_probability")), s.get("above"))
                             for r, s in alerts.items()]))
    panels = []
    for j, pname in enumerate(model.param_names):
        if model.spec.parameters[pname].kind != "fixed":
            panels.append((f"{pname} ({model.spec.parameters[pname].kind})", particles.params[:, j], w, pname))
    panels.append(("R_eff", quantities["R_eff"], w, "effective reproduction number"))
    parts = page.section("histograms", "Parameter and R_eff distributions")
    path = page.figure(parts, "parameters.png", "weighted histograms of the parameters and R_eff",
                       "Weighted histograms of the cloud (solid line: median; dashed: 5 % and 95 %).")
    rf.histogram_grid(path, panels, cols=min(3, len(panels)))
    sp = _susceptible_shares(model, particles, w)
    if sp:
        path = page.figure(parts, "susceptibles.png", "susceptible share per group",
                           "Share of each group still susceptible, across the cloud.")
        rf.histogram_grid(path, sp, cols=min(3, len(sp)))
    footer = f"casecloud current-state report of stream {_esc(stream)}; read-only; no wall-clock time is recorded."
    return _write(out, page.render(facts, footer))


def _susceptible_shares(model, particles, w) -> list[tuple[str, Any, Any, str]]:
    """Histogram panels of each group's susceptible share; [] when the model has no susceptible stock."""
    if hasattr(model, "stage_counts"):  # individual-based: people per stage and band, kept in the history
        susceptible = model.stage_counts(particles)[:, 0, :]
        size = model.population.band_counts()
        return [(f"S[{g}] / people", susceptible[:, k] / size[k], w, "share of the band")
                for k, g in enumerate(model.groups) if size[k] > 0]
    sources = [f.source for f in model.spec.flows if f.infection]
    c = model.compartments.index(sources[0]) if sources else (model.compartments.index("S") if "S" in model.compartments else -1)
    if c < 0:
        return []
    return [(f"{model.compartments[c]}[{g}] / population", particles.states[:, k, c] / model.population[k], w, "share of the group")
            for k, g in enumerate(model.groups)]


# ---------------------------------------------------------------- CLI
def add_report_parser(sub) -> None:
    p = sub.add_parser(
        "report",
        help="write a static HTML report with figures (index.html + PNGs) from estimates or a checkpoint",
        description="Write OUT/index.html with PNG figures beside it. Either from published estimates "
        "(--estimates, optionally --alerts, --observations, --backtest) or, when no estimates are at hand, "
        "from a stream's newest checkpoint (--checkpoint-dir with --stream): a smaller current-state page.",
    )
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--estimates", help="estimates NDJSON (as published by the service / demo)")
    src.add_argument("--checkpoint-dir", help="checkpoint root: show the stream's current state from its newest checkpoint")
    p.add_argument("--alerts", help="alerts NDJSON (raise/clear levels and alert periods)")
    p.add_argument("--observations", help="observation feed NDJSON (observed counts; invalid lines are skipped and counted)")
    p.add_argument("--backtest", help="directory holding backtest.json (or the file itself)")
    p.add_argument("--stream", help="stream id (needed when the input holds several streams)")
    p.add_argument("--model", help="model spec path when the model is not a shipped example")
    p.add_argument("--out", required=True, help="output directory (index.html and PNG figures)")
    p.set_defaults(handler=cmd_report)


def cmd_report(args) -> int:
    import sys

    try:
        if args.estimates:
            index = build_history_report(
                Path(args.estimates),
                Path(args.out),
                alerts_path=Path(args.alerts) if args.alerts else None,
                observations_path=Path(args.observations) if args.observations else None,
                backtest_path=Path(args.backtest) if args.backtest else None,
                stream=args.stream,
                model_path=args.model,
            )
        else:
            if args.alerts or args.observations or args.backtest:
                raise ReportError("--alerts, --observations and --backtest go with --estimates, not --checkpoint-dir")
            index = build_checkpoint_report(Path(args.checkpoint_dir), args.stream, Path(args.out), args.model)
    except ReportError as exc:
        print(f"casecloud report: {exc}", file=sys.stderr)
        return 2
    print(index)
    return 0
