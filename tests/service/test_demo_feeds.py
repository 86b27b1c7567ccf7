"""The demo's stream is fed as real feeds arrive: two ED feeds on some days, lab totals by
specimen date revised upward as reports come in, the lab's positives out of tests on weekdays and
a wastewater site's samples; its estimates carry nowcasts of the lab weeks and, for every value,
its one-step-ahead predictive.

One demo run (40 days, 300 particles, as in test_file_transport.py), read back from its files:
the feed it wrote, the estimates the service published and the summary it printed. The hidden
lab truth is checked on its own (no service) against what it must satisfy by construction.
"""

from __future__ import annotations

import datetime as dt
import re

import numpy as np
import orjson
import pytest
from scipy import stats

from filters import CompartmentalModel, reporting_cdf, simulate_season
from schemas import EstimateMessage, example_model_path, load_model_spec, parse_period
from service import cli
from service.analysis.demo import (
    DEMO_MODEL,
    LAB_SERIES,
    POS_SERIES,
    TRUE_LAB,
    TRUE_PARAMS,
    TRUE_SIGNALS,
    TRUTH_MODEL,
    WW_LOD,
    WW_SERIES,
    WW_WEEKDAYS,
    _lab_reports,
    predictive_check,
    simulate_lab,
    simulate_signals,
)

DAYS = 40


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> dict:
    out = tmp_path_factory.mktemp("demo")
    assert cli.main(["demo", "--out", str(out), "--days", str(DAYS), "--particles", "300", "--quiet"]) == 0
    messages = []
    for line in (out / "observations.ndjson").read_bytes().splitlines():
        try:
            messages.append(orjson.loads(line))
        except orjson.JSONDecodeError:
            continue  # the feed's deliberately truncated line
    estimates = [orjson.loads(line) for line in (out / "estimates.ndjson").read_bytes().splitlines() if line]
    return {"out": out, "messages": messages, "estimates": estimates, "summary": (out / "summary.txt").read_text()}


def _lab(messages: list[dict]) -> list[dict]:
    return [m for m in messages if LAB_SERIES in m["counts"]]


def test_the_feed_holds_two_ed_feeds_and_lab_vintages(demo):
    messages = demo["messages"]
    lab = _lab(messages)
    # Bug caught: the demo falling back to one final message per day (no second feed, no vintages).
    assert len(lab) >= 6 and all("as_of" in m and "W" in m["period"] for m in lab)
    assert all(set(m["counts"]) == {LAB_SERIES} for m in lab)  # a weekly series never shares a daily message
    totals: dict[str, list[int]] = {}
    for m in lab:
        totals.setdefault(m["period"], []).append(m["counts"][LAB_SERIES])
    assert any(len(t) >= 3 for t in totals.values())  # a week known as of several dates
    assert all(t == sorted(t) for t in totals.values())  # totals only rise
    assert any(t[-1] > t[0] for t in totals.values())  # first reported low, revised upward
    # Two ED feeds: on some days each band arrives in a message of its own.
    bands: dict[str, list[set]] = {}
    for m in messages:
        if LAB_SERIES not in m["counts"]:
            bands.setdefault(m["period"], []).append(set(m["counts"]))
    assert any(sorted(map(sorted, b)) == [["ed_adult"], ["ed_child"]] for b in bands.values())


def test_higher_lab_totals_are_assimilated_as_revisions(demo):
    # What the feed says independently of the service: a lab message whose total is above the
    # total last sent for its week is a revision the service must apply (all are inside the window).
    last: dict[str, int] = {}
    raised = 0
    for m in _lab(demo["messages"]):
        value = m["counts"][LAB_SERIES]
        raised += m["period"] in last and value > last[m["period"]]
        last[m["period"]] = value
    assert raised >= 2
    # The summary's count is the service's casecloud_revisions_total over both runs.
    # Bug caught: higher totals skipped as duplicates (the first symptom), or assimilated
    # as fresh totals without the metric knowing.
    found = re.search(r"(\d+) revisions applied", demo["summary"])
    assert found and int(found.group(1)) == raised
    # The published nowcasts follow: some week's total as of a later date, and higher.
    seen: dict[str, list[tuple[str, int]]] = {}
    for e in demo["estimates"]:
        for p in (e["nowcast"] or {}).get(LAB_SERIES, []):
            if not seen.setdefault(p["period"], []) or seen[p["period"]][-1] != (p["as_of"], p["reported"]):
                seen[p["period"]].append((p["as_of"], p["reported"]))
    revised = [v for v in seen.values() if len({a for a, _ in v}) > 1 and v[-1][1] > v[0][1]]
    assert revised
    for v in seen.values():
        assert [a for a, _ in v] == sorted(a for a, _ in v)  # as-of dates only move forward


