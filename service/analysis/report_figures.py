"""Figures for ``casecloud report``: matplotlib (Agg backend), PNG files.

Every function draws one figure from plain arrays and writes it to ``path``.
No pyplot state is used (each figure is a :class:`matplotlib.figure.Figure`
of its own), so figures never leak between calls, and the PNG bytes depend
only on the data (matplotlib writes no timestamp into PNG files).

Colours (one meaning each, across the page): blue = posterior of the past,
purple = forecast, black dots = observed counts, orange shading = alert
periods, red = collapses and thresholds; grey bars = counts reported so far
of a period that is still being reported (nowcasts).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.dates as mdates  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

__all__ = [
    "Band",
    "band_panels",
    "series_figure",
    "ess_figure",
    "exceedance_figure",
    "reff_figure",
    "histogram_grid",
    "backtest_score_figure",
    "backtest_coverage_figure",
    "roc_figure",
    "NowcastBar",
    "nowcast_figure",
    "PredictivePanel",
    "predictive_figure",
]

POSTERIOR = "#1f5f8b"
FORECAST = "#6a3d9a"
OBSERVED = "#111111"
ALERT = "#f28e2b"
DANGER = "#c0392b"
METHOD_COLOURS = {"casecloud": "#1f5f8b", "persistence": "#8c8c8c", "trend": "#e07b39"}
DPI = 100


class Band:
    """A quantity over time: dates, median and 50 % / 90 % interval bounds (NaN where absent)."""

    def __init__(self, dates: Sequence[dt.date], median, lo50, hi50, lo90, hi90) -> None:
        self.dates = list(dates)
        self.median = np.asarray(median, dtype=float)
        self.lo50 = np.asarray(lo50, dtype=float)
        self.hi50 = np.asarray(hi50, dtype=float)
        self.lo90 = np.asarray(lo90, dtype=float)
        self.hi90 = np.asarray(hi90, dtype=float)

    def __len__(self) -> int:
        return len(self.dates)


def _new(rows: int, cols: int, width: float = 11.0, row_height: float = 3.0, sharex: bool = True):
    fig = Figure(figsize=(width, row_height * rows + 0.4), dpi=DPI, layout="constrained")
    axes = fig.subplots(rows, cols, squeeze=False, sharex=sharex)
    return fig, axes


def _series_panels(names: Sequence[str]):
    """Up to three panels a row, one per name; unused panels hidden. Returns (fig, axes, [(ax, name)])."""
    cols = min(3, max(1, len(names)))
    fig, axes = _new(-(-len(names) // cols), cols, width=11.0, row_height=3.0, sharex=False)
    for ax in axes.flat[len(names):]:
        ax.set_visible(False)
    return fig, axes, list(zip(axes.flat, names))


def _dates_axis(ax) -> None:
    locator = mdates.AutoDateLocator(minticks=4, maxticks=10)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.grid(True, color="#dddddd", linewidth=0.6)


def _draw_band(ax, band: Band, colour: str, label: str, step: bool = False) -> None:
    ax.fill_between(band.dates, band.lo90, band.hi90, color=colour, alpha=0.18, linewidth=0, label=f"{label}: 90 %")
    ax.fill_between(band.dates, band.lo50, band.hi50, color=colour, alpha=0.38, linewidth=0, label=f"{label}: 50 %")
    ax.plot(band.dates, band.median, color=colour, linewidth=1.6, label=f"{label}: median")


def _save(fig: Figure, path: Path) -> None:
    fig.savefig(path, format="png", dpi=DPI, facecolor="white")


def band_panels(
    path: Path,
    panels: Sequence[tuple[str, Band, str]],
    cols: int = 1,
    title: str | None = None,
    reference: float | None = None,
) -> None:
    """A grid of posterior bands, one panel per (title, band, y label)."""
    rows = max(1, -(-len(panels) // cols))
    fig, axes = _new(rows, cols, row_height=2.6 if rows > 2 else 3.0)
    for k, ax in enumerate(axes.flat):
        if k >= len(panels):
            ax.set_visible(False)
            continue
        name, band, ylabel = panels[k]
        _draw_band(ax, band, POSTERIOR, "posterior")
        if reference is not None:
            ax.axhline(reference, color=DANGER, linewidth=1.0, linestyle="--", label=f"{reference:g}")
        ax.set_title(name, fontsize=10, loc="left")
        ax.set_ylabel(ylabel, fontsize=9)
        _dates_axis(ax)
    handles, labels = axes.flat[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside upper right", fontsize=8, ncols=len(labels), frameon=False)
    if title:
        fig.suptitle(title, fontsize=12, x=0.01, ha="left")
    _save(fig, path)


def _draw_reported(ax, observed, unmatched, forecast, forecast_mean, threshold, last_date, legend: bool,
                   ylabel: str = "count per period") -> None:
    if forecast is not None:
        _draw_band(ax, forecast, FORECAST, "forecast")
    if forecast_mean is not None:
        ax.plot(forecast_mean[0], forecast_mean[1], color=FORECAST, linewidth=0.9, linestyle=":", label="forecast: mean")
    if observed is not None and observed[0]:
        ax.plot(observed[0], observed[1], "o", color=OBSERVED, markersize=2.8, label="observed (applied)")
    if unmatched is not None and unmatched[0]:
        ax.plot(unmatched[0], unmatched[1], "o", markerfacecolor="none", color=DANGER, markersize=4,
                label="observed (no estimate for that period)")
    if threshold is not None:
        ax.axhline(threshold, color=DANGER, linewidth=1.0, linestyle="--", label=f"alert threshold {threshold:g}")
    if last_date is not None:
        ax.axvline(last_date, color="#555555", linewidth=0.8, linestyle="-.", label="latest estimate")
    ax.set_ylabel(ylabel, fontsize=9)
    if legend:
        ax.legend(fontsize=8, loc="upper left", ncols=3)
    _dates_axis(ax)


def series_figure(
    path: Path,
    series: str,
    observed: tuple[list[dt.date], list[float]] | None,
    unmatched: tuple[list[dt.date], list[float]] | None,
    forecast: Band | None,
    forecast_mean: tuple[list[dt.date], list[float]] | None,
    latent: Band | None,
    latent_label: str | None,
    threshold: float | None,
    last_date: dt.date | None,
    first_date: dt.date,
    zoom_days: int = 42,
    what: str = "reported counts",
    ylabel: str = "count per period",
) -> None:
    """Reported counts over the whole window (observed + forecast fan), the same zoomed on the
    last ``zoom_days`` and the forecast, and the latent incidence behind the series. With no
    reported counts and no forecast, only the latent incidence is drawn. ``what`` and ``ylabel``
    name the values (e.g. a share positive or a concentration)."""
    reported = forecast is not None or any(p is not None and len(p[0]) for p in (observed, unmatched))
    rows = (2 if reported else 0) + (1 if latent is not None else 0)
    fig = Figure(figsize=(11.0, 2.9 * rows + 0.6), dpi=DPI, layout="constrained")
    axes = fig.subplots(rows, 1, squeeze=False)
    end = forecast.dates[-1] if forecast is not None and len(forecast) else last_date
    window = (first_date - dt.timedelta(days=1), end + dt.timedelta(days=1))
    if not reported:
        lax = axes[0, 0]
        _draw_band(lax, latent, POSTERIOR, "posterior")
        lax.set_title(latent_label or "latent incidence", fontsize=10, loc="left")
        lax.set_ylabel("per day (unthinned)", fontsize=9)
        lax.set_ylim(bottom=0)
        lax.set_xlim(*window)
        lax.legend(fontsize=8, loc="upper right", ncols=3)
        _dates_axis(lax)
        _save(fig, path)
        return
    args = (observed, unmatched, forecast, forecast_mean, threshold, last_date)
    ax = axes[0, 0]
    _draw_reported(ax, *args, legend=False, ylabel=ylabel)
    handles, labels = ax.get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside upper right", fontsize=8, ncols=4, frameon=False)
    ax.set_title(f"{series}: {what}, whole window", fontsize=10, loc="left")
    ax.set_ylim(bottom=0)
    ax.set_xlim(*window)
    zax = axes[1, 0]
    _draw_reported(zax, *args, legend=False, ylabel=ylabel)
    if last_date is not None:
        lo = last_date - dt.timedelta(days=zoom_days)
        hi = forecast.dates[-1] if forecast is not None and len(forecast) else last_date
        zax.set_xlim(lo - dt.timedelta(days=1), hi + dt.timedelta(days=1))
        visible = [0.0]
        for pts in (observed, unmatched):
            if pts is not None:
                visible += [v for d, v in zip(*pts) if lo <= d <= hi]
        if forecast is not None:
            visible += [v for v in forecast.hi90 if np.isfinite(v)]
        if threshold is not None:
            visible.append(threshold)
        top = 1.08 * max(visible)
        # counts: at least 0..1; shares and levels: their own scale
        zax.set_ylim(0, top if top > 0 and ylabel != "count per period" else max(1.0, top))
        zax.set_title(f"{series}: last {zoom_days} days and the forecast", fontsize=10, loc="left")
    if latent is not None:
        lax = axes[2, 0]
        _draw_band(lax, latent, POSTERIOR, "posterior")
        lax.set_title(latent_label or "latent incidence", fontsize=10, loc="left")
        lax.set_ylabel("per day (unthinned)", fontsize=9)
        lax.set_ylim(bottom=0)
        lax.set_xlim(axes[0, 0].get_xlim())
        lax.legend(fontsize=8, loc="upper right", ncols=3)
        _dates_axis(lax)
    _save(fig, path)


def reff_figure(path: Path, band: Band, forecast: Band | None) -> None:
    fig, axes = _new(1, 1, row_height=3.6)
    ax = axes[0, 0]
    _draw_band(ax, band, POSTERIOR, "posterior")
    if forecast is not None:
        _draw_band(ax, forecast, FORECAST, "forecast")
    ax.axhline(1.0, color=DANGER, linewidth=1.2, linestyle="--", label="R = 1")
    ax.set_ylabel("effective reproduction number", fontsize=9)
    ax.set_title("R_eff: above the dashed line, infections grow", fontsize=10, loc="left")
    ax.set_ylim(bottom=0)
    handles, labels = ax.get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside upper right", fontsize=8, ncols=4, frameon=False)
    _dates_axis(ax)
    _save(fig, path)


def ess_figure(path: Path, dates: list[dt.date], fraction, resampled, collapsed) -> None:
    fraction = np.asarray(fraction, dtype=float)
    resampled = np.asarray(resampled, dtype=bool)
    collapsed = np.asarray(collapsed, dtype=bool)
    fig, axes = _new(1, 1, row_height=3.2)
    ax = axes[0, 0]
    for k in np.flatnonzero(collapsed):
        # One day wide, centred on the update (dates have no hours: work in matplotlib's day numbers).
        x = mdates.date2num(dates[k])
        ax.axvspan(x - 0.5, x + 0.5, color=DANGER, alpha=0.45, linewidth=0)
    ax.plot(dates, fraction, color=POSTERIOR, linewidth=1.3, label="ESS / particles")
    if resampled.any():
        idx = np.flatnonzero(resampled)
        ax.plot([dates[k] for k in idx], fraction[idx], "v", color="#333333", markersize=4, label="resampled after this update")
    if collapsed.any():
        ax.plot([], [], "s", color=DANGER, alpha=0.5, label=f"collapse ({int(collapsed.sum())})")
    ax.set_ylim(0, 1.05)
    ax.set_ylabel("fraction of particles", fontsize=9)
    ax.set_title("Effective sample size of the cloud", fontsize=10, loc="left")
    ax.legend(fontsize=8, loc="lower left", ncols=3)
    _dates_axis(ax)
    _save(fig, path)


def exceedance_figure(
    path: Path,
    rule: str,
    dates: list[dt.date],
    probability,
    raise_level: float | None,
    clear_level: float | None,
    periods: list[tuple[dt.date, dt.date | None]],
    last_date: dt.date,
    subtitle: str,
) -> None:
    fig, axes = _new(1, 1, row_height=3.0)
    ax = axes[0, 0]
    for k, (start, end) in enumerate(periods):
        ax.axvspan(start, end or last_date, color=ALERT, alpha=0.25, linewidth=0, label="alert active" if k == 0 else None)
    ax.plot(dates, probability, color=POSTERIOR, linewidth=1.4, marker="o", markersize=2, label="exceedance probability")
    if raise_level is not None:
        ax.axhline(raise_level, color=DANGER, linestyle="--", linewidth=1.0, label=f"raise level {raise_level:g}")
    if clear_level is not None:
        ax.axhline(clear_level, color="#2e7d32", linestyle=":", linewidth=1.2, label=f"clear level {clear_level:g}")
    ax.set_ylim(-0.02, 1.02)
    ax.set_ylabel("probability", fontsize=9)
    ax.set_title(f"{rule}: {subtitle}", fontsize=10, loc="left")
    handles, labels = ax.get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside upper right", fontsize=8, ncols=len(labels), frameon=False)
    _dates_axis(ax)
    _save(fig, path)


def histogram_grid(path: Path, panels: Sequence[tuple[str, np.ndarray, np.ndarray, str]], cols: int = 3) -> None:
    """Weighted histograms: one panel per (title, values, weights, x label); median and 90 % marked."""
    rows = max(1, -(-len(panels) // cols))
    fig, axes = _new(rows, cols, row_height=2.6, sharex=False)
    for k, ax in enumerate(axes.flat):
        if k >= len(panels):
            ax.set_visible(False)
            continue
        name, values, weights, xlabel = panels[k]
        values = np.asarray(values, dtype=float)
        weights = np.asarray(weights, dtype=float)
        ok = np.isfinite(values)
        values, weights = values[ok], weights[ok]
        lo, hi = (float(values.min()), float(values.max())) if values.size else (0.0, 1.0)
        if hi <= lo:
            lo, hi = lo - 0.5, hi + 0.5
        ax.hist(values, bins=40, range=(lo, hi), weights=weights, color=POSTERIOR, alpha=0.75)
        if values.size:
            order = np.argsort(values, kind="stable")
            cw = np.cumsum(weights[order])
            cw /= cw[-1]
            q = [values[order[min(np.searchsorted(cw, p - 1e-12), values.size - 1)]] for p in (0.05, 0.5, 0.95)]
            ax.axvline(q[1], color="#111111", linewidth=1.2)
            for v in (q[0], q[2]):
                ax.axvline(v, color="#111111", linewidth=0.8, linestyle="--")
        ax.set_title(name, fontsize=10, loc="left")
        ax.set_xlabel(xlabel, fontsize=9)
        ax.set_yticks([])
        ax.grid(True, axis="x", color="#dddddd", linewidth=0.6)
    _save(fig, path)


def backtest_score_figure(path: Path, table: dict[str, dict[str, tuple[list[int], list[float]]]], score: str) -> None:
    """``table[series][method] = (horizons, values)``: one panel per series."""
    fig, _, panels = _series_panels(sorted(table))
    for ax, name in panels:
        for method, (h, v) in sorted(table[name].items()):
            ax.plot(h, v, marker="o", color=METHOD_COLOURS.get(method, None), linewidth=1.5, label=method)
        values = np.array([x for _, (_, v) in table[name].items() for x in v], dtype=float)
        values = values[np.isfinite(values) & (values > 0)]
        log = values.size > 0 and values.max() > 20 * values.min()
        ax.set_title(f"{name}: {score} by horizon (lower is better{'; log scale' if log else ''})",
                     fontsize=10, loc="left")
        ax.set_xlabel("horizon (days ahead)", fontsize=9)
        if log:  # one baseline far off must not flatten the others
            ax.set_yscale("log")
        else:
            ax.set_ylim(bottom=0)
        ax.grid(True, color="#dddddd", linewidth=0.6)
        ax.legend(fontsize=8)
    _save(fig, path)


def backtest_coverage_figure(path: Path, table: dict[str, dict[str, tuple[list[int], list[float], list[float]]]]) -> None:
    """``table[series][method] = (horizons, coverage_50, coverage_90)``."""
    fig, axes, panels = _series_panels(sorted(table))
    for ax, name in panels:
        for method, (h, c50, c90) in sorted(table[name].items()):
            colour = METHOD_COLOURS.get(method, None)
            ax.plot(h, c90, marker="o", color=colour, linewidth=1.5, label=f"{method} 90 %")
            ax.plot(h, c50, marker="s", color=colour, linewidth=1.0, linestyle="--", label=f"{method} 50 %")
        ax.axhline(0.9, color="#111111", linewidth=0.8)
        ax.axhline(0.5, color="#111111", linewidth=0.8, linestyle="--")
        ax.set_ylim(0, 1.02)
        ax.set_title(f"{name}: interval coverage (lines: nominal)", fontsize=10, loc="left")
        ax.set_xlabel("horizon (days ahead)", fontsize=9)
        ax.grid(True, color="#dddddd", linewidth=0.6)
    handles, labels = axes.flat[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside upper right", fontsize=8, ncols=len(labels), frameon=False)
    _save(fig, path)


def roc_figure(path: Path, curves: Sequence[tuple[str, list[float], list[float], float | None]]) -> None:
    """One panel per alert rule: (title, fpr, tpr, auc)."""
    cols = min(3, max(1, len(curves)))
    rows = -(-len(curves) // cols)
    fig = Figure(figsize=(3.8 * cols, 3.8 * rows), dpi=DPI, layout="constrained")
    axes = fig.subplots(rows, cols, squeeze=False)
    for k, ax in enumerate(axes.flat):
        if k >= len(curves):
            ax.set_visible(False)
            continue
        name, fpr, tpr, auc = curves[k]
        ax.plot([0, 1], [0, 1], color="#999999", linestyle=":", linewidth=1.0, label="no skill")
        if fpr:
            ax.step(fpr, tpr, where="post", color=POSTERIOR, linewidth=1.6,
                    label=f"AUC {auc:.3f}" if auc is not None else "AUC undefined")
        else:
            ax.text(0.5, 0.5, "no ROC points", ha="center", va="center", fontsize=9)
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1.01)
        ax.set_aspect("equal")
        ax.set_xlabel("false positive rate", fontsize=9)
        ax.set_ylabel("true positive rate", fontsize=9)
        ax.set_title(name, fontsize=10, loc="left")
        ax.grid(True, color="#dddddd", linewidth=0.6)
        ax.legend(fontsize=8, loc="lower right")
    _save(fig, path)


REPORTED = "#b8c2cc"


class NowcastBar:
    """One period of an event-dated series: reported so far and the nowcast of its eventual count.

    label : the period as shown on the axis; reported : total reported so far; note : a short line
    above the bar (as-of date, share pending); q : eventual-count quantiles "0.05", "0.25", "0.5",
    "0.75", "0.95" (NaN where absent); later : a total reported later (the season panel), or None.
    """

    def __init__(self, label: str, reported: float, mean: float, q: dict[str, float], note: str = "",
                 later: float | None = None) -> None:
        self.label, self.reported, self.mean, self.note, self.later = label, float(reported), float(mean), note, later
        self.q = {k: float(q.get(k, np.nan)) for k in ("0.05", "0.25", "0.5", "0.75", "0.95")}


def _nowcast_panel(ax, bars: Sequence[NowcastBar], later_label: str | None, annotate: bool) -> None:
    x = np.arange(len(bars))
    reported = np.array([b.reported for b in bars])
    if later_label is not None:
        later = np.array([np.nan if b.later is None else b.later for b in bars])
        ax.bar(x, later, width=0.72, color="white", edgecolor="#6b7785", linewidth=1.0, hatch="///", label=later_label)
    ax.bar(x, reported, width=0.46, color=REPORTED, edgecolor="#6b7785", linewidth=0.8,
           label="reported so far" if later_label is None else "reported at the nowcast")
    q = {k: np.array([b.q[k] for b in bars]) for k in ("0.05", "0.25", "0.5", "0.75", "0.95")}
    ax.vlines(x, q["0.05"], q["0.95"], color=POSTERIOR, linewidth=1.6, label="nowcast of the eventual count: 90 %")
    ax.vlines(x, q["0.25"], q["0.75"], color=POSTERIOR, linewidth=6.0, alpha=0.75, label="nowcast: 50 %")
    ax.plot(x, [b.mean for b in bars], "D", color="white", markeredgecolor=POSTERIOR, markeredgewidth=1.4, markersize=6,
            linestyle="none", label="nowcast: mean")
    top = np.nanmax(np.concatenate([reported, q["0.95"], [b.mean for b in bars],
                                    [b.later for b in bars if b.later is not None], [1.0]]))
    ax.set_ylim(0, top * (1.22 if annotate else 1.08))
    if annotate:
        for k, b in enumerate(bars):
            if b.note:
                y = np.nanmax([b.reported, b.q["0.95"], b.mean])
                ax.annotate(b.note, (x[k], y), xytext=(0, 5), textcoords="offset points", ha="center", va="bottom",
                            fontsize=8, color="#333333")
    ax.set_xticks(x, [b.label for b in bars], fontsize=8 if len(bars) <= 12 else 7,
                  rotation=0 if len(bars) <= 8 else 45, ha="center" if len(bars) <= 8 else "right")
    ax.set_xlim(-0.6, max(len(bars), 3) - 0.4)  # a few periods do not become slabs
    ax.set_ylabel("count per period", fontsize=9)
    ax.grid(True, axis="y", color="#dddddd", linewidth=0.6)
    ax.set_axisbelow(True)


def nowcast_figure(
    path: Path,
    series: str,
    latest: Sequence[NowcastBar],
    latest_title: str,
    season: Sequence[NowcastBar] | None = None,
    season_title: str = "",
) -> None:
    """Reported so far against the nowcast of the eventual count, per period.

    Top: the periods of the latest estimate (each annotated with its note, e.g. the as-of date and the
    share still pending). Bottom (with ``season``): every period's nowcast when it was first reported,
    beside the total reported by the latest estimate (``NowcastBar.later``), so early nowcasts can be
    compared with what came in afterwards. At least one of the two must hold a bar.
    """
    rows = [r for r in ((latest, latest_title, None, True), (season, season_title, "reported by the latest estimate", False)) if r[0]]
    heights = [3.4 if r[3] else 3.2 for r in rows]
    fig = Figure(figsize=(11.0, sum(heights) + 0.7), dpi=DPI, layout="constrained")
    axes = fig.subplots(len(rows), 1, squeeze=False, height_ratios=heights)
    for ax, (bars, title, later_label, annotate) in zip(axes[:, 0], rows):
        _nowcast_panel(ax, bars, later_label, annotate)
        ax.set_title(f"{series}: {title}", fontsize=10, loc="left")
        ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.005, 1.0), frameon=False)
    _save(fig, path)


class PredictivePanel:
    """One series' values against their one-step-ahead predictive (``EstimateMessage.predictive``).

    kind : 'count', 'share' (positives / tests) or 'level' (a concentration: log axis).
    dates : where each value sits; observed : the values (NaN: below the limit of detection);
    q : level ('0.05', '0.25', '0.5', '0.75', '0.95') -> array of predictive quantiles, in the
    panel's units; lods : the limit of each value (NaN where none).
    """

    def __init__(self, name: str, kind: str, dates: Sequence[dt.date], observed, q: dict[str, Sequence[float]], lods,
                 ylabel: str) -> None:
        self.name, self.kind, self.dates, self.ylabel = name, kind, list(dates), ylabel
        self.observed = np.asarray(observed, dtype=float)
        self.q = {k: np.asarray(q[k], dtype=float) for k in ("0.05", "0.25", "0.5", "0.75", "0.95")}
        self.lods = np.asarray(lods, dtype=float)


def predictive_figure(path: Path, panels: Sequence[PredictivePanel]) -> None:
    """Each observed signal against the cloud's predictive of it just before it was assimilated:
    one panel per series (shared dates), 90 % (thin) and 50 % (thick) predictive intervals and the
    median, the value as a dot (red: outside the 90 % interval); concentrations on a log axis with
    samples below the limit of detection drawn as open triangles at the limit."""
    fig, axes = _new(len(panels), 1, row_height=2.5)
    for ax, p in zip(axes[:, 0], panels):
        x = np.array(p.dates, dtype="datetime64[D]").astype("O") if p.dates else []
        ax.vlines(x, p.q["0.05"], p.q["0.95"], color=POSTERIOR, linewidth=1.2, alpha=0.55, label="one-step predictive: 90 %")
        ax.vlines(x, p.q["0.25"], p.q["0.75"], color=POSTERIOR, linewidth=4.0, alpha=0.55, label="50 %")
        ax.plot(x, p.q["0.5"], "_", color=POSTERIOR, markersize=7, label="median")
        seen = ~np.isnan(p.observed)
        outside = seen & ((p.observed < p.q["0.05"]) | (p.observed > p.q["0.95"]))
        inside = seen & ~outside
        ax.plot([d for d, k in zip(x, inside) if k], p.observed[inside], "o", color=OBSERVED, markersize=3.0,
                label="observed")
        if outside.any():
            ax.plot([d for d, k in zip(x, outside) if k], p.observed[outside], "o", color=DANGER, markersize=3.6,
                    label="observed, outside the 90 % interval")
        below = ~seen & ~np.isnan(p.lods)
        if below.any():
            ax.plot([d for d, k in zip(x, below) if k], p.lods[below], "v", markerfacecolor="none", color=OBSERVED,
                    markersize=6, label="below the limit of detection (drawn at the limit)")
        if p.kind == "level":
            ax.set_yscale("log")
        else:
            ax.set_ylim(bottom=0)
        ax.set_title(p.name, fontsize=10, loc="left")
        ax.set_ylabel(p.ylabel, fontsize=9)
        ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.005, 1.0), frameon=False)
        _dates_axis(ax)
    _save(fig, path)
