"""History CSVs with data vintages (an ``as_of`` column): what backtests in real time and calibration read."""

from __future__ import annotations

import datetime as dt

import pytest

from filters import history_observations
from schemas import SpecError, load_history

EXAMPLE = """period,as_of,ed,lab
2026-02-01,2026-02-01,31,2
2026-02-01,2026-02-02,,9
2026-02-02,2026-02-02,28,3
2026-02-01,2026-02-03,,12
2026-02-02,2026-02-03,,8
2026-02-03,2026-02-03,35,1
"""


def write(tmp_path, text: str):
    path = tmp_path / "vintages.csv"
    path.write_text(text)
    return path


def test_the_documented_example_keeps_every_row_and_reads_eventual_counts(tmp_path):
    """The module docstring's example: every row kept in file order; one row per period holding each
    series' last given value (the eventual count); what was known on a given date. Bugs caught: a later
    empty cell read as zero or as "unchanged" wrongly, the eventual count taken from the first vintage."""
    h = load_history(write(tmp_path, EXAMPLE))
    assert h.series == ["ed", "lab"]
    assert h.periods == ["2026-02-01", "2026-02-02", "2026-02-03"]
    assert h.values == [{"ed": 31, "lab": 12}, {"ed": 28, "lab": 8}, {"ed": 35, "lab": 1}]
    assert [(v.line, v.period, v.as_of.isoformat(), v.counts) for v in h.vintages][:2] == [
        (2, "2026-02-01", "2026-02-01", {"ed": 31, "lab": 2}),
        (3, "2026-02-01", "2026-02-02", {"ed": None, "lab": 9}),
    ]
    assert h.as_known(dt.date(2026, 2, 2)) == [{"ed": 31, "lab": 9}, {"ed": 28, "lab": 3}, {"ed": None, "lab": None}]
    assert h.as_known(dt.date(2026, 1, 31)) == [{"ed": None, "lab": None}] * 3
    assert h.as_known(dt.date(2026, 3, 1)) == h.values


def test_calibration_reads_the_last_vintage_of_each_period(tmp_path):
    """``casecloud calibrate`` fits final counts: with vintages it reads each period's eventual count
    (history_observations goes through History.by_day). Bug caught: calibration fed the first, partial
    vintage (lab 2 instead of 12 on 2026-02-01)."""
    h = load_history(write(tmp_path, EXAMPLE))
    obs = history_observations(h, dt.date(2026, 1, 31))
    assert [(o.time, o.values) for o in obs] == [
        (1, {"ed": 31.0, "lab": 12.0}),
        (2, {"ed": 28.0, "lab": 8.0}),
        (3, {"ed": 35.0, "lab": 1.0}),
    ]


def test_final_rows_and_weeks(tmp_path):
    """An empty as_of is a final count, known on the period's last day (as every row of a file without
    the column); it may follow vintages of its period dated up to that day, e.g. a week's as_of inside
    the week (from its Monday on). A dated vintage after the final row is refused (see the errors)."""
    text = "period,as_of,lab\n2026-W06,2026-02-04,3\n2026-W06,,12\n2026-W07,2026-02-15,1\n2026-W07,2026-02-16,4\n"
    h = load_history(write(tmp_path, text))
    assert h.periods == ["2026-W06", "2026-W07"] and h.dates == [dt.date(2026, 2, 8), dt.date(2026, 2, 15)]
    assert h.values == [{"lab": 12}, {"lab": 4}]
    assert [v.known.isoformat() for v in h.vintages] == ["2026-02-04", "2026-02-08", "2026-02-15", "2026-02-16"]
    assert h.vintages[1].as_of is None and h.vintages[2].as_of == dt.date(2026, 2, 15)


def test_without_the_column_nothing_changes(tmp_path):
    """A file without as_of is read as before: no vintages, one row per period."""
    h = load_history(write(tmp_path, "period,cases\n2025-10-01,3\n2025-10-02,5\n"))
    assert h.vintages is None and h.values == [{"cases": 3}, {"cases": 5}]
    assert h.as_known(dt.date(2025, 10, 1)) == [{"cases": 3}, {"cases": None}]


