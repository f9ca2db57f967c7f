"""Marine heatwaves and cold spells: event detection, metrics and categories.

Rule: this module follows the marine-heatwave definition of Hobday et al. (2016) as its authors'
published reference code applies it, the categories of Hobday et al. (2018) and the cold-spell
mirror image of Schlegel et al. (2017). Where that code leaves a choice open, the choice is
written beside it. The climatology (:mod:`._climatology`) and the CSV loaders
(:mod:`._series_csv`) are re-exported here, so this module is the one to import.

References
----------
Hobday, A. J. et al. (2016) A hierarchical approach to defining marine heatwaves.
Progress in Oceanography 141:227–238.
Hobday, A. J. et al. (2018) Categorizing and naming marine heatwaves. Oceanography 31(2):162–173.
Schlegel, R. W. et al. (2017) Nearshore and offshore co-occurrence of marine heatwaves and
cold-spells. Progress in Oceanography 151:189–205.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from controller.errors import SquallError
from controller.science._climatology import (
    DAYS_IN_CLIMATOLOGY_YEAR,
    FEB29_DOY,
    Climatology,
    climatology,
    daily_series,
    leap_day_of_year,
)
from controller.science._series_csv import (
    load_climatology_csv,
    load_series_csv,
    open_data_file,
)

__all__ = [
    "CATEGORY_MULTIPLES",
    "DAYS_IN_CLIMATOLOGY_YEAR",
    "FEB29_DOY",
    "Category",
    "Climatology",
    "ExtremeEvent",
    "category_multiple",
    "category_name",
    "climatology",
    "daily_series",
    "detect",
    "leap_day_of_year",
    "load_climatology_csv",
    "load_series_csv",
    "open_data_file",
]


class Category(StrEnum):
    """Hobday et al. (2018) event categories (I to IV); each value is its JSON name."""

    MODERATE = "moderate"
    STRONG = "strong"
    SEVERE = "severe"
    EXTREME = "extreme"


CATEGORY_MULTIPLES: dict[str, int] = {
    "moderate": 1,
    "strong": 2,
    "severe": 3,
    "extreme": 4,
}
"""Lower bound of each category as a multiple of (threshold − climatology), Hobday et al. 2018."""


def category_multiple(temp_c: float, seas_c: float, thresh_c: float) -> float:
    """Temperature anomaly as a multiple of the threshold's distance from the climatology.

    Parameters
    ----------
    temp_c
        Temperature, °C.
    seas_c
        Climatological mean for that day, °C.
    thresh_c
        Threshold for that day, °C (above ``seas_c`` for heatwaves, below for cold spells).

    Returns
    -------
    float
        ``(temp − seas)/(thresh − seas)``, dimensionless; 1 at the threshold, 2 at twice its
        distance from the climatology and so on, for heat and cold alike.
    """
    spread = thresh_c - seas_c
    if spread == 0.0 or not math.isfinite(spread):
        raise SquallError(
            f"threshold {thresh_c} °C equals the climatology {seas_c} °C; no category exists",
            field="thresh_c",
        )
    return float((temp_c - seas_c) / spread)


def category_name(multiple: float) -> Category:
    """Hobday et al. (2018) category of a day or event from its :func:`category_multiple`.

    Parameters
    ----------
    multiple
        Anomaly as a multiple of (threshold − climatology), dimensionless (>= 1).

    Returns
    -------
    Category
        I "moderate" (1 to 2×), II "strong" (2 to 3×), III "severe" (3 to 4×),
        IV "extreme" (4× and more); each lower bound belongs to its category.
    """
    if not multiple >= 1.0:
        raise SquallError(
            f"multiple {multiple} is below 1: the temperature does not pass the threshold",
            field="category",
        )
    for name in ("extreme", "severe", "strong"):
        if multiple >= CATEGORY_MULTIPLES[name]:
            return Category(name)
    return Category.MODERATE


@dataclass(frozen=True)
class ExtremeEvent:
    """One marine heatwave or cold spell with the metrics of Hobday et al. (2016).

    Attributes
    ----------
    start, end
        First and last day of the event, dates (inclusive).
    peak
        Day of the largest anomaly from the climatology, date.
    duration_days
        ``end − start + 1``, days.
    intensity_max_c
        Anomaly from the climatology on the peak day, °C (negative for cold spells).
    intensity_mean_c
        Mean anomaly over the event, °C (negative for cold spells).
    intensity_var_c
        Standard deviation of the daily anomaly, °C (>= 0).
    intensity_cumulative_c_days
        Sum of the daily anomalies, °C·d (negative for cold spells).
    rate_onset_c_per_day
        Rise of the anomaly's magnitude from the start to the peak, °C/d.
    rate_decline_c_per_day
        Fall of the anomaly's magnitude from the peak to the end, °C/d.
    category
        Highest daily category reached, Hobday et al. (2018).
    """

    start: dt.date
    end: dt.date
    peak: dt.date
    duration_days: int
    intensity_max_c: float
    intensity_mean_c: float
    intensity_var_c: float
    intensity_cumulative_c_days: float
    rate_onset_c_per_day: float
    rate_decline_c_per_day: float
    category: Category

    def to_json_dict(self) -> dict[str, Any]:
        """Plain JSON-ready mapping: ISO dates, numbers and the category name."""
        return {
            "start": self.start.isoformat(),
            "end": self.end.isoformat(),
            "peak": self.peak.isoformat(),
            "duration_days": int(self.duration_days),
            "intensity_max_c": float(self.intensity_max_c),
            "intensity_mean_c": float(self.intensity_mean_c),
            "intensity_var_c": float(self.intensity_var_c),
            "intensity_cumulative_c_days": float(self.intensity_cumulative_c_days),
            "rate_onset_c_per_day": float(self.rate_onset_c_per_day),
            "rate_decline_c_per_day": float(self.rate_decline_c_per_day),
            "category": str(self.category.value),
        }


def _runs(flags: np.ndarray) -> list[tuple[int, int]]:
    """Inclusive (first, last) index of every run of True values."""
    edges = np.diff(np.concatenate([[0], flags.astype(np.int8), [0]]))
    starts = np.flatnonzero(edges == 1)
    ends = np.flatnonzero(edges == -1) - 1
    return [(int(a), int(b)) for a, b in zip(starts, ends, strict=True)]


def _join(runs: list[tuple[int, int]], max_gap: int) -> list[tuple[int, int]]:
    """Merge consecutive runs separated by at most ``max_gap`` days."""
    joined: list[tuple[int, int]] = []
    for first, last in runs:
        if joined and first - joined[-1][1] - 1 <= max_gap:
            joined[-1] = (joined[-1][0], last)
        else:
            joined.append((first, last))
    return joined


def _event(
    first: int,
    last: int,
    days: pd.DatetimeIndex,
    value: np.ndarray,
    seas: np.ndarray,
    thresh: np.ndarray,
    sign: float,
) -> ExtremeEvent:
    """Metrics of one event on series already flipped so that the event is warm."""
    anomaly = value - seas
    rel = anomaly[first : last + 1]
    peak = int(np.argmax(rel))
    i_max = float(rel[peak])
    n = value.size
    # Onset and decline: the event starts half a day before its first day and ends half a day
    # after its last (Hobday et al. 2016). At the series' ends the reference code measures from
    # the first/last day itself, and over one day when the peak is that day.
    if first > 0:
        i_start = 0.5 * (rel[0] + anomaly[first - 1])
        onset = (i_max - i_start) / (peak + 0.5)
    else:
        onset = (i_max - rel[0]) / (peak if peak > 0 else 1)
    after_peak = last - first - peak
    if last < n - 1:
        i_end = 0.5 * (rel[-1] + anomaly[last + 1])
        decline = (i_max - i_end) / (after_peak + 0.5)
    else:
        decline = (i_max - rel[-1]) / (after_peak if after_peak > 0 else 1)
    spread = thresh[first : last + 1] - seas[first : last + 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        multiples = np.where(spread > 0.0, rel / spread, np.nan)
    # Every event day above the threshold is at least category I; a day whose threshold does
    # not lie beyond the climatology cannot be graded higher.
    top = float(np.nanmax(multiples)) if np.any(np.isfinite(multiples)) else 1.0
    start_date = days[first].date()
    return ExtremeEvent(
        start=start_date,
        end=days[last].date(),
        peak=days[first + peak].date(),
        duration_days=last - first + 1,
        intensity_max_c=sign * i_max,
        intensity_mean_c=sign * float(np.mean(rel)),
        intensity_var_c=float(np.std(rel)),
        intensity_cumulative_c_days=sign * float(np.sum(rel)),
        rate_onset_c_per_day=float(onset),
        rate_decline_c_per_day=float(decline),
        category=category_name(max(top, 1.0)),
    )


def detect(
    dates: npt.ArrayLike | pd.DatetimeIndex,
    temp_c: npt.ArrayLike,
    clim: Climatology,
    *,
    min_duration_days: int = 5,
    max_gap_days: int = 2,
    cold: bool = False,
) -> list[ExtremeEvent]:
    """Find marine heatwaves (or cold spells) in a daily series (Hobday et al. 2016).

    Parameters
    ----------
    dates
        Calendar date of each value; any order, no repeats, gaps allowed.
    temp_c
        Daily mean temperature, °C; NaN marks a missing day.
    clim
        Climatology and threshold (a high percentile for heatwaves, a low one for cold spells).
    min_duration_days
        Shortest run of days past the threshold that counts, days.
    max_gap_days
        Longest gap between two qualifying runs that still joins them into one event, days.
    cold
        Look for cold spells (temperature below the threshold) instead of heatwaves.

    Returns
    -------
    list of ExtremeEvent
        Events in time order.

    Notes
    -----
    A day is hot when its temperature is strictly above the threshold (cold: strictly below).
    Runs shorter than ``min_duration_days`` are dropped first, then runs separated by at most
    ``max_gap_days`` are joined, so 4 hot days, a 1-day gap and 5 hot days make one 5-day event.
    Gap days belong to the joined event and count in its metrics. A missing day takes the
    climatology's value (anomaly 0), as in the authors' reference code: it never passes the
    threshold and ends a run. Cold spells are found on the sign-flipped series (Schlegel et al.
    2017): their intensities are negative and their onset and decline rates are magnitudes.
    """
    minimum = int(min_duration_days)
    if minimum != min_duration_days or minimum < 1:
        raise SquallError(
            f"minimum duration must be a whole number of days >= 1, got {min_duration_days}",
            field="min_duration_days",
        )
    gap = int(max_gap_days)
    if gap != max_gap_days or gap < 0:
        raise SquallError(
            f"maximum gap must be a whole number of days >= 0, got {max_gap_days}",
            field="max_gap_days",
        )
    if cold and clim.percentile > 50.0:
        raise SquallError(
            f"cold spells need a low-percentile threshold (such as 10), got the "
            f"{clim.percentile:g}th percentile",
            field="percentile",
        )
    if not cold and clim.percentile < 50.0:
        raise SquallError(
            f"heatwaves need a high-percentile threshold (such as 90), got the "
            f"{clim.percentile:g}th percentile; pass cold=True for cold spells",
            field="percentile",
        )
    days, temps = daily_series(dates, temp_c)
    seas, thresh = clim.at(days)
    filled = np.where(np.isnan(temps), seas, temps)
    sign = -1.0 if cold else 1.0
    value, seas_f, thresh_f = sign * filled, sign * seas, sign * thresh
    runs = [(a, b) for a, b in _runs(value > thresh_f) if b - a + 1 >= minimum]
    return [_event(a, b, days, value, seas_f, thresh_f, sign) for a, b in _join(runs, gap)]
