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

Positivity and concentration series
------------------------------------
Besides counts, a column can hold the positives of a positivity series or the
samples of a concentration series (e.g. wastewater), with extra columns named
``<series>.<what>`` beside it:

- ``<series>.tests``: the number of tests behind the positives in ``<series>``
  (a whole number from 1 to 10^9, at least the positives). A row that gives
  positives gives its tests, and tests are given only with positives.
- ``<series>.lod`` and ``<series>.flow`` (each optional): the laboratory's
  limit of detection and the sample's flow, decimals > 0. The series' column
  then holds a decimal >= 0 (``1.5e4`` allowed), or ``nd`` for "not
  detected". As in an observation message, ``nd`` or a value of 0 needs the
  limit of detection on its row (only "below the limit" is known; it is kept
  as 0.0 with its limit), and a limit or flow is given only with a value.

Counts (and positives) stay whole numbers. A decimal, ``nd``, or a whole
number above 10^9 in a column without ``.lod``/``.flow`` columns is read as a
concentration; whether each column's kind matches the model is checked where
the history meets the model (:meth:`History.check_kinds`, called by
``casecloud calibrate`` and ``casecloud backtest``), since this module knows
nothing of the spec. Example (``ed`` a count, ``lab_pos`` a positivity series,
``ww_east`` a concentration series)::

    period,ed,lab_pos,lab_pos.tests,ww_east,ww_east.lod
    2026-02-01,31,12,240,1830.5,50
    2026-02-02,28,9,198,nd,50
    2026-02-03,35,,,2210,

This module knows nothing of the filter: :meth:`History.by_day` returns plain
``(model day, counts)`` pairs, and :meth:`History.by_day_detailed` adds the
tests, limits and flows, that the numerical core turns into observations
(``filters.history_observations``).
"""

from __future__ import annotations

import csv
import datetime as dt
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ._errors import SpecError
from ._messages import MAX_COUNT, parse_period

__all__ = ["History", "Vintage", "load_history", "message_fields"]

_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_COUNT = re.compile(r"^[0-9]+$")
_DECIMAL = re.compile(r"^([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?$")
NOT_DETECTED = "nd"
EXTRAS = ("tests", "lod", "flow")  # the <series>.<what> columns
_COUNT_KINDS = ("incidence", "prevalence")
_DATE = re.compile(r"^[0-9]{4}-[0-9]{2}-[0-9]{2}$")
AS_OF = "as_of"


@dataclass(frozen=True)
class Vintage:
    """One row of a history with an ``as_of`` column: a period's counts as known on one date.

    line : the row's line in the file.
    period : the period text as written; date : the last day it covers.
    as_of : the date the counts are known as of; None for a final count.
    counts : series name -> count (a float for a concentration; 0.0 for ``nd``), or None where
        the cell was empty (not given in this vintage).
    tests, limits, flows : series name -> the row's ``<series>.tests``, ``.lod`` and ``.flow``
        (series with such a column only; None where empty).
    """

    line: int
    period: str
    date: dt.date
    as_of: dt.date | None
    counts: dict[str, Any]
    tests: dict[str, int | None] = field(default_factory=dict)
    limits: dict[str, float | None] = field(default_factory=dict)
    flows: dict[str, float | None] = field(default_factory=dict)

    @property
    def known(self) -> dt.date:
        """The date the row is learnt: its as-of date, or the period's last day for a final count."""
        return self.as_of if self.as_of is not None else self.date


