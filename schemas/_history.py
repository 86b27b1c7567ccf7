"""Past surveillance counts in a CSV file: what calibration and backtests read.

The file has a header ``period,<series1>,<series2>,...`` and one row per
period. ``period`` is a day ``YYYY-MM-DD`` or an ISO week ``YYYY-Www`` (the
week ending on its Sunday); rows are strictly increasing in period. Counts
are whole numbers from 0 to 10^9, or empty when the series was not reported
that period (kept as ``None``: skipped, never read as zero).

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

__all__ = ["History", "load_history"]

_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_COUNT = re.compile(r"^[0-9]+$")


@dataclass(frozen=True)
class History:
    """Counts per period, in file order.

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

    def __len__(self) -> int:
        return len(self.periods)

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
    series = header[1:]
    if not series:
        raise SpecError(f"{source}:1: no series columns; allowed: 'period,<series1>,<series2>,...'")
    for col, name in enumerate(series, start=2):
        if not _NAME.match(name):
            raise SpecError(
                f"{source}:1: column {col} header {name!r} is not a series name; "
                "allowed: letters, digits and '_', not starting with a digit"
            )
        if allowed_series is not None and name not in allowed_series:
            raise SpecError(
                f"{source}:1: column {col} header {name!r} is not a series of the model; allowed: {sorted(allowed_series)}"
            )
        if name in series[: col - 2]:
            raise SpecError(f"{source}:1: column {col} header {name!r} is repeated; allowed: each series once")
    periods: list[str] = []
    dates: list[dt.date] = []
    values: list[dict[str, int | None]] = []
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
        if dates and date <= dates[-1]:
            raise SpecError(
                f"{source}:{line}: column 1 (period): {period!r} is not after the previous row's "
                f"{periods[-1]!r}; allowed: rows strictly increasing in period"
            )
        counts: dict[str, int | None] = {}
        for col, (name, cell) in enumerate(zip(series, row[1:]), start=2):
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
        periods.append(period)
        dates.append(date)
        values.append(counts)
    if not periods:
        raise SpecError(f"{source}: header only, no rows; allowed: at least one period")
    return History(periods=periods, dates=dates, series=series, values=values, source=source)
