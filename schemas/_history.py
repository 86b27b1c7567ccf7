"""Past surveillance counts in a CSV file: what calibration and backtests read.

The file has a header ``period,<series1>,<series2>,...`` and one row per
period. ``period`` is a day ``YYYY-MM-DD`` or an ISO week ``YYYY-Www`` (the
week ending on its Sunday); rows are strictly increasing in period, except that
a daily and a weekly row may end on the same Sunday (a stream with series of
both cadences; the two become one observation). Counts
are whole numbers from 0 to 10^9, or empty when the series was not reported
that period (kept as ``None``: skipped, never read as zero).

Data vintages
-------------
A second column headed ``as_of`` makes the file a record of what was known
when: ``period,as_of,<series1>,...``, one row per period and vintage. ``as_of``
is the date ``YYYY-MM-DD`` the row's counts are known as of (counts by event
date keep rising as reports arrive), or empty for a count that is final when
it arrives, which is then known on the period's last day (as every row of a
file without the column is). A row's *known date* is its ``as_of``, or the
period's last day when ``as_of`` is empty. Rules:

- rows are in increasing known date, and within one known date in strictly
  increasing period (so a file is read in the order it was learnt);
- ``as_of`` is not before the period's first day (the Monday of a week);
- one row per period and known date; a period's final row (empty ``as_of``),
  if any, is its last row;
- an empty count cell means "not given in this vintage", not zero.

Example (a daily report-dated ``ed`` series given once, a daily event-dated
``lab`` series revised as reports arrive)::

    period,as_of,ed,lab
    2026-02-01,2026-02-01,31,2
    2026-02-01,2026-02-02,,9
    2026-02-02,2026-02-02,28,3
    2026-02-01,2026-02-03,,12
    2026-02-02,2026-02-03,,8
    2026-02-03,2026-02-03,35,1

The eventual count of a period and series is its value in the period's last
row that gives it (here 12 for ``lab`` on 2026-02-01). :attr:`History.periods`,
``dates`` and ``values`` hold one row per period with those eventual counts,
so calibration (``casecloud calibrate``), which fits final counts, reads the
last vintage of each period; :attr:`History.vintages` keeps every row for
backtests in real time (``casecloud backtest``).

This module knows nothing of the filter: :meth:`History.by_day` returns plain
``(model day, counts)`` pairs that the numerical core turns into
observations (``filters.history_observations``).
"""

from __future__ import annotations

import csv
import datetime as dt
import re
from dataclasses import dataclass
from pathlib import Path

from ._errors import SpecError
from ._messages import MAX_COUNT, parse_period

__all__ = ["History", "Vintage", "load_history"]

_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_COUNT = re.compile(r"^[0-9]+$")
_DATE = re.compile(r"^[0-9]{4}-[0-9]{2}-[0-9]{2}$")
AS_OF = "as_of"


@dataclass(frozen=True)
class Vintage:
    """One row of a history with an ``as_of`` column: a period's counts as known on one date.

    line : the row's line in the file.
    period : the period text as written; date : the last day it covers.
    as_of : the date the counts are known as of; None for a final count.
    counts : series name -> count, or None where the cell was empty (not given in this vintage).
    """

    line: int
    period: str
    date: dt.date
    as_of: dt.date | None
    counts: dict[str, int | None]

    @property
    def known(self) -> dt.date:
        """The date the row is learnt: its as-of date, or the period's last day for a final count."""
        return self.as_of if self.as_of is not None else self.date