@dataclass(frozen=True)
class History:
    """Counts per period, in file order (with vintages: in period order, eventual counts).

    periods : the period text of each row as written.
    dates : the last day each period covers (the date, or the Sunday of the ISO week).
    series : series names from the header, in column order (``<series>.<what>`` columns excluded).
    values : per row, series name -> count (int), concentration (float; 0.0 for ``nd``, below
        the row's limit), or None where the cell was empty.
    source : the file the history was read from.
    tests, limits, flows : per row, series name -> the ``<series>.tests`` / ``.lod`` / ``.flow``
        cell (series with such a column only; None where empty); empty lists for a file without them.
    extras : series name -> the ``<series>.<what>`` columns it has (e.g. ``("tests",)``).
    measured : series name -> where its first cell that is not a whole count is
        (``"line 3, column 4: '2.5'"``): a concentration by its shape.
    """

    periods: list[str]
    dates: list[dt.date]
    series: list[str]
    values: list[dict[str, Any]]
    source: str = ""
    vintages: list[Vintage] | None = None  # every row, in file order, when the file has an as_of column
    tests: list[dict[str, int | None]] = field(default_factory=list)
    limits: list[dict[str, float | None]] = field(default_factory=list)
    flows: list[dict[str, float | None]] = field(default_factory=list)
    extras: dict[str, tuple[str, ...]] = field(default_factory=dict)
    measured: dict[str, str] = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.periods)

    def details(self, i: int) -> tuple[dict[str, int | None], dict[str, float | None], dict[str, float | None]]:
        """(tests, limits, flows) of row ``i`` (empty dicts when the file has no such columns)."""
        pick = lambda rows: dict(rows[i]) if rows else {}
        return pick(self.tests), pick(self.limits), pick(self.flows)

    def check_kinds(self, kinds: Mapping[str, str], model: str = "the model") -> None:
        """Check each column against its series' kind in the model (``kinds``: series name ->
        ``"incidence"``, ``"prevalence"``, ``"positivity"`` or ``"concentration"``); series the
        model does not name are left alone. Raises SpecError naming the column and what is allowed.

        A positivity series needs its ``.tests`` column, and only it may have one; only a
        concentration series may have ``.lod``/``.flow`` columns or decimal, ``nd`` or
        above-10^9 cells.
        """
        where = self.source or "history"
        for name in self.series:
            kind = kinds.get(name)
            if kind is None:
                continue
            extras = self.extras.get(name, ())
            if kind == "positivity" and "tests" not in extras:
                raise SpecError(
                    f"{where}:1: column {name!r} is positivity series {name!r} of {model}: positives out of tests; "
                    f"allowed: a column '{name}.tests' beside it with the number of tests of each row"
                )
            if kind != "positivity" and "tests" in extras:
                raise SpecError(
                    f"{where}:1: column '{name}.tests': series {name!r} of {model} has kind {kind!r}, not a positivity "
                    "series; allowed: a .tests column for positivity series only"
                )
            if kind != "concentration":
                wrong = [e for e in extras if e != "tests"]
                if wrong:
                    raise SpecError(
                        f"{where}:1: column '{name}.{wrong[0]}': series {name!r} of {model} has kind {kind!r}, not a "
                        "concentration series; allowed: .lod and .flow columns for concentration series only"
                    )
                if name in self.measured:
                    raise SpecError(
                        f"{where}: {self.measured[name]} in column {name!r}: series {name!r} of {model} has kind "
                        f"{kind!r}, a count; allowed: a whole number from 0 to {MAX_COUNT}, or empty for not reported"
                    )

    def by_day_detailed(self, start: dt.date) -> list[tuple[int, dict[str, Any], dict, dict, dict]]:
        """(model day, values, tests, limits, flows) per row, merged as :meth:`by_day` merges."""
        out: list[tuple[int, dict[str, Any], dict, dict, dict]] = []
        for i, (period, date, counts) in enumerate(zip(self.periods, self.dates, self.values)):
            day = (date - start).days
            if day <= 0:
                raise SpecError(
                    f"{self.source or 'history'}: period {period!r} (ends {date.isoformat()}) is not after the "
                    f"model start {start.isoformat()}; allowed: periods ending after the start date"
                )
            tests, limits, flows = self.details(i)
            if out and out[-1][0] == day:
                # a daily and a weekly row ending on the same day: one observation of both
                _, merged, *extra = out[-1]
                for name, value in counts.items():
                    if value is not None:
                        merged[name] = value
                        for into, given in zip(extra, (tests, limits, flows)):
                            if name in given:
                                into[name] = given[name]
                continue
            out.append((day, dict(counts), tests, limits, flows))
        return out

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

    def by_day(self, start: dt.date) -> list[tuple[int, dict[str, Any]]]:
        """(model day, counts) per row, model day = (date - start).days.

        Raises SpecError if a row falls on or before ``start`` (model day 0 is
        the initial state; the first observation must come after it).
        """
        return [(day, counts) for day, counts, *_ in self.by_day_detailed(start)]


