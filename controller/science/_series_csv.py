"""Loading daily temperature series and climatology tables from CSV files.

Rule: these are the only functions in :mod:`controller.science` that read files, and only the
file they are given. Every problem is a :class:`~controller.errors.SquallError` naming the file,
the 1-based line in it and the column. The files have a header row; extra columns are ignored;
blank lines and lines whose first cell starts with ``#`` are skipped. Public names are
re-exported by :mod:`controller.science.heatwave`.

Series file (``load_series_csv``)::

    date,temperature_c
    2021-07-01,18.42
    2021-07-02,18.60

Climatology file (``load_climatology_csv``), 366 rows (leap-year days of year) or 365::

    doy,seas_c,thresh_c
    1,14.21,15.02
"""

from __future__ import annotations

import csv
import datetime as dt
import math
import stat
from collections.abc import Iterator
from pathlib import Path
from typing import TextIO

import numpy as np
import pandas as pd

from controller.errors import SquallError
from controller.science._climatology import DAYS_IN_CLIMATOLOGY_YEAR, FEB29_DOY, Climatology

__all__ = ["load_climatology_csv", "load_series_csv", "open_data_file"]

_MISSING = {"", "nan", "na", "n/a", "null"}


def open_data_file(path: Path) -> TextIO:
    """Open a data file a protocol names, refusing anything but a regular file.

    A device, pipe or socket named as data would be read without end (``/dev/zero``) or
    block (a FIFO), so its type is checked before it is opened.

    Parameters
    ----------
    path
        The file (no unit).

    Returns
    -------
    TextIO
        The open text file (UTF-8, a byte-order mark skipped, newlines as written).

    Raises
    ------
    SquallError
        The file is missing, unreadable, or not a regular file.
    """
    try:
        mode = path.stat().st_mode
        if not (stat.S_ISREG(mode) or stat.S_ISDIR(mode)):
            raise SquallError(
                "cannot read the file: not a regular file (a device, pipe or socket)", file=path
            )
        return path.open(newline="", encoding="utf-8-sig")
    except OSError as exc:
        raise SquallError(f"cannot read the file: {exc.strerror or exc}", file=path) from exc


def _rows(path: Path, required: tuple[str, ...]) -> Iterator[tuple[int, dict[str, str]]]:
    """Yield ``(line, {column: cell})`` for each data row, after checking the header."""
    with open_data_file(path) as handle:
        reader = csv.reader(handle)
        columns: list[str] | None = None
        try:
            for cells in reader:
                line = reader.line_num
                if not cells or all(not cell.strip() for cell in cells):
                    continue
                if cells[0].lstrip().startswith("#"):
                    continue
                if columns is None:
                    columns = [cell.strip() for cell in cells]
                    for name in required:
                        if name not in columns:
                            raise SquallError(
                                f"the header row has no '{name}' column (found: "
                                f"{', '.join(columns)}); needed: {', '.join(required)}",
                                file=path,
                                line=line,
                                field=name,
                            )
                    continue
                if len(cells) < len(columns):
                    missing = columns[len(cells)]
                    raise SquallError(
                        f"the row has {len(cells)} cells but the header names {len(columns)}",
                        file=path,
                        line=line,
                        field=missing,
                    )
                yield line, {name: cells[i].strip() for i, name in enumerate(columns)}
        except csv.Error as exc:
            raise SquallError(
                f"not a readable CSV row: {exc}", file=path, line=reader.line_num
            ) from exc
        except UnicodeDecodeError as exc:
            raise SquallError("the file is not UTF-8 text", file=path) from exc
    if columns is None:
        raise SquallError(
            f"the file is empty; it needs a header row naming {', '.join(required)}",
            file=path,
            line=1,
        )


def _number(text: str, *, path: Path, line: int, field: str, allow_missing: bool) -> float:
    """Parse one numeric cell; missing markers give NaN when allowed."""
    if text.lower() in _MISSING:
        if allow_missing:
            return math.nan
        raise SquallError("a value is required here", file=path, line=line, field=field)
    try:
        value = float(text)
    except ValueError:
        raise SquallError(f"'{text}' is not a number", file=path, line=line, field=field) from None
    if math.isinf(value) or (math.isnan(value) and not allow_missing):
        raise SquallError(f"'{text}' is not a finite number", file=path, line=line, field=field)
    return value


def _date(text: str, *, path: Path, line: int) -> dt.date:
    """Parse an ISO 8601 date or datetime cell to its calendar date (its own wall clock)."""
    try:
        if len(text) <= 10:
            return dt.date.fromisoformat(text)
        return dt.datetime.fromisoformat(text).date()
    except ValueError:
        raise SquallError(
            f"'{text}' is not an ISO 8601 date such as 2021-07-01",
            file=path,
            line=line,
            field="date",
        ) from None