def test_the_final_nowcast_of_the_latest_week_expects_more(demo):
    last = demo["estimates"][-1]
    periods = last["nowcast"][LAB_SERIES]
    assert periods, "the final estimate carries no lab nowcast"
    newest = max(periods, key=lambda p: parse_period(p["period"]))
    sent = [m for m in _lab(demo["messages"]) if m["period"] == newest["period"]]
    assert newest["reported"] == sent[-1]["counts"][LAB_SERIES] and newest["as_of"] == sent[-1]["as_of"]
    # Bug caught: a partial count taken as final (nothing pending, eventual = reported), or an
    # eventual count below what is already reported.
    assert newest["share_pending"] > 0
    assert newest["eventual"]["mean"] >= newest["reported"]
    assert newest["eventual"]["quantiles"]["0.05"] >= newest["reported"]
    # The newest week was first reported the day after it ended: much is still to come.
    assert newest["eventual"]["mean"] > newest["reported"]


def test_summary_sets_the_lab_nowcast_beside_the_hidden_truth(demo):
    last = demo["estimates"][-1]
    rows = {}
    for line in demo["summary"].splitlines():
        cells = line.split()
        if cells and re.fullmatch(r"\d{4}-W\d{2}", cells[0]):
            rows[cells[0]] = cells
    periods = last["nowcast"][LAB_SERIES]
    # Bug caught: the summary leaving weeks out or reading another estimate's nowcast.
    assert sorted(rows) == sorted(p["period"] for p in periods)
    for p in periods:
        week, as_of, reported, pending, mean, interval, truth, covered = rows[p["period"]]
        assert (as_of, int(reported)) == (p["as_of"], p["reported"])
        assert float(mean) == pytest.approx(p["eventual"]["mean"], abs=0.05)
        # The hidden eventual count contains every report sent so far.
        assert int(truth) >= int(reported)
        lo, hi = (float(x) for x in interval.split("-"))
        assert covered == ("yes" if lo <= int(truth) <= hi else "no")
    assert "eventual counts inside the 90% interval" in demo["summary"]


def test_hidden_lab_reports_rise_to_the_eventual_count():
    # By construction (demo.simulate_lab): nothing is reported before a specimen is taken, totals only
    # rise, and every report is in by the delay's maximum after the week ends.
    truth_model = CompartmentalModel(load_model_spec(example_model_path(TRUTH_MODEL)))
    model = CompartmentalModel(load_model_spec(example_model_path(DEMO_MODEL)))
    truth = simulate_season(truth_model, 120, np.random.default_rng(7), params=TRUE_PARAMS)
    weeks = simulate_lab(model, truth, 120, np.random.default_rng([7, 1]))
    max_days = next(s for s in model.spec.series if s.name == LAB_SERIES).reporting_delay.max_days
    start = dt.date(2025, 9, 1)
    assert len(weeks) == 16 and sum(w.eventual for w in weeks) > 500
    first_share = []
    for w in weeks:
        assert (start + dt.timedelta(days=w.end)).weekday() == 6  # ISO weeks end on Sunday
        known = [w.known(d) for d in range(w.end - 7, w.end + max_days + 1)]
        # Bug caught: reports dated before their specimens, falling totals, vintages never reaching the count.
        assert known[0] == 0 and known == sorted(known) and known[-1] == w.eventual == int(w.arrivals.sum())
        sent = _lab_reports(weeks, w.end + 1, model.window_days)  # the Monday after the week
        if w.eventual:
            first_share.append(dict((x.period, t) for x, t in sent)[w.period] / w.eventual)
    # First reported low: on the Monday after the week, specimen days are 1 to 7 days old, and the
    # spec's delay distribution (true mean lab_delay, the spec's sd; filters.reporting_cdf) has
    # reported about 45 % of them (onsets spread evenly over the week; the shares vary with the
    # epidemic's slope, hence the tolerance).
    delay = next(s for s in model.spec.series if s.name == LAB_SERIES).reporting_delay
    cdf = reporting_cdf(delay.dist, TRUE_LAB["lab_delay"], delay.sd, delay.max_days)[0]
    expected = float(np.mean(cdf[1:8]))
    assert 0.3 < expected < 0.6
    assert np.mean(first_share) == pytest.approx(expected, abs=0.06)