@pytest.mark.parametrize(
    "text, where, allowed",
    [
        ("period,as_of,lab\n2026-02-01,02/03/2026,3\n", ":2: column 2 (as_of): '02/03/2026' is not a date", "YYYY-MM-DD, or empty"),
        ("period,as_of,lab\n2026-02-01,2026-02-30,3\n", ":2: column 2 (as_of)", "a calendar date YYYY-MM-DD"),
        ("period,as_of,lab\n2026-02-05,2026-02-04,3\n", ":2: column 2 (as_of): 2026-02-04 is before period '2026-02-05' begins", "on or after the period's first day"),
        ("period,as_of,lab\n2026-W06,2026-02-01,3\n", ":2: column 2 (as_of): 2026-02-01 is before period '2026-W06' begins (2026-02-02)", "first day"),
        ("period,as_of,lab\n2026-02-01,2026-02-03,3\n2026-02-02,2026-02-02,4\n", ":3: column 2 (as_of): 2026-02-02 is before the previous row's 2026-02-03", "increasing as-of date"),
        ("period,as_of,lab\n2026-02-02,2026-02-03,3\n2026-02-01,2026-02-03,4\n", ":3: column 1 (period): '2026-02-01' is not after the previous row's '2026-02-02'", "strictly increasing period"),
        ("period,as_of,lab\n2026-02-01,2026-02-03,3\n2026-02-01,2026-02-03,4\n", ":3: column 2 (as_of): period '2026-02-01' has two rows known on 2026-02-03 (lines 2 and 3)", "one row per period and as-of date"),
        ("period,as_of,lab\n2026-02-01,2026-02-01,3\n2026-02-01,,4\n", ":3: column 2 (as_of): period '2026-02-01' has two rows known on 2026-02-01", "one row per period"),
        ("period,as_of,lab\n2026-02-01,,3\n2026-02-01,2026-02-04,4\n", ":3: column 2 (as_of): period '2026-02-01' already has a final row (empty as_of, line 2)", "final row last"),
        ("period,as_of,lab\n2026-02-08,2026-02-08,3\n2026-W06,2026-02-09,4\n", ":3: column 1 (period): '2026-W06' ends on 2026-02-08 like '2026-02-08' (line 2)", "one period per end date"),
        ("period,lab,as_of\n2026-02-01,3,2026-02-01\n", ":1: column 3 header 'as_of' is not a series", "'as_of' as column 2 only"),
        ("period,as_of\n2026-02-01,2026-02-01\n", ":1: no series columns", "'period,as_of,<series1>"),
        ("period,as_of,lab\n2026-02-01,2026-02-01,-1\n", ":2: column 3 (lab): count '-1'", "whole number"),
        ("period,as_of,lab\n", ": header only, no rows", "at least one period"),
    ],
)
def test_errors_name_file_line_column_and_what_is_allowed(tmp_path, text, where, allowed):
    """Each refusal says what was given, what is allowed and where (file:line: column)."""
    path = write(tmp_path, text)
    with pytest.raises(SpecError) as info:
        load_history(path)
    message = str(info.value)
    assert message.startswith(str(path)), message
    assert where in message, message
    assert allowed in message, message


@pytest.mark.parametrize("command, says", [("calibrate", "last vintage of each period is read as its final count"),
                                           ("backtest", "replayed as known on each as-of date")])  # fmt: skip
def test_help_says_what_each_command_does_with_vintages(command, says, capsys):
    """calibrate fits final counts (the last vintage); backtest replays the vintages. Bug caught: a user
    handing calibrate a vintage file without being told which counts it fits."""
    from service.cli import main

    with pytest.raises(SystemExit) as info:
        main([command, "--help"])
    assert info.value.code == 0
    assert says in " ".join(capsys.readouterr().out.split())