@dataclass(frozen=True)
class History:
    """Counts per period, in file order (with vintages: in period order, eventual counts).

    periods : the period text of each row as written.
    dates : the last day each period covers (the date, or the Sunday of the ISO week).
    series : series names from the header, in column order.
    values : per row, series name -> count, or None where the cell was empty.
    source : the file the history was read from.
    """

    periods: list[str]
    dates: list[dt.date]
    series: list[str]
    values: list[dict[str, int | None]]
    source: str = ""
    vintages: list[Vintage] | None = None  # every row, in file order, when the file has an as_of column

    def __len__(self) -> int:
        return len(self.periods)

    def as_known(self, when: dt.date) -> list[dict[str, int | None]]:
        """Per period (in :attr:`periods` order), the counts known as of ``when``.

        Each series' value in the period's latest row known by ``when`` that
        gives it (None: not given yet). Without vintages, a period's counts
        are known from its last day on.
        """
        if self.vintages is None:
            return [dict(v) if d <= when else {k: None for k in self.series} for d, v in zip(self.dates, self.values)]
        index = {p: i for i, p in enumerate(self.periods)}
        out: list[dict[str, int | None]] = [{k: None for k in self.series} for _ in self.periods]
        for v in self.vintages:
            if v.known > when:
                break  # rows are in known-date order
            row = out[index[v.period]]
            for k, x in v.counts.items():
                if x is not None:
                    row[k] = x
        return out

    def by_day(self, start: dt.date) -> list[tuple[int, dict[str, int | None]]]:
        """(model day, counts) per row, model day = (date - start).days.

        Raises SpecError if a row falls on or before ``start`` (model day 0 is
        the initial state; the first observation must come after it).
        """
        out = []
        for period, date, counts in zip(self.periods, self.dates, self.values):
            day = (date - start).days
            if day <= 0:
                raise SpecError(
                    f"{self.source or 'history'}: period {period!r} (ends {date.isoformat()}) is not after the "
                    f"model start {start.isoformat()}; allowed: periods ending after the start date"
                )
            if out and out[-1][0] == day:
                # a daily and a weekly row ending on the same day: one observation of both
                merged = out[-1][1]
                for name, value in counts.items():
                    if value is not None:
                        merged[name] = value
                continue
            out.append((day, dict(counts)))
        return out