def test_a_short_demo_does_not_offer_a_lab_backtest_it_cannot_score(tmp_path, capsys):
    # 30 days: the lab's first week (ends day 13) is not complete by its last report (day 28), so the
    # lab backtest would score nothing and exit 1. Bug caught: a printed next command that fails.
    assert cli.main(["demo", "--out", str(tmp_path), "--days", "30", "--particles", "50", "--quiet"]) == 0
    printed = capsys.readouterr().out
    assert "lab_history.csv --stream" not in printed and "casecloud backtest " in printed
    assert (tmp_path / "lab_history.csv").read_text().count("\n") > 1  # the vintages are still written


# ---------------------------------------------------------------- the newer feeds: positivity and wastewater
def _series_of(message: dict) -> set[str]:
    values = {k for k, v in message["counts"].items() if v is not None}
    return values | {k for k, v in (message.get("concentrations") or {}).items() if v is not None}


def test_the_feed_holds_positivity_and_wastewater_messages(demo):
    pos = [m for m in demo["messages"] if POS_SERIES in m["counts"]]
    ww = [m for m in demo["messages"] if WW_SERIES in (m.get("concentrations") or {})]
    # Bug caught: the newer feeds missing, positives without their tests, or mixed into another feed's message.
    assert len(pos) >= 20 and all(set(m["counts"]) == {POS_SERIES} and m["tests"][POS_SERIES] >= m["counts"][POS_SERIES]
                                  for m in pos)
    assert all(dt.date.fromisoformat(m["period"]).weekday() < 5 for m in pos)  # the lab reports on weekdays
    assert len(ww) >= 8 and all(m["counts"] == {} for m in ww)
    samples = [m["concentrations"][WW_SERIES] for m in ww]
    assert all(s["lod"] == WW_LOD and s["flow"] > 0 for s in samples)
    assert all(s["value"] is None or s["value"] >= WW_LOD for s in samples)
    assert any(s["value"] is None for s in samples) and any(s["value"] is not None for s in samples)


def test_each_estimate_carries_the_predictive_of_the_values_it_assimilated(demo):
    lines = (demo["out"] / "observations.ndjson").read_bytes().splitlines()
    seen_before: set[tuple[str, str]] = set()
    checked = 0
    for e in demo["estimates"]:
        message = orjson.loads(lines[e["source"]["offset"]])
        series = _series_of(message)
        predictive = e["predictive"]
        assert predictive is not None and set(predictive) <= series
        fresh = {s for s in series if (s, message["period"]) not in seen_before}
        # Bug caught: a series assimilated without its check, or a check for a value the step did not take.
        assert fresh <= set(predictive)
        seen_before |= {(s, message["period"]) for s in series}
        for name, p in predictive.items():
            assert p["period"] == message["period"] and set(p["quantiles"]) == set(e["quantities"]["R_eff"]["quantiles"])
            q = [p["quantiles"][k] for k in sorted(p["quantiles"], key=float)]
            assert q == sorted(q) and 0 <= p["pit"] <= 1
            if name == POS_SERIES:
                assert (p["observed"], p["tests"]) == (message["counts"][name], message["tests"][name])
                assert q[-1] <= p["tests"]
            elif name == WW_SERIES:
                sample = message["concentrations"][name]
                assert (p["observed"], p["lod"], p["flow"]) == (sample["value"], sample["lod"], sample["flow"])
                assert 0 < p["p_below_lod"] < 1
            else:
                assert p["observed"] == message["counts"][name]
            checked += 1
    assert checked > len(demo["estimates"])  # ED days carry two series
    # Estimates of earlier versions (no predictive) still validate: the field is optional.
    old = {k: v for k, v in demo["estimates"][-1].items() if k != "predictive"}
    assert EstimateMessage.model_validate(old).predictive is None


