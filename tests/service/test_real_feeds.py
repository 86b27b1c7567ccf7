"""Real feeds into one stream: series sent separately, late values, revised totals, nowcasts.

The stream observes the shipped ``seir_two_band_lab`` example: daily ED visits per
age band (dated by report, final on arrival) and weekly lab positives by
specimen date (dated by event, revised upward as reports arrive; its
21-day reporting delay makes the assimilation window 21 days). Every case
names the plausible bug it would catch. What each kind of record gets:

==========================================  ==========================================
record                                      outcome
==========================================  ==========================================
second feed, same day, other series          applied (a second update, cloud stays)
value for a past day inside the window       applied, judged on each particle's path
value older than the window                  dead letter ``late``
same total again (any vintage)               skipped ``duplicate_period``
higher total with a later as-of              applied: the increment only
higher total with an older as-of             skipped ``stale_vintage``
other total with the same as-of              dead letter ``conflicting_vintage``
lower total with a later as-of               dead letter ``lower_total``
other total for a report-dated series        dead letter ``not_revisable``
as-of before the period / beyond today + 2   dead letter ``bad_as_of``
weekly period for a daily series, reverse    dead letter ``cadence``
a series named twice in one message          dead letter ``duplicate_series``
==========================================  ==========================================
"""

from __future__ import annotations

import asyncio
import datetime as dt
from pathlib import Path
from typing import Any

import orjson
import pytest
from prometheus_client import CollectorRegistry

from schemas import DeadLetter, DeploymentConfig, EstimateMessage
from service.runtime.app import Service
from service.runtime.metrics import Metrics
from service.transports import MemoryTransport

STREAM = "brackenford.district"
START = dt.date(2026, 1, 5)  # a Monday: model day 6 is Sunday 2026-01-11, the end of 2026-W02
TODAY = dt.date(2026, 4, 1)


def day(d: int) -> str:
    return (START + dt.timedelta(days=d)).isoformat()


def week_ending(d: int) -> str:
    year, week, weekday = (START + dt.timedelta(days=d)).isocalendar()
    assert weekday == 7, "weekly periods end on a Sunday"
    return f"{year}-W{week:02d}"


def msg(period: str, counts: dict[str, Any], as_of: str | None = None) -> bytes:
    body: dict[str, Any] = {"stream": STREAM, "period": period, "counts": counts}
    if as_of is not None:
        body["as_of"] = as_of
    return orjson.dumps(body)


class Run:
    """A service over a memory transport; ``outcomes`` in input order."""

    def __init__(self, root: Path, records: list[bytes], **stream: Any) -> None:
        config = DeploymentConfig.model_validate(
            {
                "service": {"seed": 5, "checkpoint_dir": str(root / "checkpoints"), "keep_checkpoints": 100},
                "metrics": {"enabled": False},
                "streams": [
                    {
                        "id": STREAM,
                        "model": "seir_two_band_lab",
                        "start": START.isoformat(),
                        "particles": 300,
                        "forecast_trajectories": 20,
                        "forecast_horizon_days": 7,
                        **stream,
                    }
                ],
            }
        )
        self.transport = MemoryTransport(records)
        self.registry = CollectorRegistry()
        self.outcomes: list = []
        self.service = Service(
            config, self.transport, metrics=Metrics(registry=self.registry), today=lambda: TODAY,
            on_outcome=self.outcomes.append, pipeline=False,
        )
        self.counts = asyncio.run(self.service.run(until_exhausted=True))

    @property
    def runtime(self):
        return self.service.registry.runtimes[STREAM]

    def estimates(self) -> list[EstimateMessage]:
        return [EstimateMessage.model_validate(orjson.loads(r.value)) for r in self.transport.published["estimates"]]

    def letters(self) -> list[DeadLetter]:
        return [DeadLetter.model_validate(orjson.loads(r.value)) for r in self.transport.published["dead_letters"]]

    def reasons(self) -> list[str | None]:
        return [o.reason for o in self.outcomes]

    def sample(self, name: str, **labels: str) -> float | None:
        return self.registry.get_sample_value(name, labels)


def ed(d: int, child: int | None = None, adult: int | None = None) -> bytes:
    counts = {k: v for k, v in (("ed_child", child), ("ed_adult", adult)) if v is not None}
    return msg(day(d), counts)


def warm_up(days: int = 14) -> list[bytes]:
    return [ed(d, 3 + d % 4, 9 + d % 5) for d in range(1, days + 1)]