def message_fields(
    counts: Mapping[str, Any], tests: Mapping[str, Any], limits: Mapping[str, Any], flows: Mapping[str, Any],
    kinds: Mapping[str, str], names: list[str],
) -> dict[str, Any]:
    """The ``counts``, ``tests`` and ``concentrations`` fields of an observation message for one
    history row (series ``names``; ``kinds``: series name -> kind). Empty cells become null;
    a positivity series' tests go in ``tests``, a concentration series' samples in
    ``concentrations`` ({value, lod, flow}; ``nd`` as value null)."""
    body: dict[str, Any] = {"counts": {}}
    for name in names:
        value = counts.get(name)
        if kinds.get(name) == "concentration":
            sample = None
            if value is not None:
                lod, flow = limits.get(name), flows.get(name)
                sample = {"value": None if value == 0 and lod is not None else float(value)}
                if lod is not None:
                    sample["lod"] = float(lod)
                if flow is not None:
                    sample["flow"] = float(flow)
            body.setdefault("concentrations", {})[name] = sample
            continue
        body["counts"][name] = value
        if kinds.get(name) == "positivity":
            body.setdefault("tests", {})[name] = tests.get(name)
    return body


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
    columns = header[first - 1 :]
    if not columns:
        shape = "'period,as_of,<series1>,<series2>,...'" if vintaged else "'period,<series1>,<series2>,...'"
        raise SpecError(f"{source}:1: no series columns; allowed: {shape}")
    series: list[str] = []
    extras: dict[str, list[str]] = {}
    slots: list[tuple[str, str | None]] = []  # per column: (series, None) or (series, "tests"/"lod"/"flow")
    for col, name in enumerate(columns, start=first):
        if name == AS_OF:
            raise SpecError(
                f"{source}:1: column {col} header 'as_of' is not a series; allowed: 'as_of' as column 2 only "
                "('period,as_of,<series1>,...' for data vintages)"
            )
        base, dot, what = name.partition(".")
        if not _NAME.match(base) or (dot and what not in EXTRAS):
            raise SpecError(
                f"{source}:1: column {col} header {name!r} is not a series name; "
                "allowed: letters, digits and '_', not starting with a digit, or '<series>.tests', "
                "'<series>.lod', '<series>.flow' beside a series' column"
            )
        if allowed_series is not None and base not in allowed_series:
            raise SpecError(
                f"{source}:1: column {col} header {name!r} is not a series of the model; allowed: {sorted(allowed_series)}"
            )
        if name in columns[: col - first]:
            raise SpecError(f"{source}:1: column {col} header {name!r} is repeated; allowed: each series once")
        slots.append((base, what or None))
        if dot:
            extras.setdefault(base, []).append(what)
        else:
            series.append(name)
    for base, whats in extras.items():
        col = first + columns.index(f"{base}.{whats[0]}")
        if base not in series:
            raise SpecError(
                f"{source}:1: column {col} header '{base}.{whats[0]}' has no column {base!r} beside it; "
                f"allowed: '{base}.{whats[0]}' only with a column {base!r} holding its series' values"
            )
        if "tests" in whats and len(whats) > 1:
            other = next(w for w in whats if w != "tests")
            raise SpecError(
                f"{source}:1: series {base!r} has both '{base}.tests' (a positivity series) and '{base}.{other}' "
                "(a concentration series); allowed: .tests, or .lod and .flow, not both"
            )
    col_of = {name: first + i for i, name in enumerate(columns)}
    periods: list[str] = []
    dates: list[dt.date] = []
    values: list[dict[str, Any]] = []
    row_details: list[tuple[dict, dict, dict]] = []
    vintages: list[Vintage] = []
    measured: dict[str, str] = {}
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
        cells = {name: cell.strip() for name, cell in zip(columns, row[first - 1 :])}
        counts, tests, limits, flows = _row(source, line, series, extras, cells, col_of, measured)
        if vintaged:
            vintage = Vintage(line, period, date, _as_of(source, line, row[1].strip(), period, date), counts, tests, limits, flows)
            _check_order(source, vintage, vintages[-1] if vintages else None, last_of)
            vintages.append(vintage)
            continue
        periods.append(period)
        dates.append(date)
        values.append(counts)
        row_details.append((tests, limits, flows))
    kept = {k: tuple(v) for k, v in extras.items()}
    if vintaged:
        if not vintages:
            raise SpecError(f"{source}: header only, no rows; allowed: at least one period")
        return _from_vintages(source, series, vintages, kept, measured)
    if not periods:
        raise SpecError(f"{source}: header only, no rows; allowed: at least one period")
    tests_rows, limit_rows, flow_rows = ([d[k] for d in row_details] if extras else [] for k in range(3))
    return History(periods=periods, dates=dates, series=series, values=values, source=source,
                   tests=tests_rows, limits=limit_rows, flows=flow_rows, extras=kept, measured=measured)  # fmt: skip


