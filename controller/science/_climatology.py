"""Daily climatology and percentile threshold of a temperature series (Hobday et al. 2016).

Rule: pure functions; days of year are counted on a leap-year calendar: 1 Jan = 1,
28 Feb = 59, 29 Feb = 60, 1 Mar = 61 and 31 Dec = 366 in every year, so a calendar date always
has the same day of year. Public names are re-exported by :mod:`controller.science.heatwave`.

References
----------
Hobday, A. J. et al. (2016) A hierarchical approach to defining marine heatwaves.
Progress in Oceanography 141:227–238.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
import pandas as pd

from controller.errors import SquallError

__all__ = [
    "DAYS_IN_CLIMATOLOGY_YEAR",
    "FEB29_DOY",
    "Climatology",
    "climatology",
    "daily_series",
    "leap_day_of_year",
]

DAYS_IN_CLIMATOLOGY_YEAR = 366
"""Length of the climatological year (leap-year calendar), days."""

FEB29_DOY = 60
"""Day of year of 29 February on the leap-year calendar."""


def leap_day_of_year(dates: npt.ArrayLike | pd.DatetimeIndex) -> np.ndarray:
    """Day of year on the leap-year calendar (1..366; 29 Feb = 60 and 1 Mar = 61 every year).

    Parameters
    ----------
    dates
        Calendar dates (anything pandas turns into datetimes; the time of day is ignored).

    Returns
    -------
    numpy.ndarray
        Integer day of year, 1 to 366, one per date.
    """
    index = pd.DatetimeIndex(pd.to_datetime(dates))
    doy = index.day_of_year.to_numpy(dtype=np.int64)
    shift = (~index.is_leap_year) & (index.month > 2)
    return doy + np.asarray(shift, dtype=np.int64)


def daily_series(
    dates: npt.ArrayLike | pd.DatetimeIndex, temp_c: npt.ArrayLike
) -> tuple[pd.DatetimeIndex, np.ndarray]:
    """Sort a daily series and fill missing calendar days with NaN.

    Parameters
    ----------
    dates
        One date per value (dates, datetimes or ISO strings). The calendar date is used:
        zone-aware times keep their own wall-clock date.
    temp_c
        Daily mean temperature, °C; NaN marks a missing value.

    Returns
    -------
    tuple of pandas.DatetimeIndex and numpy.ndarray
        Every calendar day from the first to the last date (midnight, naive) and the
        temperature on each, °C (NaN where the input had none).

    Raises
    ------
    SquallError
        When the lengths differ, a date repeats, a value is infinite or there are no dates.
    """
    index = pd.DatetimeIndex(pd.to_datetime(dates))
    if index.tz is not None:
        index = index.tz_localize(None)
    index = index.normalize()
    values = np.asarray(temp_c, dtype=float)
    if values.ndim != 1 or len(index) != values.size:
        raise SquallError(
            f"dates and temperatures differ in length ({len(index)} and {values.size})",
            field="temperature_c",
        )
    if values.size == 0:
        raise SquallError("the series is empty", field="temperature_c")
    if np.any(np.isinf(values)):
        raise SquallError("the series contains an infinite temperature", field="temperature_c")
    if index.has_duplicates:
        first = index[index.duplicated()][0]
        raise SquallError(
            f"date {first.date().isoformat()} appears more than once; give one daily mean per date",
            field="date",
        )
    full = pd.date_range(index.min(), index.max(), freq="D")
    filled = np.full(len(full), np.nan)
    filled[full.get_indexer(index)] = values
    return full, filled


@dataclass(frozen=True, eq=False)
class Climatology:
    """Seasonal climatology and extreme threshold for each day of the (leap-year) year.

    Attributes
    ----------
    doy
        Days of year 1..366 (leap-year calendar), length 366.
    seas_c
        Climatological mean temperature for each day of year, °C.
    thresh_c
        Threshold temperature for each day of year (the ``percentile``-th percentile), °C.
    percentile
        Percentile the threshold stands for, % (90 for heatwaves, 10 for cold spells).
    """

    doy: np.ndarray
    seas_c: np.ndarray
    thresh_c: np.ndarray
    percentile: float

    def __post_init__(self) -> None:
        doy = np.asarray(self.doy, dtype=np.int64).copy()
        seas = np.asarray(self.seas_c, dtype=float).copy()
        thresh = np.asarray(self.thresh_c, dtype=float).copy()
        n = DAYS_IN_CLIMATOLOGY_YEAR
        if doy.shape != (n,) or seas.shape != (n,) or thresh.shape != (n,):
            raise SquallError(
                f"a climatology needs {n} days of year, got doy {doy.shape}, "
                f"seas_c {seas.shape}, thresh_c {thresh.shape}",
                field="doy",
            )
        if not np.array_equal(doy, np.arange(1, n + 1)):
            raise SquallError("doy must run 1, 2, ..., 366 in order", field="doy")
        if not (np.all(np.isfinite(seas)) and np.all(np.isfinite(thresh))):
            raise SquallError("climatology values must be finite numbers", field="seas_c")
        if not 0.0 <= float(self.percentile) <= 100.0:
            raise SquallError(
                f"percentile must be within 0..100, got {self.percentile}", field="percentile"
            )
        for name, array in (("doy", doy), ("seas_c", seas), ("thresh_c", thresh)):
            array.setflags(write=False)
            object.__setattr__(self, name, array)
        object.__setattr__(self, "percentile", float(self.percentile))

    def at(self, dates: npt.ArrayLike | pd.DatetimeIndex) -> tuple[np.ndarray, np.ndarray]:
        """Climatology and threshold on given calendar dates.

        Parameters
        ----------
        dates
            Calendar dates (the time of day is ignored); 29 Feb takes its own entry (day 60).

        Returns
        -------
        tuple of numpy.ndarray
            ``(seas_c, thresh_c)``, °C, one value per date.
        """
        index = leap_day_of_year(dates) - 1
        return self.seas_c[index], self.thresh_c[index]

    def to_frame(self) -> pd.DataFrame:
        """The table as a DataFrame with columns ``doy``, ``seas_c`` (°C), ``thresh_c`` (°C)."""
        return pd.DataFrame({"doy": self.doy, "seas_c": self.seas_c, "thresh_c": self.thresh_c})


def _periodic_running_mean(values: np.ndarray, width: int) -> np.ndarray:
    """Centred moving average of ``width`` (odd) points on a periodic (wrapping) sequence."""
    if width == 1:
        return values.copy()
    n = values.size
    tripled = np.concatenate([values, values, values])
    smooth = np.convolve(tripled, np.ones(width) / width, mode="same")
    return smooth[n : 2 * n]


def climatology(
    dates: npt.ArrayLike | pd.DatetimeIndex,
    temp_c: npt.ArrayLike,
    *,
    baseline_years: tuple[int, int] | None = None,
    percentile: float = 90.0,
    window_half_width_days: int = 5,
    smooth_width_days: int = 31,
) -> Climatology:
    """Seasonal climatology and percentile threshold of a daily series (Hobday et al. 2016).

    Parameters
    ----------
    dates
        Calendar date of each value; any order, no repeats, gaps allowed.
    temp_c
        Daily mean temperature, °C; NaN values are ignored.
    baseline_years
        First and last calendar year of the baseline, inclusive (Hobday et al. recommend 30
        years); both must lie within the series. ``None`` uses every year of the series.
    percentile
        Threshold percentile, % (90 for heatwaves, 10 for cold spells).
    window_half_width_days
        Half-width of the pooling window around each day of year, days (5: an 11-day window).
    smooth_width_days
        Width of the periodic moving average applied to both curves, days (odd; 1 = none).

    Returns
    -------
    Climatology
        Mean (``seas_c``, °C) and percentile (``thresh_c``, °C) for days of year 1..366.

    Notes
    -----
    For each day of year d (except 29 Feb), the values of the ``2·w + 1`` consecutive days
    centred on each occurrence of d in the baseline years are pooled; ``seas_c`` is their mean
    and ``thresh_c`` their percentile (numpy "linear" method). As in the authors' reference
    code, a window centred in the baseline may reach up to ``w`` days past it when the series
    has data there. 29 Feb is the mean of 28 Feb and 1 Mar; then both curves are smoothed with
    a periodic moving average over the 366-day year.

    Raises
    ------
    SquallError
        For an invalid option, baseline years outside the series, or a day of year whose pool
        holds no value.
    """
    if not 0.0 <= percentile <= 100.0:
        raise SquallError(f"percentile must be within 0..100, got {percentile}", field="percentile")
    half = int(window_half_width_days)
    if half != window_half_width_days or half < 0:
        raise SquallError(
            f"window half-width must be a whole number of days >= 0, got {window_half_width_days}",
            field="window_half_width_days",
        )
    smooth = int(smooth_width_days)
    if smooth != smooth_width_days or smooth < 1 or smooth % 2 == 0:
        raise SquallError(
            f"smoothing width must be an odd whole number of days >= 1, got {smooth_width_days}",
            field="smooth_width_days",
        )
    days, temps = daily_series(dates, temp_c)
    years = days.year.to_numpy(dtype=np.int64)
    first_year, last_year = int(years[0]), int(years[-1])
    if baseline_years is None:
        y0, y1 = first_year, last_year
    else:
        y0, y1 = (int(year) for year in baseline_years)
        if y0 > y1:
            raise SquallError(f"baseline years {y0}–{y1} run backwards", field="baseline_years")
        if y0 < first_year or y1 > last_year:
            raise SquallError(
                f"baseline years {y0}–{y1} reach outside the series, which covers "
                f"{days[0].date().isoformat()} to {days[-1].date().isoformat()}",
                field="baseline_years",
            )
    padded = np.concatenate([np.full(half, np.nan), temps, np.full(half, np.nan)])
    windows = np.lib.stride_tricks.sliding_window_view(padded, 2 * half + 1)
    doy = leap_day_of_year(days)
    centre = (years >= y0) & (years <= y1) & (doy != FEB29_DOY)
    n_days = DAYS_IN_CLIMATOLOGY_YEAR
    pool = np.full((n_days, y1 - y0 + 1, 2 * half + 1), np.nan)
    pool[doy[centre] - 1, years[centre] - y0, :] = windows[centre]
    pool = pool.reshape(n_days, -1)
    counts = np.count_nonzero(~np.isnan(pool), axis=1)
    counts[FEB29_DOY - 1] = 1
    empty = np.flatnonzero(counts == 0) + 1
    if empty.size:
        shown = ", ".join(str(d) for d in empty[:5]) + (" ..." if empty.size > 5 else "")
        raise SquallError(
            f"the baseline {y0}–{y1} has no value within ±{half} days of day(s) of year "
            f"{shown}; a climatology needs data around every day of the year",
            field="temperature_c",
        )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # the all-NaN row of 29 Feb
        seas = np.nanmean(pool, axis=1)
        thresh = np.nanpercentile(pool, percentile, axis=1)
    feb29 = FEB29_DOY - 1
    seas[feb29] = 0.5 * seas[feb29 - 1] + 0.5 * seas[feb29 + 1]
    thresh[feb29] = 0.5 * thresh[feb29 - 1] + 0.5 * thresh[feb29 + 1]
    return Climatology(
        doy=np.arange(1, n_days + 1),
        seas_c=_periodic_running_mean(seas, smooth),
        thresh_c=_periodic_running_mean(thresh, smooth),
        percentile=percentile,
    )
