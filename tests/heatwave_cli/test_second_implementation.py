"""Heatwave and cold-spell detection checked against a second, deliberately simple implementation.

The functions ``simple_*`` below re-implement Hobday et al. (2016) (categories Hobday et al.
2018; cold spells as Schlegel et al. 2017) from the method's description in the reference
notes §4, with plain loops and dictionaries: no array tricks, no shared code with
:mod:`controller.science.heatwave`. Both run on decades-long seeded synthetic series with
injected events of known start and length, and must find the same events with the same
metrics. The simple version is itself checked against the worked example of the notes first.
"""

from __future__ import annotations

import calendar
import datetime as dt
import math

import numpy as np
import pytest

from controller.science import heatwave as hw

from ._synthetic import Series, make_series

HALF_WINDOW = 5  # ±5 days: the 11-day pooling window (Hobday et al. 2016)
SMOOTH = 31  # 31-day moving average of both curves (Hobday et al. 2016)
CATEGORY_NAMES = {1: "moderate", 2: "strong", 3: "severe", 4: "extreme"}  # Hobday et al. 2018
TOL_C = 1e-9  # the two implementations differ only in the order of floating-point sums


# --- the second implementation ------------------------------------------------------------


def simple_doy(day: dt.date) -> int:
    """Day of year on a leap-year calendar: 1 March is day 61 in every year."""
    doy = day.timetuple().tm_yday
    if not calendar.isleap(day.year) and day.month > 2:
        doy += 1
    return doy