def _row(
    source: str, line: int, series: list[str], extras: dict[str, list[str]], cells: dict[str, str],
    col_of: dict[str, int], measured: dict[str, str],
) -> tuple[dict[str, Any], dict[str, int | None], dict[str, float | None], dict[str, float | None]]:
    """One row's values and its tests, limits and flows (module docstring's rules); SpecError on a bad cell."""
    counts: dict[str, Any] = {}
    tests: dict[str, int | None] = {}
    limits: dict[str, float | None] = {}
    flows: dict[str, float | None] = {}
    for name in series:
        cell, col = cells[name], col_of[name]
        at = f"{source}:{line}: column {col} ({name})"
        whats = extras.get(name, [])
        if "tests" in whats:
            tcol = col_of[f"{name}.tests"]
            tcell = cells[f"{name}.tests"]
            tat = f"{source}:{line}: column {tcol} ({name}.tests)"
            if cell == "":
                counts[name] = tests[name] = None
                if tcell != "":
                    raise SpecError(
                        f"{tat}: tests {tcell!r} given, but {name!r} (column {col}) is empty; "
                        "allowed: tests only on rows that give the positives, empty otherwise"
                    )
                continue
            if not _COUNT.match(cell) or int(cell) > MAX_COUNT:
                raise SpecError(
                    f"{at}: positives {cell!r}; allowed: a whole number from 0 to {MAX_COUNT} (positives out of "
                    f"the tests in column {tcol}), or empty for not reported"
                )
            if not _COUNT.match(tcell) or not 1 <= int(tcell) <= MAX_COUNT:
                given = "empty" if tcell == "" else repr(tcell)
                raise SpecError(
                    f"{tat}: tests {given} beside {cell} positives; allowed: a whole number of tests from 1 to "
                    f"{MAX_COUNT} (the share positive of no tests is undefined)"
                )
            if int(cell) > int(tcell):
                raise SpecError(
                    f"{at}: positives {cell} above the {tcell} tests in column {tcol} ({name}.tests); "
                    "allowed: positives from 0 to the number of tests"
                )
            counts[name], tests[name] = int(cell), int(tcell)
            continue
        lod = flow = None
        for what in whats:  # "lod" and "flow"
            xcell, xcol = cells[f"{name}.{what}"], col_of[f"{name}.{what}"]
            xat = f"{source}:{line}: column {xcol} ({name}.{what})"
            if xcell == "":
                continue
            if cell == "":
                raise SpecError(
                    f"{xat}: {what} {xcell!r} given, but {name!r} (column {col}) is empty; "
                    f"allowed: a {what} only on rows that give a value"
                )
            x = _decimal(xcell)
            if x is None or not x > 0:
                label = "limit of detection" if what == "lod" else "flow"
                raise SpecError(f"{xat}: {label} {xcell!r}; allowed: a finite decimal > 0, or empty")
            if what == "lod":
                lod = x
            else:
                flow = x
        if "lod" in whats:
            limits[name] = lod
        if "flow" in whats:
            flows[name] = flow
        if cell == "":
            counts[name] = None
            continue
        concentration = bool(whats)
        label = "concentration" if concentration else "count"
        if cell.lower() == NOT_DETECTED or (_DECIMAL.match(cell) and _decimal(cell) == 0):
            if lod is None:
                where = f"column {col_of[name + '.lod']} ({name}.lod) on this row" if "lod" in whats else f"a column '{name}.lod'"
                if cell.lower() == NOT_DETECTED or concentration or not _COUNT.match(cell):
                    raise SpecError(
                        f"{at}: {label} {cell!r} (not detected) without a limit of detection; allowed: {cell!r} only "
                        f"with the lab's limit in {where} (only 'below the limit' is known), or a decimal > 0"
                    )
            else:
                counts[name] = 0.0
                measured.setdefault(name, f"line {line}, column {col}: {cell!r}")
                continue
        if _COUNT.match(cell) and int(cell) <= MAX_COUNT:
            counts[name] = float(cell) if concentration else int(cell)
            continue
        x = _decimal(cell)
        if x is None or x < 0:
            allowed = (
                "a finite decimal >= 0, 'nd' for not detected (with a limit of detection), or empty for not reported"
                if concentration
                else f"a whole number from 0 to {MAX_COUNT}, or for a concentration series a finite decimal >= 0 or "
                "'nd' (with a .lod column), or empty for not reported"
            )
            raise SpecError(f"{at}: {label} {cell!r}; allowed: {allowed}")
        counts[name] = x
        measured.setdefault(name, f"line {line}, column {col}: {cell!r}")
    return counts, tests, limits, flows


