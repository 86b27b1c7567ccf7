"""``casecloud report``: a static HTML page with PNG figures, from the demo's real outputs.

The demo runs once (40 days, 300 particles, as in test_file_transport.py); the
report is built from its estimates, alerts and observation feed plus a small
synthetic ``backtest.json`` in the format ``service/analysis/backtest.py`` writes.
Figures are checked as real images (PNG signature, read back with
matplotlib, not a single colour), the page for its facts and cautions, and bad
inputs for a clear error with a non-zero exit.
"""

from __future__ import annotations

import datetime as dt
import re
import shutil
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.image as mpimg  # noqa: E402
import numpy as np  # noqa: E402
import orjson  # noqa: E402
import pytest  # noqa: E402

from schemas import AlertMessage, parse_period  # noqa: E402
from service import cli  # noqa: E402
from service.analysis.report import (  # noqa: E402
    _alert_periods,
    _dates,
    _fmt,
    _forecast_band,
    load_estimates,
    load_observations,
)
from service.analysis.report_figures import NowcastBar, ess_figure, nowcast_figure  # noqa: E402

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
STREAM = "brackenford-ed-ili"  # the demo's invented district


def synthetic_backtest(stream: str = STREAM) -> dict:
    """A small backtest.json in the agreed format (numbers invented, deterministic)."""
    horizons = [1, 7, 14]
    methods = ["casecloud", "persistence", "trend"]
    scores, per_origin = [], []
    for si, series in enumerate(["ed_child", "ed_adult"]):
        for mi, method in enumerate(methods):
            for h in horizons:
                wis = round((4.0 + si) * (1 + 0.08 * h) * (1.0 + 0.35 * mi), 3)
                scores.append({
                    "method": method, "series": series, "horizon": h, "n": 30 - h,
                    "wis": wis, "crps": round(wis * 0.8, 3),
                    "coverage_50": round(0.52 - 0.04 * mi - 0.005 * h, 3),
                    "coverage_90": round(0.91 - 0.08 * mi - 0.004 * h, 3),
                    "log_score": round(-2.0 - 0.3 * mi - 0.02 * h, 3), "bias": round(0.05 * (mi - 1), 3),
                })
                per_origin.append({
                    "method": method, "series": series, "origin_period": "2025-09-20", "origin_day": 19,
                    "horizon": h, "target_period": (dt.date(2025, 9, 20) + dt.timedelta(days=h)).isoformat(),
                    "observed": 40 + h, "median": 38.0 + h, "q05": 20.0, "q25": 30.0, "q75": 50.0, "q95": 70.0,
                    "wis": wis, "crps": round(wis * 0.8, 3), "log_score": -3.1,
                })
    return {
        "stream": stream,
        "model": "seir_two_band",
        "history": {"first": "2025-09-02", "last": "2025-10-11", "n": 40},
        "horizons": horizons,
        "methods": methods,
        "scores": scores,
        "per_origin": per_origin,
        "alerts": [{
            "rule": "child_ed_surge", "series": "ed_child", "threshold": 40.0, "horizon_days": 7,
            "auc": 0.8125,
            "roc": {"fpr": [0.0, 0.0, 0.25, 0.5, 1.0], "tpr": [0.0, 0.5, 0.75, 1.0, 1.0],
                    "thresholds": [1.01, 0.9, 0.6, 0.3, 0.0]},
            "episodes": [{"first_exceeding_period": "2025-09-22", "raised_period": "2025-09-14", "lead_days": 8}],
        }],
        "cautions": "Synthetic backtest for the tests: invented numbers.",
    }


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("demo")
    assert cli.main(["demo", "--out", str(out), "--days", "40", "--particles", "300", "--quiet"]) == 0
    bt = out / "bt"
    bt.mkdir()
    (bt / "backtest.json").write_bytes(orjson.dumps(synthetic_backtest(), option=orjson.OPT_INDENT_2))
    return out


def _report_args(demo: Path, out: Path) -> list[str]:
    return [
        "report", "--estimates", str(demo / "estimates.ndjson"), "--alerts", str(demo / "alerts.ndjson"),
        "--observations", str(demo / "observations.ndjson"), "--backtest", str(demo / "bt"), "--out", str(out),
    ]