def load_series_csv(path: str | Path) -> tuple[pd.DatetimeIndex, np.ndarray]:
    """Read a daily temperature series from a CSV file.

    Parameters
    ----------
    path
        CSV file with a header row holding at least the columns ``date`` (ISO 8601 date or
        datetime; a datetime counts for its own calendar date) and ``temperature_c`` (daily
        mean, °C; empty or ``NaN`` marks a missing day).

    Returns
    -------
    tuple of pandas.DatetimeIndex and numpy.ndarray
        The dates (midnight, naive, in file order) and the temperatures, °C.

    Raises
    ------
    SquallError
        With the file, the line and the column of the first bad cell, a repeated date, or a
        file with no data rows.
    """
    file = Path(path)
    dates: list[dt.date] = []
    temps: list[float] = []
    seen: dict[dt.date, int] = {}
    for line, row in _rows(file, ("date", "temperature_c")):
        day = _date(row["date"], path=file, line=line)
        if day in seen:
            raise SquallError(
                f"date {day.isoformat()} already appears on line {seen[day]}; give one daily "
                "mean per date",
                file=file,
                line=line,
                field="date",
            )
        seen[day] = line
        temps.append(
            _number(
                row["temperature_c"],
                path=file,
                line=line,
                field="temperature_c",
                allow_missing=True,
            )
        )
        dates.append(day)
    if not dates:
        raise SquallError("the file has a header but no data rows", file=file, line=1)
    return pd.DatetimeIndex(pd.to_datetime(dates)), np.asarray(temps, dtype=float)


def load_climatology_csv(path: str | Path, *, percentile: float | None = None) -> Climatology:
    """Read a daily climatology table from a CSV file.

    Parameters
    ----------
    path
        CSV file with a header row holding at least ``doy``, ``seas_c`` (°C) and ``thresh_c``
        (°C), and one row for each day of year: 366 rows on the leap-year calendar (29 Feb =
        60), or 365 rows on the ordinary calendar (1 Mar = 60), in which case 29 Feb becomes
        the mean of 28 Feb and 1 Mar.
    percentile
        Percentile the threshold stands for, %. ``None`` takes 90 when the threshold lies
        above the climatology on average and 10 when it lies below.

    Returns
    -------
    Climatology
        The table on the 366-day leap-year calendar.

    Raises
    ------
    SquallError
        With the file, the line and the column of the first bad cell, a repeated or missing
        day of year, or the wrong number of rows.
    """
    file = Path(path)
    by_doy: dict[int, tuple[float, float, int]] = {}
    last_line = 1
    for line, row in _rows(file, ("doy", "seas_c", "thresh_c")):
        last_line = line
        text = row["doy"]
        try:
            doy = int(text)
        except ValueError:
            raise SquallError(
                f"'{text}' is not a whole day of year (1 to 366)", file=file, line=line, field="doy"
            ) from None
        if not 1 <= doy <= DAYS_IN_CLIMATOLOGY_YEAR:
            raise SquallError(
                f"day of year {doy} is outside 1..366", file=file, line=line, field="doy"
            )
        if doy in by_doy:
            raise SquallError(
                f"day of year {doy} already appears on line {by_doy[doy][2]}",
                file=file,
                line=line,
                field="doy",
            )
        seas = _number(row["seas_c"], path=file, line=line, field="seas_c", allow_missing=False)
        thresh = _number(
            row["thresh_c"], path=file, line=line, field="thresh_c", allow_missing=False
        )
        by_doy[doy] = (seas, thresh, line)
    count = len(by_doy)
    if count not in (365, DAYS_IN_CLIMATOLOGY_YEAR):
        raise SquallError(
            f"the table has {count} days of year; it needs 366 (leap-year calendar) or 365",
            file=file,
            line=last_line,
            field="doy",
        )
    absent = sorted(set(range(1, count + 1)) - set(by_doy))
    if absent:
        raise SquallError(
            f"day of year {absent[0]} is missing; the {count} rows must cover 1..{count}",
            file=file,
            line=last_line,
            field="doy",
        )
    seas_c = np.array([by_doy[d][0] for d in range(1, count + 1)])
    thresh_c = np.array([by_doy[d][1] for d in range(1, count + 1)])
    if count == 365:
        feb28 = FEB29_DOY - 2
        seas_c = np.insert(seas_c, feb28 + 1, 0.5 * (seas_c[feb28] + seas_c[feb28 + 1]))
        thresh_c = np.insert(thresh_c, feb28 + 1, 0.5 * (thresh_c[feb28] + thresh_c[feb28 + 1]))
    if percentile is None:
        percentile = 90.0 if float(np.mean(thresh_c - seas_c)) >= 0.0 else 10.0
    return Climatology(
        doy=np.arange(1, DAYS_IN_CLIMATOLOGY_YEAR + 1),
        seas_c=seas_c,
        thresh_c=thresh_c,
        percentile=percentile,
    )