def _decimal(cell: str) -> float | None:
    """A finite decimal written in plain or exponent notation (no sign, inf or nan); None otherwise."""
    if not _DECIMAL.match(cell):
        return None
    x = float(cell)
    return x if math.isfinite(x) else None


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


def _from_vintages(
    source: str, series: list[str], vintages: list[Vintage], extras: dict[str, tuple[str, ...]], measured: dict[str, str]
) -> History:
    """One row per period (in period order) holding each series' eventual count: its last value given
    (with the tests, limit and flow of the row that gave it)."""
    eventual: dict[dt.date, tuple[str, dict[str, Any], dict, dict, dict]] = {}
    for v in vintages:
        _, counts, tests, limits, flows = eventual.setdefault(
            v.date,
            (v.period, {name: None for name in series}, {k: None for k in v.tests}, {k: None for k in v.limits},
             {k: None for k in v.flows}),
        )  # fmt: skip
        for name, x in v.counts.items():
            if x is not None:
                counts[name] = x
                for into, given in ((tests, v.tests), (limits, v.limits), (flows, v.flows)):
                    if name in given:
                        into[name] = given[name]
    dates = sorted(eventual)
    pick = lambda k: [eventual[d][k] for d in dates] if extras else []
    return History(
        periods=[eventual[d][0] for d in dates],
        dates=dates,
        series=series,
        values=[eventual[d][1] for d in dates],
        source=source,
        vintages=vintages,
        tests=pick(2),
        limits=pick(3),
        flows=pick(4),
        extras=extras,
        measured=measured,
    )