# ------------------------------------------------------------- several feeds
def test_two_feeds_for_the_same_day_are_both_assimilated(tmp_path):
    # Bug caught: order and duplicate checks per stream and period (the adult count
    # skipped as "duplicate_period" once the child count had moved the cloud to that day).
    records = [*warm_up(5), ed(6, child=4), ed(6, adult=11), ed(7, adult=12), ed(7, child=5)]
    run = Run(tmp_path, records)
    assert run.counts == {"applied": 9, "skipped": 0, "dead_letter": 0}
    est = run.estimates()
    assert [(e.day, e.cloud_day) for e in est[-4:]] == [(6, 6), (6, 6), (7, 7), (7, 7)]
    assert run.runtime.known["ed_adult"][6] == (11.0, None) and run.runtime.known["ed_child"][7] == (5.0, None)
    # the second feed of a day weighs the cloud without moving it: one propagation per day
    assert run.runtime.filter.time == 7 and run.runtime.filter.step_count == 9


def test_a_past_day_inside_the_window_is_weighed_without_rewinding(tmp_path):
    # Bug caught: a late value dead-lettered (or the cloud moved back and re-simulated).
    records = [*[ed(d, adult=9) for d in range(1, 15)], ed(10, child=6)]
    run = Run(tmp_path, records)
    assert run.counts == {"applied": 15, "skipped": 0, "dead_letter": 0}
    late = run.estimates()[-1]
    assert (late.period, late.day, late.cloud_day) == (day(10), 10, 14)
    assert late.log_evidence_increment is not None and late.distinct_paths is not None
    assert 1 <= late.distinct_paths <= 300
    assert run.runtime.filter.time == 14
    assert run.sample("casecloud_late_values_total", stream=STREAM) == 1.0
    assert run.sample("casecloud_distinct_paths", stream=STREAM) == late.distinct_paths


def test_a_value_older_than_the_window_is_late(tmp_path):
    # Bug caught: values beyond the retained history read as zeros from a too-short buffer.
    records = [*[ed(d, adult=9) for d in range(1, 31)], ed(8, child=6)]
    run = Run(tmp_path, records)
    assert run.reasons()[-1] == "late"
    (letter,) = run.letters()
    assert letter.reason == "late" and "22 days older" in letter.message and "21 days old" in letter.message
    assert orjson.loads(__import__("base64").b64decode(letter.original_base64)) == orjson.loads(records[-1])


# ------------------------------------------------------------------ revisions
def lab(d: int, total: int, as_of: int | None) -> bytes:
    return msg(week_ending(d), {"lab_confirmed": total}, None if as_of is None else day(as_of))


def test_revisions_add_only_their_increment_and_each_vintage_gets_its_outcome(tmp_path):
    # Bugs caught: a revision assimilated as a whole new count (double counting), a lower
    # total silently applied, an older vintage treated as new, a duplicate re-weighing.
    records = [
        *warm_up(14),
        lab(6, 4, 8),  # week ending day 6, known on day 8: first report
        lab(6, 9, 12),  # later and higher: increment 5
        lab(6, 9, 13),  # same total, later vintage: nothing new
        lab(6, 7, 10),  # older vintage than day 12
        lab(6, 11, 12),  # other total, same vintage
        lab(6, 8, 14),  # later but lower
        lab(13, 2, 14),  # the next week, first report
    ]
    run = Run(tmp_path, records)
    assert run.reasons()[14:] == [None, None, "duplicate_period", "stale_vintage", "conflicting_vintage", "lower_total", None]
    assert run.runtime.known["lab_confirmed"] == {6: (9.0, 12), 13: (2.0, 14)}
    assert run.sample("casecloud_revisions_total", stream=STREAM) == 1.0
    # the reporting delay's mean is a parameter with a prior: its posterior is published like the others
    assert "lab_delay" in run.estimates()[-1].quantities
    assert run.sample("casecloud_messages_skipped_total", stream=STREAM, reason="stale_vintage") == 1.0
    assert [letter.reason for letter in run.letters()] == ["conflicting_vintage", "lower_total"]
    assert "below the 9 already assimilated" in run.letters()[1].message


def test_report_dated_series_are_final_on_arrival(tmp_path):
    # Bug caught: a corrected ED count counted twice, or skipped without a trace.
    run = Run(tmp_path, [*warm_up(3), ed(3, child=40)])
    assert run.reasons()[-1] == "not_revisable"
    assert "dated_by = \"event\"" in run.letters()[0].message


@pytest.mark.parametrize(
    ("record", "reason"),
    [
        (lab(13, 3, 6), "bad_as_of"),  # known on day 6, before the week (days 7-13) began
        (msg(week_ending(13), {"lab_confirmed": 3}, (TODAY + dt.timedelta(days=3)).isoformat()), "bad_as_of"),
        (msg(week_ending(13), {"ed_child": 3}), "cadence"),  # a weekly period for a daily series
        (msg(day(13), {"lab_confirmed": 3}), "cadence"),  # and the reverse (a null of the other cadence is fine: see below)
        (b'{"stream":"brackenford.district","period":"' + day(13).encode() + b'","counts":{"ed_child":3,"ed_child":4}}', "duplicate_series"),
        (msg(day(13), {"ed_child": 3}, "2026-02-30"), "schema"),  # not a calendar date
    ],
)
def test_bad_records_of_real_feeds_are_dead_letters_that_leave_the_cloud_alone(tmp_path, record, reason):
    run = Run(tmp_path, [*warm_up(12), record])
    assert run.reasons()[-1] == reason
    assert run.runtime.filter.step_count == 12 and run.runtime.filter.time == 12
    (letter,) = run.letters()
    assert letter.reason == reason and __import__("base64").b64decode(letter.original_base64) == record