def load_history(path: str | Path, allowed_series: list[str] | None = None) -> History:
    """Read a history CSV (see the module docstring); raise SpecError on any problem.

    ``allowed_series``, if given, lists the series the model observes: a
    header naming another series is an error.
    """
    path = Path(path)
    source = str(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise SpecError(f"{source}: cannot read history file: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise SpecError(f"{source}: not UTF-8 text; allowed: a UTF-8 CSV file") from None
    rows = list(csv.reader(text.splitlines()))
    if not rows or not any(cell.strip() for cell in rows[0]):
        raise SpecError(f"{source}:1: empty file; allowed: a header 'period,<series1>,<series2>,...' and rows")
    header = [cell.strip() for cell in rows[0]]
    if header[0] != "period":
        raise SpecError(f"{source}:1: column 1 header {header[0]!r} is not 'period'; allowed: 'period' first")
    vintaged = len(header) > 1 and header[1] == AS_OF
    first = 3 if vintaged else 2  # column number of the first series
    series = header[first - 1 :]
    if not series:
        shape = "'period,as_of,<series1>,<series2>,...'" if vintaged else "'period,<series1>,<series2>,...'"
        raise SpecError(f"{source}:1: no series columns; allowed: {shape}")
    for col, name in enumerate(series, start=first):
        if name == AS_OF:
            raise SpecError(
                f"{source}:1: column {col} header 'as_of' is not a series; allowed: 'as_of' as column 2 only "
                "('period,as_of,<series1>,...' for data vintages)"
            )
        if not _NAME.match(name):
            raise SpecError(
                f"{source}:1: column {col} header {name!r} is not a series name; "
                "allowed: letters, digits and '_', not starting with a digit"
            )
        if allowed_series is not None and name not in allowed_series:
            raise SpecError(
                f"{source}:1: column {col} header {name!r} is not a series of the model; allowed: {sorted(allowed_series)}"
            )
        if name in series[: col - first]:
            raise SpecError(f"{source}:1: column {col} header {name!r} is repeated; allowed: each series once")
    periods: list[str] = []
    dates: list[dt.date] = []
    values: list[dict[str, int | None]] = []
    vintages: list[Vintage] = []
    last_of: dict[dt.date, Vintage] = {}  # the latest row of each period so far
    for line, row in enumerate(rows[1:], start=2):
        if not row or all(not cell.strip() for cell in row):
            continue  # blank line
        if len(row) != len(header):
            raise SpecError(
                f"{source}:{line}: {len(row)} columns; allowed: {len(header)} (as in the header {','.join(header)})"
            )
        period = row[0].strip()
        try:
            date = parse_period(period)
        except ValueError as exc:
            raise SpecError(f"{source}:{line}: column 1 (period): {exc}") from None
        mixed = bool(dates) and date == dates[-1] and ("W" in period) != ("W" in periods[-1])
        if not vintaged and dates and date <= dates[-1] and not mixed:
            raise SpecError(
                f"{source}:{line}: column 1 (period): {period!r} is not after the previous row's "
                f"{periods[-1]!r}; allowed: rows strictly increasing in period (a daily and a weekly row may share a Sunday)"
            )
        counts: dict[str, int | None] = {}
        for col, (name, cell) in enumerate(zip(series, row[first - 1 :]), start=first):
            cell = cell.strip()
            if cell == "":
                counts[name] = None
                continue
            if not _COUNT.match(cell) or int(cell) > MAX_COUNT:
                raise SpecError(
                    f"{source}:{line}: column {col} ({name}): count {cell!r}; allowed: a whole number "
                    f"from 0 to {MAX_COUNT}, or empty for not reported"
                )
            counts[name] = int(cell)
        if vintaged:
            vintage = Vintage(line, period, date, _as_of(source, line, row[1].strip(), period, date), counts)
            _check_order(source, vintage, vintages[-1] if vintages else None, last_of)
            vintages.append(vintage)
            continue
        periods.append(period)
        dates.append(date)
        values.append(counts)
    if vintaged:
        if not vintages:
            raise SpecError(f"{source}: header only, no rows; allowed: at least one period")
        return _from_vintages(source, series, vintages)
    if not periods:
        raise SpecError(f"{source}: header only, no rows; allowed: at least one period")
    return History(periods=periods, dates=dates, series=series, values=values, source=source)


_ORDER = (
    "rows in increasing as-of date (an empty as_of counts as the period's last day), "
    "and within one as-of date in strictly increasing period"
)


def _as_of(source: str, line: int, cell: str, period: str, date: dt.date) -> dt.date | None:
    if cell == "":
        return None
    where = f"{source}:{line}: column 2 (as_of)"
    try:
        if not _DATE.match(cell):
            raise ValueError
        as_of = dt.date.fromisoformat(cell)
    except ValueError:
        raise SpecError(f"{where}: {cell!r} is not a date; allowed: a calendar date YYYY-MM-DD, or empty for a final count") from None
    begins = date - dt.timedelta(days=6) if "W" in period else date
    if as_of < begins:
        raise SpecError(
            f"{where}: {cell} is before period {period!r} begins ({begins.isoformat()}); "
            "allowed: an as-of date on or after the period's first day"
        )
    return as_of


def _check_order(source: str, v: Vintage, prev: Vintage | None, last_of: dict[dt.date, Vintage]) -> None:
    """Row ``v`` against the previous row and the previous row of its period (the module docstring's rules)."""
    shown = lambda x: x.as_of.isoformat() if x.as_of is not None else f"final, known {x.date.isoformat()}"
    if prev is not None:
        if v.known < prev.known:
            raise SpecError(
                f"{source}:{v.line}: column 2 (as_of): {shown(v)} is before the previous row's {shown(prev)}; allowed: {_ORDER}"
            )
        if v.known == prev.known and v.date == prev.date:
            raise SpecError(
                f"{source}:{v.line}: column 2 (as_of): period {v.period!r} has two rows known on {v.known.isoformat()} "
                f"(lines {prev.line} and {v.line}); allowed: one row per period and as-of date"
            )
        if v.known == prev.known and v.date < prev.date:
            raise SpecError(
                f"{source}:{v.line}: column 1 (period): {v.period!r} is not after the previous row's {prev.period!r} "
                f"known on the same date {v.known.isoformat()}; allowed: {_ORDER}"
            )
    earlier = last_of.get(v.date)
    if earlier is not None and earlier.period != v.period:
        raise SpecError(
            f"{source}:{v.line}: column 1 (period): {v.period!r} ends on {v.date.isoformat()} like {earlier.period!r} "
            f"(line {earlier.line}); allowed: one period per end date"
        )
    if earlier is not None and earlier.as_of is None:
        raise SpecError(
            f"{source}:{v.line}: column 2 (as_of): period {v.period!r} already has a final row (empty as_of, "
            f"line {earlier.line}); allowed: a period's final row last"
        )
    last_of[v.date] = v


def _from_vintages(source: str, series: list[str], vintages: list[Vintage]) -> History:
    """One row per period (in period order) holding each series' eventual count: its last value given."""
    eventual: dict[dt.date, tuple[str, dict[str, int | None]]] = {}
    for v in vintages:
        _, counts = eventual.setdefault(v.date, (v.period, {name: None for name in series}))
        for name, x in v.counts.items():
            if x is not None:
                counts[name] = x
    dates = sorted(eventual)
    return History(
        periods=[eventual[d][0] for d in dates],
        dates=dates,
        series=series,
        values=[eventual[d][1] for d in dates],
        source=source,
        vintages=vintages,
    )