def simple_climatology(
    dates: list[dt.date], temps: list[float], first_year: int, last_year: int, percentile: float
) -> tuple[list[float], list[float]]:
    """Per-day-of-year mean and percentile of the pooled 11-day windows, smoothed over 31 days."""
    value_on = {day: temp for day, temp in zip(dates, temps, strict=True)}
    centres: dict[int, list[dt.date]] = {d: [] for d in range(1, 367)}
    for day in dates:
        if first_year <= day.year <= last_year:
            centres[simple_doy(day)].append(day)
    seas = [0.0] * 366
    thresh = [0.0] * 366
    for d in range(1, 367):
        if d == 60:
            continue  # 29 Feb comes from its neighbours below
        pool: list[float] = []
        for centre in centres[d]:
            for k in range(-HALF_WINDOW, HALF_WINDOW + 1):
                value = value_on.get(centre + dt.timedelta(days=k))
                if value is not None and not math.isnan(value):
                    pool.append(value)
        seas[d - 1] = sum(pool) / len(pool)
        thresh[d - 1] = float(np.percentile(pool, percentile))  # numpy "linear"
    for curve in (seas, thresh):
        curve[59] = 0.5 * (curve[58] + curve[60])
    smoothed = []
    for curve in (seas, thresh):
        out = []
        for i in range(366):
            total = 0.0
            for k in range(-(SMOOTH // 2), SMOOTH // 2 + 1):
                total += curve[(i + k) % 366]
            out.append(total / SMOOTH)
        smoothed.append(out)
    return smoothed[0], smoothed[1]


def simple_detect(
    temps: list[float],
    seas: list[float],
    thresh: list[float],
    *,
    cold: bool = False,
    min_days: int = 5,
    max_gap: int = 2,
) -> list[dict[str, float | int | str]]:
    """Events of a continuous daily series, given seas and thresh on each of its days."""
    n = len(temps)
    temp = [seas[i] if math.isnan(temps[i]) else temps[i] for i in range(n)]
    past = [(temp[i] < thresh[i]) if cold else (temp[i] > thresh[i]) for i in range(n)]
    runs: list[list[int]] = []
    i = 0
    while i < n:
        if past[i]:
            j = i
            while j + 1 < n and past[j + 1]:
                j += 1
            runs.append([i, j])
            i = j + 1
        else:
            i += 1
    runs = [run for run in runs if run[1] - run[0] + 1 >= min_days]
    joined: list[list[int]] = []
    for run in runs:
        if joined and run[0] - joined[-1][1] - 1 <= max_gap:
            joined[-1][1] = run[1]
        else:
            joined.append(list(run))
    events = []
    for first, last in joined:
        rel = [temp[i] - seas[i] for i in range(first, last + 1)]
        peak = 0
        for k in range(len(rel)):
            if (rel[k] < rel[peak]) if cold else (rel[k] > rel[peak]):
                peak = k
        i_max = rel[peak]
        mean = sum(rel) / len(rel)
        var = math.sqrt(sum((r - mean) ** 2 for r in rel) / len(rel))
        # Onset and decline rates in the magnitude of the anomaly (cold spells: flip the sign).
        sign = -1.0 if cold else 1.0
        if first > 0:
            i_start = 0.5 * (rel[0] + temp[first - 1] - seas[first - 1])
            onset = sign * (i_max - i_start) / (peak + 0.5)
        else:  # series starts inside the event (the authors' reference code, from memory)
            onset = sign * (i_max - rel[0]) / (peak if peak > 0 else 1)
        after = last - first - peak
        if last < n - 1:
            i_end = 0.5 * (rel[-1] + temp[last + 1] - seas[last + 1])
            decline = sign * (i_max - i_end) / (after + 0.5)
        else:
            decline = sign * (i_max - rel[-1]) / (after if after > 0 else 1)
        # Category: a day is in category n when its anomaly is at least n times thresh - seas.
        top = 1
        for k, i in enumerate(range(first, last + 1)):
            for level in (2, 3, 4):
                if sign * rel[k] >= level * sign * (thresh[i] - seas[i]):
                    top = max(top, level)
        events.append(
            {
                "first": first,
                "last": last,
                "peak": first + peak,
                "duration_days": last - first + 1,
                "intensity_max_c": i_max,
                "intensity_mean_c": mean,
                "intensity_var_c": var,
                "intensity_cumulative_c_days": sum(rel),
                "rate_onset_c_per_day": onset,
                "rate_decline_c_per_day": decline,
                "category": CATEGORY_NAMES[top],
            }
        )
    return events


def simple_events(
    series: Series, first_year: int, last_year: int, *, cold: bool = False
) -> tuple[list[float], list[float], list[dict[str, float | int | str]]]:
    """Climatology curves and events of a whole series, the simple way."""
    temps = [float(t) for t in series.temps]
    seas, thresh = simple_climatology(
        series.dates, temps, first_year, last_year, 10.0 if cold else 90.0
    )
    seas_day = [seas[simple_doy(day) - 1] for day in series.dates]
    thresh_day = [thresh[simple_doy(day) - 1] for day in series.dates]
    return seas, thresh, simple_detect(temps, seas_day, thresh_day, cold=cold)


# --- the second implementation against the worked example ---------------------------------


def test_simple_implementation_reproduces_the_worked_example() -> None:
    # Synthetic check in the reference notes §4 [computed]: seas 20, thresh 21.
    temps = [20, 20, 21.5, 22, 23, 24, 22.5, 21.5, 20, 20]
    (event,) = simple_detect([float(t) for t in temps], [20.0] * 10, [21.0] * 10)
    assert (event["first"], event["last"], event["duration_days"]) == (2, 7, 6)
    assert event["intensity_max_c"] == pytest.approx(4.0)
    assert event["intensity_mean_c"] == pytest.approx(2.41667, abs=5e-6)
    assert event["intensity_cumulative_c_days"] == pytest.approx(14.5)
    assert event["rate_onset_c_per_day"] == pytest.approx(0.928571, abs=5e-7)
    assert event["rate_decline_c_per_day"] == pytest.approx(1.3)
    assert event["category"] == "extreme"


@pytest.mark.parametrize(
    ("hot_days", "expected"),
    [
        # reference notes §4: 5 days + 2-day gap + 5 days -> one 12-day event
        ([5, -2, 5], [(0, 11)]),
        # reference notes §4: a 3-day gap -> two events
        ([5, -3, 5], [(0, 4), (8, 12)]),
        # reference notes §4: runs under 5 days are dropped before joining
        ([4, -1, 5], [(5, 9)]),
    ],
)
def test_simple_implementation_joins_and_drops_runs_as_described(
    hot_days: list[int], expected: list[tuple[int, int]]
) -> None:
    temps: list[float] = []
    for count in hot_days:
        temps.extend([22.0 if count > 0 else 20.0] * abs(count))
    temps = [20.0, *temps, 20.0]
    events = simple_detect(temps, [20.0] * len(temps), [21.0] * len(temps))
    assert [(e["first"] - 1, e["last"] - 1) for e in events] == expected


# --- the two implementations on decades of synthetic data --------------------------------


def _compare(
    series: Series, first_year: int, last_year: int, *, cold: bool
) -> list[hw.ExtremeEvent]:
    """Assert both implementations agree on the climatology and on every event."""
    clim = hw.climatology(
        series.dates,
        series.temps,
        baseline_years=(first_year, last_year),
        percentile=10.0 if cold else 90.0,
    )
    events = hw.detect(series.dates, series.temps, clim, cold=cold)
    seas, thresh, expected = simple_events(series, first_year, last_year, cold=cold)
    np.testing.assert_allclose(clim.seas_c, seas, rtol=0, atol=TOL_C)
    np.testing.assert_allclose(clim.thresh_c, thresh, rtol=0, atol=TOL_C)
    assert [(e.start, e.end) for e in events] == [
        (series.dates[int(x["first"])], series.dates[int(x["last"])]) for x in expected
    ]
    for got, want in zip(events, expected, strict=True):
        assert got.peak == series.dates[int(want["peak"])]
        assert got.duration_days == want["duration_days"]
        assert got.category == want["category"]
        for key in (
            "intensity_max_c",
            "intensity_mean_c",
            "intensity_var_c",
            "intensity_cumulative_c_days",
            "rate_onset_c_per_day",
            "rate_decline_c_per_day",
        ):
            assert getattr(got, key) == pytest.approx(want[key], abs=TOL_C), key
    return events


def _covering(events: list[hw.ExtremeEvent], start: dt.date, end: dt.date) -> hw.ExtremeEvent:
    found = [e for e in events if e.start <= start and e.end >= end]
    assert len(found) == 1, f"no single event covers the injected {start}..{end}"
    return found[0]


@pytest.mark.parametrize("seed", [3, 17, 2027])
def test_heatwaves_agree_on_forty_years_with_injected_events(seed: int) -> None:
    series = make_series(seed, 1981, 2020)
    events = _compare(series, 1981, 2010, cold=False)
    # The injected boxes (3.5 °C, about 4x the noise's standard deviation) are found, each
    # inside one event that starts and ends within a week of the box.
    assert len(events) >= len(series.injected)
    for box in series.injected:
        event = _covering(events, box.start, box.end)
        assert (box.start - event.start).days <= 7 and (event.end - box.end).days <= 7
        # Red noise (sd 0.7 °C, lag-1 correlation 0.85) can stay low through a whole box.
        assert event.intensity_max_c >= 0.5 * box.size_c
    # The background noise also makes some (shorter, weaker) events of its own.
    assert any(e.duration_days < 10 and e.category == "moderate" for e in events)


@pytest.mark.parametrize("seed", [5, 41])
def test_cold_spells_agree_on_forty_years_with_injected_events(seed: int) -> None:
    series = make_series(seed, 1981, 2020, cold=True)
    events = _compare(series, 1983, 2012, cold=True)
    assert len(events) >= len(series.injected)
    for box in series.injected:
        event = _covering(events, box.start, box.end)
        assert event.intensity_max_c <= 0.5 * box.size_c < 0
        assert event.rate_onset_c_per_day > 0 and event.rate_decline_c_per_day > 0


def test_events_at_both_ends_and_missing_days_agree() -> None:
    series = make_series(11, 1990, 2021, n_events=8, at_ends=True, missing=40)
    events = _compare(series, 1991, 2020, cold=False)
    assert events[0].start == series.dates[0]
    assert events[-1].end == series.dates[-1]
    assert np.isnan(series.temps).sum() == 40


def test_the_full_series_as_baseline_agrees() -> None:
    # Baseline = every year, which is what the CLI uses when --baseline-years is left out.
    series = make_series(29, 1985, 2016, n_events=10)
    _compare(series, 1985, 2016, cold=False)