# ------------------------------------------------------------------- nowcasts
def test_estimates_carry_a_nowcast_of_eventual_lab_counts(tmp_path):
    # Bug caught: partial counts reported as if complete (eventual == reported while
    # reports are still expected), or a final count given a pending share.
    records = [*warm_up(20), lab(6, 5, 9), lab(13, 1, 15), lab(6, 7, None)]
    run = Run(tmp_path, records)
    assert run.counts["dead_letter"] == 0
    nowcast = run.estimates()[-1].nowcast
    assert nowcast is not None
    weeks = {p.period: p for p in nowcast["lab_confirmed"]}
    assert set(weeks) == {week_ending(6), week_ending(13)}
    final, partial = weeks[week_ending(6)], weeks[week_ending(13)]
    assert (final.reported, final.as_of, final.share_pending) == (7, None, 0.0)
    assert final.eventual.mean == 7.0 and set(final.eventual.quantiles.values()) == {7.0}
    assert (partial.reported, partial.as_of) == (1, day(15))
    assert 0.0 < partial.share_pending < 1.0
    assert partial.eventual.mean > partial.reported
    assert min(partial.eventual.quantiles.values()) >= partial.reported


def test_what_was_known_survives_a_restart(tmp_path):
    # Bug caught: the per-(series, period) totals kept in memory only, so a re-sent
    # report after a restart is assimilated a second time.
    records = [*warm_up(14), lab(6, 4, 8)]
    first = Run(tmp_path, records)
    assert first.counts["applied"] == 15
    # the same input topic, two more records: the restarted service resumes after offset 14
    again = Run(tmp_path, [*records, lab(6, 4, 8), lab(6, 6, 13)])
    assert again.reasons() == ["duplicate_period", None]
    assert again.runtime.known["lab_confirmed"] == {6: (6.0, 13)}


def test_alerts_say_which_day_the_cloud_stood_at(tmp_path):
    # Bug caught: an alert raised by a late value carrying only the late period, so a consumer
    # dates the alert weeks too early.
    records = [*warm_up(14), lab(6, 30, 14)]
    run = Run(tmp_path, records, alerts=[{"name": "busy", "series": "ed_adult", "threshold": 2, "horizon_days": 7}])
    alerts = [orjson.loads(r.value) for r in run.transport.published["alerts"]]
    assert alerts, "the low threshold raises an alert"
    by_step = {e.step: e.cloud_day for e in run.estimates()}
    assert all(a["cloud_day"] == by_step[a["step"]] for a in alerts)


def test_a_null_of_the_other_cadence_is_not_a_cadence_error(tmp_path):
    # Bug caught: a history row that lists every series (null where not reported) refused
    # because a weekly column is null on a daily row.
    run = Run(tmp_path, [*warm_up(3), msg(day(4), {"ed_child": 3, "ed_adult": 9, "lab_confirmed": None})])
    assert run.reasons()[-1] is None and run.counts["dead_letter"] == 0



# ------------------------------------------------------------- one-step-ahead predictive
def test_each_estimate_carries_the_predictive_of_its_values_and_a_revision_as_a_total(tmp_path):
    lab = [msg(week_ending(13), {"lab_confirmed": 20}, as_of=day(14)),
           msg(week_ending(13), {"lab_confirmed": 31}, as_of=day(16))]
    records = [*warm_up(14), lab[0], ed(15, 4, 10), ed(16, 5, 9), lab[1]]
    est = Run(tmp_path, records).estimates()
    # Bug caught: a value without its check, or a check of another series than the message's.
    assert [sorted(e.predictive) for e in est] == [["ed_adult", "ed_child"]] * 14 + [["lab_confirmed"]] + [
        ["ed_adult", "ed_child"]] * 2 + [["lab_confirmed"]]
    first, revised = est[14].predictive["lab_confirmed"], est[-1].predictive["lab_confirmed"]
    assert (first.period, first.as_of, first.observed) == (week_ending(13), day(14), 20.0)
    assert (revised.as_of, revised.observed) == (day(16), 31.0)
    # The revision is judged by its increment (11) but shown as a total: at least the 20 known before.
    assert min(revised.quantiles.values()) >= 20.0 and revised.mean > 20.0
    assert est[3].predictive["ed_child"].observed == float(3 + 4 % 4)


def test_a_stream_can_leave_the_predictive_out(tmp_path):
    est = Run(tmp_path, warm_up(3), publish_predictive=False).estimates()
    assert len(est) == 3 and all(e.predictive is None for e in est)
