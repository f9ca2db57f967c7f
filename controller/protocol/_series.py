"""CSV inputs of protocols: climatologies (through the science loaders) and replay series.

Rule: these are the only functions of :mod:`controller.protocol` that read files, and only the
paths the protocol names, resolved against the ``base_dir`` the caller passes (the protocol
file's folder). A :class:`SeriesFiles` object caches what it has read during one compilation.
Every problem is a :class:`~controller.errors.SquallError` naming the CSV file and line when
the problem is inside it, or the protocol field path when the protocol asks for something the
file cannot give.

Replay series (``load_replay_csv``) may be sub-daily; they have a header row with a ``time``
(or ``date``) column holding ISO 8601 dates or datetimes, and a value column (default
``temperature_c``)::

    time,temperature_c
    2024-07-01T00:00:00+00:00,18.4
    2024-07-01T00:30:00+00:00,18.3
"""

from __future__ import annotations

import csv
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, date, datetime
from pathlib import Path
from typing import TypeVar

import numpy as np

from controller.errors import SquallError
from controller.science.heatwave import (
    Climatology,
    climatology,
    load_climatology_csv,
    open_data_file,
)
from controller.science.heatwave import load_series_csv as load_daily_series_csv

__all__ = ["ReplaySeries", "SeriesFiles", "load_replay_csv"]

_MISSING = {"", "nan", "na", "n/a", "null"}
_T = TypeVar("_T")


@dataclass(frozen=True)
class ReplaySeries:
    """A recorded series: times (numpy ``datetime64[us]``, naive) and values (column unit)."""

    times: np.ndarray
    values: np.ndarray


def _parse_time(text: str, file: Path, line: int, column: str) -> datetime:
    try:
        if len(text) <= 10:
            return datetime.combine(date.fromisoformat(text), datetime.min.time())
        parsed = datetime.fromisoformat(text)
    except ValueError:
        raise SquallError(
            f"{text!r} is not an ISO 8601 date or datetime such as 2024-07-01T06:30:00+00:00",
            file=file,
            line=line,
            field=column,
        ) from None
    if parsed.tzinfo is not None:
        parsed = parsed.astimezone(UTC).replace(tzinfo=None)
    return parsed


def load_replay_csv(path: Path, column: str | None) -> ReplaySeries:
    """Read a recorded series for a replay block.

    Parameters
    ----------
    path
        CSV file with a header row, a ``time`` or ``date`` column and the value column.
    column
        Value column, default ``temperature_c`` (°C).

    Returns
    -------
    ReplaySeries
        Times in increasing order (zone-aware times converted to UTC) and values; rows with
        a missing value are skipped.

    Raises
    ------
    SquallError
        With the file, line and column of the first bad cell.
    """
    wanted = column or "temperature_c"
    handle = open_data_file(path)
    times: list[datetime] = []
    values: list[float] = []
    with handle:
        reader = csv.reader(handle)
        header: list[str] | None = None
        time_column = ""
        for cells in reader:
            line = reader.line_num
            if not cells or all(not c.strip() for c in cells) or cells[0].lstrip().startswith("#"):
                continue
            if header is None:
                header = [c.strip() for c in cells]
                time_column = "time" if "time" in header else "date"
                for name in (time_column, wanted):
                    if name not in header:
                        raise SquallError(
                            f"the header row has no {name!r} column (found: {', '.join(header)})",
                            file=path,
                            line=line,
                            field=name,
                        )
                continue
            row = dict(zip(header, (c.strip() for c in cells), strict=False))
            text = row.get(wanted, "")
            if text.lower() in _MISSING:
                continue
            try:
                value = float(text)
            except ValueError:
                raise SquallError(
                    f"{text!r} is not a number", file=path, line=line, field=wanted
                ) from None
            if not math.isfinite(value):
                raise SquallError(f"{text!r} is not finite", file=path, line=line, field=wanted)
            stamp = _parse_time(row.get(time_column, ""), path, line, time_column)
            if times and stamp <= times[-1]:
                raise SquallError(
                    f"time {stamp.isoformat()} is not after the row before; a replay series "
                    "must run forward in time",
                    file=path,
                    line=line,
                    field=time_column,
                )
            times.append(stamp)
            values.append(value)
    if len(times) < 2:
        raise SquallError("a replay series needs at least two rows with values", file=path)
    return ReplaySeries(np.array(times, dtype="datetime64[us]"), np.array(values, dtype=float))


@dataclass
class SeriesFiles:
    """Reads (once each) the CSV files a protocol names, relative to ``base_dir``."""

    base_dir: Path
    _cache: dict[tuple[object, ...], object] = field(default_factory=dict)

    def path(self, name: str) -> Path:
        """Resolve a path written in the protocol against the protocol's folder."""
        candidate = Path(name)
        return candidate if candidate.is_absolute() else self.base_dir / candidate

    def climatology(
        self,
        *,
        table: str | None,
        series: str | None,
        baseline_years: tuple[int, int] | None,
        percentile: float,
        where: str,
    ) -> Climatology:
        """Daily climatology from a table or computed from a series (Hobday et al. 2016).

        Parameters
        ----------
        table
            Climatology CSV (doy, seas_c, thresh_c), or ``None``.
        series
            Daily series CSV (date, temperature_c), or ``None``.
        baseline_years
            Baseline period for a series, years; ``None`` uses every year.
        percentile
            Threshold percentile for a series, % (90 heatwave, 10 cold spell).
        where
            Protocol field path named in errors that are not inside the CSV.

        Returns
        -------
        Climatology
            ``seas_c`` and ``thresh_c`` per day of year, °C.
        """
        key = ("clim", table, series, baseline_years, percentile)
        if key not in self._cache:
            if table is not None:
                self._cache[key] = self._guard(
                    lambda: load_climatology_csv(self.path(table)), where
                )
            else:
                path = self.path(str(series))
                dates, temps = self._guard(lambda: load_daily_series_csv(path), where)
                self._cache[key] = self._guard(
                    lambda: climatology(
                        dates, temps, baseline_years=baseline_years, percentile=percentile
                    ),
                    where,
                    file=path,
                )
        return self._cache[key]  # type: ignore[return-value]

    def replay(self, series: str, column: str | None, where: str) -> ReplaySeries:
        """A replay series (see :func:`load_replay_csv`), read once per compilation."""
        key = ("replay", series, column)
        if key not in self._cache:
            path = self.path(series)
            self._cache[key] = self._guard(lambda: load_replay_csv(path, column), where)
        return self._cache[key]  # type: ignore[return-value]

    @staticmethod
    def _guard(action: Callable[[], _T], where: str, file: Path | None = None) -> _T:
        try:
            return action()
        except SquallError as exc:
            if exc.file is None:
                prefix = f"{file.name}: " if file is not None else ""
                raise SquallError(prefix + exc.message, field=where) from exc
            raise