def test_the_summary_reports_the_predictive_check_the_estimates_hold(demo):
    # Recounted here from the published estimates: values inside the central 50 % (0.25..0.75) and
    # 90 % (0.05..0.95) predictive intervals, the mean PIT, samples below the limit apart.
    found: dict[str, list[dict]] = {}
    for e in demo["estimates"]:
        for name, p in (e.get("predictive") or {}).items():
            found.setdefault(name, []).append(p)
    rows = {}
    for line in demo["summary"].splitlines():
        cells = line.split()
        if cells and cells[0] in found:
            rows[cells[0]] = cells
    # Bug caught: figures in the summary that are not those of the published estimates (another
    # interval, censored samples counted as values).
    assert set(rows) == set(found) >= {"ed_child", "ed_adult", POS_SERIES, WW_SERIES, LAB_SERIES}
    for name, entries in found.items():
        seen = [p for p in entries if p["observed"] is not None]
        n = len(seen)
        in50 = sum(p["quantiles"]["0.25"] <= p["observed"] <= p["quantiles"]["0.75"] for p in seen)
        in90 = sum(p["quantiles"]["0.05"] <= p["observed"] <= p["quantiles"]["0.95"] for p in seen)
        pit = sum(p["pit"] for p in seen) / n
        assert rows[name][1:5] == [str(n), f"{100 * in50 / n:.0f}%", f"{100 * in90 / n:.0f}%", f"{pit:.2f}"]
        censored = len(entries) - n
        assert (rows[name][5] == "-") == (censored == 0)
        if censored:
            assert rows[name][5] == str(censored)
    assert predictive_check(demo["estimates"])[WW_SERIES]["censored"] == len(found[WW_SERIES]) - sum(
        p["observed"] is not None for p in found[WW_SERIES])


def test_hidden_positivity_and_wastewater_follow_the_epidemic():
    truth_model = CompartmentalModel(load_model_spec(example_model_path(TRUTH_MODEL)))
    model = CompartmentalModel(load_model_spec(example_model_path(DEMO_MODEL)))
    truth = simulate_season(truth_model, 120, np.random.default_rng(7), params=TRUE_PARAMS)
    sig = simulate_signals(model, truth, 120, np.random.default_rng([7, 2]))
    start = dt.date(2025, 9, 1)
    weekday = np.array([(start + dt.timedelta(days=d)).weekday() for d in range(121)])
    assert np.all(sig.tests[weekday >= 5] == 0) and np.all(sig.tests[1:][weekday[1:] < 5] > 0)
    assert np.all(sig.positives <= sig.tests)
    # Positives over tests against the true share: beta-binomial with phi = 200 around p; over the
    # ~86 report days the pooled share's sd is about sqrt(p (1 - p) / 200 / 86) ~ 0.003 (p ~ 0.1);
    # the tolerance is about 4 sd.
    assert sig.positives.sum() / sig.tests.sum() == pytest.approx((sig.share * sig.tests).sum() / sig.tests.sum(), abs=0.012)
    # The level is the true scale times the catchment times new infections convolved with the
    # shedding profile: rebuilt here with scipy's gamma (mean 6, sd 3 days, rounded to whole days,
    # truncated at 20 and renormalised) and numpy.convolve.
    s = truth.states.astype(np.int64)[:, :, 0].sum(axis=1)
    infections = np.concatenate([[0.0], s[:-1] - s[1:]])
    edges = np.concatenate([[0.0], np.arange(21) + 0.5])
    w = np.diff(stats.gamma.cdf(edges, (6.0 / 3.0) ** 2, scale=9.0 / 6.0))
    w /= w.sum()
    expected = TRUE_SIGNALS["ww_scale"] * 0.6 * np.convolve(infections, w)[:121]
    assert sig.level == pytest.approx(expected, rel=1e-9)
    days = [d for d, _, _ in sig.samples]
    assert {weekday[d] for d in days} == set(WW_WEEKDAYS)
    below = [v is None for _, v, _ in sig.samples]
    assert any(below[:6]) and not any(below[-10:])  # early samples below the limit, the peak well above it
