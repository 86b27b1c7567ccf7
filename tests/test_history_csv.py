"""The history CSV reader (schemas.load_history): what calibration and backtests read."""

from __future__ import annotations

import datetime as dt

import pytest

from filters import Observation, history_observations
from schemas import History, SpecError, load_history


def write(tmp_path, text: str):
    path = tmp_path / "counts.csv"
    path.write_text(text)
    return path


def test_good_file_with_dates_and_a_missing_value(tmp_path):
    path = write(tmp_path, "period,ed_child,ed_adult\n2025-10-01,3,7\n2025-10-02,,9\n2025-10-04,0,12\n")
    h = load_history(path)
    assert isinstance(h, History)
    assert h.series == ["ed_child", "ed_adult"]
    assert h.periods == ["2025-10-01", "2025-10-02", "2025-10-04"]
    assert h.dates == [dt.date(2025, 10, 1), dt.date(2025, 10, 2), dt.date(2025, 10, 4)]
    assert h.values[1] == {"ed_child": None, "ed_adult": 9}  # empty = missing, not zero
    assert h.values[2]["ed_child"] == 0
    assert h.by_day(dt.date(2025, 9, 30)) == [
        (1, {"ed_child": 3, "ed_adult": 7}),
        (2, {"ed_child": None, "ed_adult": 9}),
        (4, {"ed_child": 0, "ed_adult": 12}),
    ]
    obs = history_observations(h, dt.date(2025, 9, 30))
    assert obs[1] == Observation(2, {"ed_child": None, "ed_adult": 9.0})


def test_iso_weeks_end_on_sunday(tmp_path):
    h = load_history(write(tmp_path, "period,cases\n2025-W41,10\n2025-W42,12\n"))
    # ISO 8601: week 41 of 2025 runs Monday 6 to Sunday 12 October 2025.
    assert h.dates == [dt.date(2025, 10, 12), dt.date(2025, 10, 19)]


@pytest.mark.parametrize(
    "text, where, allowed",
    [
        ("period,cases\n2025-10-01,3\n2025-10-02,-4\n", ":3: column 2 (cases)", "whole number"),
        ("period,cases\n2025-10-01,abc\n", ":2: column 2 (cases)", "or empty for not reported"),
        ("period,cases\n2025-10-02,3\n2025-10-02,4\n", ":3: column 1 (period)", "strictly increasing"),
        ("period,cases\n2025-10-02,3\n2025-10-01,4\n", ":3: column 1 (period)", "strictly increasing"),
        ("period,cases\n2025-02-30,3\n", ":2: column 1 (period)", "YYYY-MM-DD"),
        ("day,cases\n2025-10-01,3\n", ":1: column 1 header 'day'", "'period' first"),
        ("period,cases\n2025-10-01,3,4\n", ":2: 3 columns", "allowed: 2"),
        ("period,cases,cases\n2025-10-01,3,4\n", ":1: column 3 header 'cases' is repeated", "each series once"),
        ("period,1bad\n2025-10-01,3\n", ":1: column 2 header '1bad'", "letters, digits"),
    ],
)
def test_errors_name_file_line_column_and_what_is_allowed(tmp_path, text, where, allowed):
    path = write(tmp_path, text)
    with pytest.raises(SpecError) as info:
        load_history(path)
    message = str(info.value)
    assert message.startswith(str(path))
    assert where in message
    assert allowed in message


def test_unknown_series_header_against_the_model(tmp_path):
    path = write(tmp_path, "period,cases,deaths\n2025-10-01,3,0\n")
    with pytest.raises(SpecError, match=r":1: column 3 header 'deaths' is not a series of the model; allowed: \['cases'\]"):
        load_history(path, allowed_series=["cases"])


def test_period_not_after_start_is_refused(tmp_path):
    h = load_history(write(tmp_path, "period,cases\n2025-10-01,3\n"))
    with pytest.raises(SpecError, match="not after the model start 2025-10-01"):
        h.by_day(dt.date(2025, 10, 1))


def test_header_only_and_missing_file(tmp_path):
    with pytest.raises(SpecError, match="no rows"):
        load_history(write(tmp_path, "period,cases\n"))
    with pytest.raises(SpecError, match="cannot read"):
        load_history(tmp_path / "nope.csv")


def test_daily_and_weekly_rows_may_share_a_sunday_and_become_one_observation(tmp_path):
    # A stream with ED visits by day and lab positives by week. Bugs caught: such a file refused
    # (the two rows end on the same day), or the Sunday kept as two observations of one day
    # (the filter cannot step to the same day twice).
    path = write(tmp_path, "period,ed,lab\n2025-10-04,3,\n2025-10-05,4,\n2025-W40,,17\n2025-10-06,5,\n")
    h = load_history(path)
    assert h.periods == ["2025-10-04", "2025-10-05", "2025-W40", "2025-10-06"]
    assert h.by_day(dt.date(2025, 10, 1)) == [
        (3, {"ed": 3, "lab": None}),
        (4, {"ed": 4, "lab": 17}),
        (5, {"ed": 5, "lab": None}),
    ]
    # two daily rows of one day are still refused
    with pytest.raises(SpecError, match="strictly increasing"):
        load_history(write(tmp_path, "period,ed,lab\n2025-10-05,4,\n2025-10-05,5,\n"))