@pytest.fixture(scope="module")
def report(demo, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("report")
    assert cli.main(_report_args(demo, out)) == 0
    return out


def _estimates(demo: Path) -> list[dict]:
    return [orjson.loads(line) for line in (demo / "estimates.ndjson").read_bytes().splitlines() if line]


def _img_sources(page: str) -> list[str]:
    return re.findall(r'<img src="([^"]+)"', page)


def check_png(path: Path) -> np.ndarray:
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE, f"{path.name} is not a PNG"
    assert len(data) > 8_000, f"{path.name} is only {len(data)} bytes"
    pixels = mpimg.imread(path)
    assert pixels.ndim == 3 and pixels.shape[0] > 200 and pixels.shape[1] > 300, pixels.shape
    rgb = pixels[..., :3]
    assert float(rgb.var()) > 1e-3, f"{path.name} is (nearly) a single colour"
    # More than a handful of distinct colours: axes, bands and markers were drawn.
    packed = (rgb[::3, ::3] * 255).round().astype(np.int64) @ np.array([65536, 256, 1])
    assert np.unique(packed).size > 20
    return pixels


def test_report_writes_page_and_real_figures(report):
    page = (report / "index.html").read_text(encoding="utf-8")
    sources = _img_sources(page)
    expected = {
        "series_ed_child.png", "series_ed_adult.png", "series_lab_confirmed.png", "nowcast_lab_confirmed.png",
        "series_lab_positivity.png", "series_ww_millrace.png", "predictive.png",
        "susceptibles.png", "compartments.png", "r_eff.png", "parameters.png", "ess.png", "exceedance_child_ed_surge.png",
        "backtest_wis.png", "backtest_coverage.png", "backtest_roc.png",
    }
    assert set(sources) == expected
    assert len(sources) == len(set(sources))
    # Every PNG in the directory is on the page, and every image on the page exists.
    assert {p.name for p in report.glob("*.png")} == set(sources)
    for name in sources:
        assert "/" not in name and ":" not in name  # relative, beside the page
        check_png(report / name)


def test_page_states_facts_cautions_and_window(report, demo):
    page = (report / "index.html").read_text(encoding="utf-8")
    est = _estimates(demo)
    first, last = est[0], est[-1]
    for phrase in (
        "Model-based estimates with stated uncertainty",
        "decision support only",
        "Local public-health judgement and reporting rules prevail",
        "Aggregated counts only",
    ):
        assert phrase in page
    assert page.index('class="caution"') < page.index("<h2>")  # the cautions come before any section
    assert last["model"] == "seir_two_band_signals" and "seir_two_band_signals" in page
    assert last["model_fingerprint"] in page
    assert STREAM in page
    # The window ends on the day the cloud stands at (a late value for a past period moves nothing back).
    def cloud_date(e: dict) -> str:
        shift = (e["cloud_day"] if e.get("cloud_day") is not None else e["day"]) - e["day"]
        return (parse_period(e["period"]) + dt.timedelta(days=shift)).isoformat()

    assert f"{cloud_date(first)} to {cloud_date(last)}" in page
    assert f"{len(est)} estimates" in page
    # The latest summary row of R_eff carries the latest estimate's numbers.
    q = last["quantities"]["R_eff"]
    row = f"<tr><td>R_eff</td><td>{_fmt(q['mean'])}</td><td>{_fmt(q['quantiles']['0.5'])}</td>"
    assert row in page
    # The demo feed holds a truncated line and a negative count: both skipped and said so.
    assert "2 line(s) skipped" in page
    # Backtest: AUC, the lead time and the backtest's own cautions.
    assert "0.812" in page and "Synthetic backtest for the tests" in page
    assert "★" in page
    # Self-contained: no script, no external resource, no wall-clock time.
    assert "<script" not in page.lower()
    assert not re.search(r'(src|href)="(https?:|//)', page)
    today = dt.date.today().isoformat()
    assert today not in page or today in (demo / "estimates.ndjson").read_text()


def _predictive_rows(page: str) -> dict[str, list[str]]:
    section = page[page.index('id="predictive"'):]
    section = section[: section.index("</table>")]
    rows = {}
    for row in re.findall(r"<tr>(.*?)</tr>", section, flags=re.S):
        cells = re.findall(r"<td>(.*?)</td>", row)
        if cells:
            rows[cells[0]] = cells
    return rows


def test_each_signal_is_drawn_against_its_one_step_predictive(report, demo):
    page = (report / "index.html").read_text(encoding="utf-8")
    estimates = _estimates(demo)
    assert 'id="predictive"' in page and '<img src="predictive.png"' in page
    rows = _predictive_rows(page)
    # Every signal the stream assimilated is named on the page, with what kind of evidence it is.
    assert set(rows) == {"ed_child", "ed_adult", "lab_confirmed", "lab_positivity", "ww_millrace"}
    assert rows["lab_positivity"][1] == "positives out of tests" and rows["ww_millrace"][1] == "concentration"
    assert rows["ed_child"][1] == "counts"
    for name in rows:
        assert f"<b>{name}</b>" in page[page.index('id="predictive"'):]  # the figure's caption names each panel
    # The table's figures are those of the estimates (recounted here). Bug caught: the share of
    # values inside an interval taken from the posterior of the state, or censored samples counted
    # as values.
    for name, cells in rows.items():
        entries = [e["predictive"][name] for e in estimates if name in (e.get("predictive") or {})]
        seen = [p for p in entries if p["observed"] is not None]
        inside = sum(p["quantiles"]["0.05"] <= p["observed"] <= p["quantiles"]["0.95"] for p in seen)
        assert cells[2] == str(len(seen)) and cells[4] == f"{100 * inside / len(seen):.0f} %"
        assert cells[5] == f"{np.mean([p['pit'] for p in seen]):.2f}"
        if name == "ww_millrace":
            assert cells[6] == str(len(entries) - len(seen)) and len(entries) > len(seen)  # samples below the limit
    check_png(report / "predictive.png")


def test_predictive_figure_draws_shares_and_censored_levels(tmp_path):
    # One panel of each kind from invented values: a share positive, and a concentration series with a
    # sample below the limit on a log axis. The PNG must be a real picture, the axis logarithmic.
    from service.analysis import report_figures as rf

    days = [dt.date(2025, 10, 1) + dt.timedelta(days=k) for k in range(4)]
    q = {"0.05": [0.05, 0.06, 0.07, 0.08], "0.25": [0.07, 0.08, 0.09, 0.1], "0.5": [0.08, 0.09, 0.1, 0.11],
         "0.75": [0.09, 0.1, 0.11, 0.12], "0.95": [0.11, 0.12, 0.13, 0.14]}
    share = rf.PredictivePanel("lab_positivity", "share", days, [0.07, 0.2, 0.1, 0.12], q, [np.nan] * 4, "share")
    level_q = {k: [v * 1000 for v in vs] for k, vs in q.items()}
    level = rf.PredictivePanel("ww_millrace", "level", days, [np.nan, 90.0, 100.0, 115.0], level_q, [60.0] + [np.nan] * 3, "level")
    path = tmp_path / "p.png"
    rf.predictive_figure(path, [share, level])
    check_png(path)


def test_same_inputs_elsewhere_give_the_same_page(report, demo, tmp_path):
    copy = tmp_path / "inputs"
    copy.mkdir()
    for name in ("estimates.ndjson", "alerts.ndjson", "observations.ndjson"):
        shutil.copy(demo / name, copy / name)
    shutil.copytree(demo / "bt", copy / "bt")
    again = tmp_path / "again"
    assert cli.main(_report_args(copy, again)) == 0
    assert (again / "index.html").read_bytes() == (report / "index.html").read_bytes()
    for png in report.glob("*.png"):
        assert (again / png.name).read_bytes() == png.read_bytes(), png.name


def test_checkpoint_page(demo, tmp_path):
    out = tmp_path / "state"
    args = ["report", "--checkpoint-dir", str(demo / "checkpoints"), "--stream", STREAM, "--out", str(out)]
    assert cli.main(args) == 0
    page = (out / "index.html").read_text(encoding="utf-8")
    assert set(_img_sources(page)) == {"parameters.png", "susceptibles.png"}
    for name in _img_sources(page):
        check_png(out / name)
    last = _estimates(demo)[-1]
    assert last["model_fingerprint"] in page
    assert f"step {last['step']}, last period {last['period']}" in page
    for name in ("beta", "rho", "R_eff", "expected.ed_child", "S[child]"):
        assert f"<tr><td>{name}</td>" in page
    assert "decision support only" in page
    # The same inputs give the same bytes (no wall-clock time in the page or the PNGs).
    # Elsewhere: the same state copied to another directory and reported into another one.
    shutil.copytree(demo / "checkpoints", tmp_path / "copy")
    again = tmp_path / "again"
    assert cli.main(["report", "--checkpoint-dir", str(tmp_path / "copy"), "--stream", STREAM, "--out", str(again)]) == 0
    for name in ["index.html", *_img_sources(page)]:
        assert (again / name).read_bytes() == (out / name).read_bytes(), name


def test_forecast_band_reads_the_right_levels():
    levels = [0.01, 0.025, 0.05, 0.10, 0.15, 0.20, 0.25, 0.30, 0.35, 0.40, 0.45, 0.50,
              0.55, 0.60, 0.65, 0.70, 0.75, 0.80, 0.85, 0.90, 0.95, 0.975, 0.99]
    block = {"levels": levels}
    entry = {"mean": [1.0, 2.0], "quantiles": [[float(i), float(i) + 0.5] for i in range(23)]}
    band, mean = _forecast_band(block, entry, dt.date(2025, 10, 1))
    assert band.dates == [dt.date(2025, 10, 2), dt.date(2025, 10, 3)]
    assert band.median.tolist() == [11.0, 11.5]
    assert band.lo50.tolist() == [6.0, 6.5] and band.hi50.tolist() == [16.0, 16.5]
    assert band.lo90.tolist() == [2.0, 2.5] and band.hi90.tolist() == [20.0, 20.5]
    assert mean == ([dt.date(2025, 10, 2), dt.date(2025, 10, 3)], [1.0, 2.0])


def _alert(status: str, period: str, step: int) -> AlertMessage:
    return AlertMessage(id="a", event_id=f"e{step}", stream=STREAM, rule="r", status=status, period=period, step=step,
                        series="ed_child", threshold=40, horizon_days=7, probability=0.8, raise_level=0.7,
                        clear_level=0.4, latest_mean=None)


def test_alert_periods_from_raise_to_clear():
    alerts = [_alert("raised", "2025-09-10", 9), _alert("updated", "2025-09-12", 11), _alert("cleared", "2025-09-20", 19),
              _alert("raised", "2025-10-01", 30)]
    assert _alert_periods(alerts, "r") == [(dt.date(2025, 9, 10), dt.date(2025, 9, 20)), (dt.date(2025, 10, 1), None)]
    assert _alert_periods(alerts, "other") == []


def test_alert_raised_on_a_revision_is_dated_by_the_cloud_day():
    # A lab revision of week 42 (ends Sunday 19 Oct) applied on 29 Oct raises the alert.
    alerts = [_alert("raised", "2025-W42", 79), _alert("cleared", "2025-11-20", 140)]
    when = {79: dt.date(2025, 10, 29), 140: dt.date(2025, 11, 20)}
    # Bug caught: the alert shading starting at the revised week's Sunday, ten days before it was raised.
    assert _alert_periods(alerts, "r", when) == [(dt.date(2025, 10, 29), dt.date(2025, 11, 20))]


# ----------------------------------------------------------------- nowcasts
def _pixels_of(rgb: np.ndarray, colour: str, tol: float = 0.04) -> int:
    want = np.array([int(colour[i : i + 2], 16) / 255 for i in (1, 3, 5)])
    return int((np.abs(rgb[..., :3] - want).max(axis=-1) < tol).sum())


def test_nowcast_section_shows_the_latest_estimates_nowcast(report, demo):
    page = (report / "index.html").read_text(encoding="utf-8")
    last = _estimates(demo)[-1]
    periods = last["nowcast"]["lab_confirmed"]
    assert periods and '<section id="nowcast">' in page and 'href="#nowcast"' in page
    assert page.index('id="series"') < page.index('id="nowcast"') < page.index('id="compartments"')
    pixels = check_png(report / "nowcast_lab_confirmed.png")
    # Grey bars (reported so far) and blue intervals (the nowcast) are drawn.
    assert _pixels_of(pixels, "#b8c2cc") > 2000 and _pixels_of(pixels, "#1f5f8b") > 300
    # Bug caught: the table (and so the figure) built from an older estimate, or the share pending
    # and the eventual count's interval mixed up.
    for p in periods:
        g = p["eventual"]["quantiles"]
        row = (f"<tr><td>{p['period']}</td><td>{_fmt(p['reported'])}</td><td>{p['as_of']}</td>"
               f"<td>{p['share_pending']:.0%}</td><td>{_fmt(p['eventual']['mean'])}</td><td>{_fmt(g['0.5'])}</td>"
               f"<td>{_fmt(g['0.25'])} – {_fmt(g['0.75'])}</td><td>{_fmt(g['0.05'])} – {_fmt(g['0.95'])}</td></tr>")
        assert row in page
    assert "decision support only" in page  # the cautions stay


@pytest.mark.parametrize("nowcast", [None, {"lab_confirmed": []}], ids=["absent", "no-period-pending"])
def test_nowcast_section_is_omitted_cleanly_without_nowcasts(demo, tmp_path, nowcast):
    lines = []
    for line in (demo / "estimates.ndjson").read_bytes().splitlines():
        e = orjson.loads(line)
        e["nowcast"] = nowcast
        lines.append(orjson.dumps(e))
    (tmp_path / "estimates.ndjson").write_bytes(b"\n".join(lines) + b"\n")
    out = tmp_path / "report"
    args = ["report", "--estimates", str(tmp_path / "estimates.ndjson"), "--observations", str(demo / "observations.ndjson"),
            "--out", str(out)]
    assert cli.main(args) == 0
    page = (out / "index.html").read_text(encoding="utf-8")
    # Bug caught: an empty section or figure, a crash on estimates of a model without event-dated
    # series, or a link to a section that is not there.
    assert 'id="nowcast"' not in page and "#nowcast" not in page and "nowcast_" not in page
    assert not list(out.glob("nowcast_*.png"))
    assert {p.name for p in out.glob("*.png")} == set(_img_sources(page))
    assert "series_lab_confirmed.png" in _img_sources(page)  # the rest of the page is unchanged


def test_nowcast_figure_without_a_pending_period_draws_the_season_only(tmp_path):
    season = [NowcastBar(f"2025-W{40 + k}", 10 * k + 5, 10 * k + 9, {"0.05": 10 * k + 6, "0.25": 10 * k + 8, "0.5": 10 * k + 9,
                                                                     "0.75": 10 * k + 10, "0.95": 10 * k + 13}, later=10 * k + 8)
              for k in range(6)]
    nowcast_figure(tmp_path / "both.png", "lab", season[-2:], "latest", season, "season")
    nowcast_figure(tmp_path / "season.png", "lab", [], "latest", season, "season")
    both, alone = check_png(tmp_path / "both.png"), check_png(tmp_path / "season.png")
    assert alone.shape[0] < both.shape[0]  # one panel, not an empty one above it


def test_observed_counts_of_a_revised_series_are_the_latest_vintage(tmp_path):
    stream = "s"
    msgs = [
        {"stream": stream, "period": "2025-W40", "as_of": "2025-10-06", "counts": {"lab": 5}},
        {"stream": stream, "period": "2025-10-06", "counts": {"ed": 31}},
        {"stream": stream, "period": "2025-W40", "as_of": "2025-10-13", "counts": {"lab": 9}},
        {"stream": stream, "period": "2025-W40", "as_of": "2025-10-08", "counts": {"lab": 7}},  # stale vintage
        {"stream": stream, "period": "2025-W40", "as_of": "2025-10-20", "counts": {"lab": 8}},  # lower total
        {"stream": stream, "period": "2025-10-06", "counts": {"ed": 99}},  # a final count sent again
    ]
    path = tmp_path / "obs.ndjson"
    path.write_bytes(b"\n".join(orjson.dumps(m) for m in msgs) + b"\n")
    feed = load_observations(path, stream)
    # Bug caught: dots showing the first (lowest) report of a revised week, or totals the service
    # never applies (a stale vintage, a lowered total); a final count stays the first one given.
    assert feed.counts == {"lab": {dt.date(2025, 10, 5): 9}, "ed": {dt.date(2025, 10, 6): 31}}


def test_estimates_are_placed_at_the_cloud_day(demo):
    estimates = load_estimates(demo / "estimates.ndjson", None)
    dates = _dates(estimates)
    revisions = [d for e, d in zip(estimates, dates) if "W" in e.period]
    assert revisions  # lab totals for past weeks were applied
    # Bug caught: a revision of a past week drawn at that week's Sunday, so every band over time
    # zigzags back and forth.
    assert dates == sorted(dates)
    assert [(d - dates[0]).days for d in dates] == [e.cloud_day - estimates[0].cloud_day for e in estimates]


def test_collapses_are_highlighted_in_red(tmp_path):
    dates = [dt.date(2025, 9, 1) + dt.timedelta(days=k) for k in range(20)]
    fraction = np.linspace(0.9, 0.4, 20)
    resampled = np.zeros(20, dtype=bool)
    collapsed = np.zeros(20, dtype=bool)
    ess_figure(tmp_path / "calm.png", dates, fraction, resampled, collapsed)
    collapsed[[5, 12]] = True
    ess_figure(tmp_path / "collapse.png", dates, fraction, resampled, collapsed)

    def reddish(path: Path) -> int:
        rgb = mpimg.imread(path)[..., :3]
        return int(((rgb[..., 0] > 0.8) & (rgb[..., 0] - rgb[..., 1] > 0.15) & (rgb[..., 0] - rgb[..., 2] > 0.15)).sum())

    assert reddish(tmp_path / "calm.png") < 50
    assert reddish(tmp_path / "collapse.png") > 1000


# ----------------------------------------------------------------- bad input
def _fails(argv: list[str], capsys) -> str:
    assert cli.main(argv) == 2
    return capsys.readouterr().err


def test_missing_estimates_file(tmp_path, capsys):
    err = _fails(["report", "--estimates", str(tmp_path / "nope.ndjson"), "--out", str(tmp_path / "o")], capsys)
    assert "nope.ndjson" in err and "no such file" in err
    assert not (tmp_path / "o" / "index.html").exists()


def test_malformed_estimate_line(demo, tmp_path, capsys):
    lines = (demo / "estimates.ndjson").read_bytes().splitlines()
    bad = tmp_path / "estimates.ndjson"
    bad.write_bytes(b"\n".join([lines[0], lines[1], lines[2][:40]] + lines[3:]) + b"\n")
    err = _fails(["report", "--estimates", str(bad), "--out", str(tmp_path / "o")], capsys)
    assert "line 3" in err and "not JSON" in err


def test_estimate_with_wrong_field(demo, tmp_path, capsys):
    first = orjson.loads((demo / "estimates.ndjson").read_bytes().splitlines()[0])
    first["ess"] = "plenty"
    bad = tmp_path / "estimates.ndjson"
    bad.write_bytes(orjson.dumps(first) + b"\n")
    err = _fails(["report", "--estimates", str(bad), "--out", str(tmp_path / "o")], capsys)
    assert "line 1" in err and "ess" in err and "not a valid estimate" in err


def test_backtest_missing_field(demo, tmp_path, capsys):
    bt = synthetic_backtest()
    del bt["scores"][0]["wis"]
    (tmp_path / "backtest.json").write_bytes(orjson.dumps(bt))
    err = _fails(["report", "--estimates", str(demo / "estimates.ndjson"), "--backtest", str(tmp_path),
                  "--out", str(tmp_path / "o")], capsys)
    assert "scores[0]" in err and "wis" in err


def test_checkpoint_dir_without_the_stream(demo, tmp_path, capsys):
    shutil.copytree(demo / "checkpoints", tmp_path / "ck")
    err = _fails(["report", "--checkpoint-dir", str(tmp_path / "ck"), "--stream", "elsewhere", "--out", str(tmp_path / "o")],
                 capsys)
    assert "'elsewhere'" in err and "no checkpoint" in err
