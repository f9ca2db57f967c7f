"""Marine heatwaves and cold spells (Hobday et al. 2016, 2018; Schlegel et al. 2017)."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from controller.errors import SquallError
from controller.science import heatwave as hw

DOY = np.arange(1, 367)


def flat_clim(seas: float = 20.0, thresh: float = 21.0, percentile: float = 90.0) -> hw.Climatology:
    return hw.Climatology(
        doy=DOY, seas_c=np.full(366, seas), thresh_c=np.full(366, thresh), percentile=percentile
    )


def days(n: int, start: str = "2021-01-01") -> pd.DatetimeIndex:
    return pd.date_range(start, periods=n, freq="D")


# --- event detection and metrics ------------------------------------------------------------


def test_synthetic_event_metrics_match_the_published_definition() -> None:
    # Synthetic check of the Hobday et al. (2016) metrics as the authors' reference code
    # computes them (reference notes §4, [computed]).
    temp = [20, 20, 21.5, 22, 23, 24, 22.5, 21.5, 20, 20]
    events = hw.detect(days(10), temp, flat_clim())
    assert len(events) == 1
    ev = events[0]
    assert (ev.start, ev.end, ev.peak) == (
        dt.date(2021, 1, 3),
        dt.date(2021, 1, 8),
        dt.date(2021, 1, 6),
    )
    assert ev.duration_days == 6
    assert ev.intensity_max_c == pytest.approx(4.0)
    assert ev.intensity_mean_c == pytest.approx(2.41667, abs=5e-6)
    assert ev.intensity_cumulative_c_days == pytest.approx(14.5)
    assert ev.intensity_var_c == pytest.approx(np.std([1.5, 2, 3, 4, 2.5, 1.5]))
    assert ev.rate_onset_c_per_day == pytest.approx(0.928571, abs=5e-7)
    assert ev.rate_decline_c_per_day == pytest.approx(1.3)
    assert ev.category == "extreme"  # 4× (thresh − seas): category IV, Hobday et al. (2018)


def test_event_json_has_the_documented_keys() -> None:
    (ev,) = hw.detect(days(10), [20, 20, 21.5, 22, 23, 24, 22.5, 21.5, 20, 20], flat_clim())
    data = ev.to_json_dict()
    required = {
        "start",
        "end",
        "duration_days",
        "intensity_max_c",
        "intensity_mean_c",
        "intensity_cumulative_c_days",
        "rate_onset_c_per_day",
        "rate_decline_c_per_day",
        "category",
    }
    assert required <= set(data) <= required | {"peak", "intensity_var_c"}
    assert data["start"] == "2021-01-03" and data["end"] == "2021-01-08"
    assert data["category"] == "extreme" and type(data["category"]) is str
    assert json.loads(json.dumps(data)) == data


def _pattern(*runs: tuple[int, bool]) -> list[float]:
    """Lead-in day, then runs of (length, hot), then a trailing cool day."""
    temps = [20.0]
    for length, hot in runs:
        temps += [22.0 if hot else 20.0] * length
    return [*temps, 20.0]


def test_runs_separated_by_two_days_join_into_one_event() -> None:
    # Hobday et al. (2016): gaps of <= 2 days join events; the gap days count in the event.
    temps = _pattern((5, True), (2, False), (5, True))
    (ev,) = hw.detect(days(len(temps)), temps, flat_clim())
    assert ev.duration_days == 12
    assert ev.start == dt.date(2021, 1, 2) and ev.end == dt.date(2021, 1, 13)
    assert ev.intensity_cumulative_c_days == pytest.approx(20.0)  # 10 hot days at +2, 2 at 0


def test_a_three_day_gap_leaves_two_events() -> None:
    temps = _pattern((5, True), (3, False), (5, True))
    events = hw.detect(days(len(temps)), temps, flat_clim())
    assert [e.duration_days for e in events] == [5, 5]


def test_short_runs_are_dropped_before_joining() -> None:
    # Hobday et al. (2016) reference code: 4 days + 1-day gap + 5 days -> one 5-day event.
    temps = _pattern((4, True), (1, False), (5, True))
    (ev,) = hw.detect(days(len(temps)), temps, flat_clim())
    assert ev.duration_days == 5 and ev.start == dt.date(2021, 1, 7)


def test_join_options_are_honoured() -> None:
    temps = _pattern((3, True), (1, False), (3, True))
    assert hw.detect(days(len(temps)), temps, flat_clim()) == []
    (ev,) = hw.detect(days(len(temps)), temps, flat_clim(), min_duration_days=3, max_gap_days=1)
    assert ev.duration_days == 7
    assert (
        len(hw.detect(days(len(temps)), temps, flat_clim(), min_duration_days=3, max_gap_days=0))
        == 2
    )


def test_threshold_must_be_exceeded_strictly() -> None:
    temps = [20.0, *([21.0] * 6), 20.0]  # exactly at the threshold
    assert hw.detect(days(len(temps)), temps, flat_clim()) == []


def test_a_missing_day_takes_the_climatology_and_breaks_a_run() -> None:
    temps = [20.0, 22, 22, 22, 22, 22, np.nan, 22, 22, 22, 22, 22, 20.0]
    (ev,) = hw.detect(days(len(temps)), temps, flat_clim(), max_gap_days=2)
    assert ev.duration_days == 11 and ev.intensity_cumulative_c_days == pytest.approx(20.0)
    assert len(hw.detect(days(len(temps)), temps, flat_clim(), max_gap_days=0)) == 2
    # A date absent from the input is a missing day too.
    sparse = days(len(temps)).delete(6)
    kept = [t for i, t in enumerate(temps) if i != 6]
    assert hw.detect(sparse, kept, flat_clim(), max_gap_days=0) == hw.detect(
        days(len(temps)), temps, flat_clim(), max_gap_days=0
    )


def test_rates_at_the_ends_of_the_series() -> None:
    # The reference code measures from the first/last day when the event touches the series'
    # ends, and over one day when the peak is that day.
    temps = [23.0, 22.0, 22.0, 22.0, 24.0]
    (ev,) = hw.detect(days(5), temps, flat_clim())
    assert ev.peak == dt.date(2021, 1, 5)
    assert ev.rate_onset_c_per_day == pytest.approx((4.0 - 3.0) / 4)
    assert ev.rate_decline_c_per_day == pytest.approx(0.0)


def test_input_order_does_not_matter_and_repeats_are_refused() -> None:
    temps = np.array([20, 20, 21.5, 22, 23, 24, 22.5, 21.5, 20, 20])
    order = np.random.default_rng(3).permutation(10)
    assert hw.detect(days(10)[order], temps[order], flat_clim()) == hw.detect(
        days(10), temps, flat_clim()
    )
    with pytest.raises(SquallError, match="more than once"):
        hw.detect(days(10).append(days(1)), [*temps, 20.0], flat_clim())


def test_detect_refuses_a_threshold_on_the_wrong_side() -> None:
    with pytest.raises(SquallError, match="cold spells need"):
        hw.detect(days(10), np.full(10, 20.0), flat_clim(), cold=True)
    with pytest.raises(SquallError, match="heatwaves need"):
        hw.detect(days(10), np.full(10, 20.0), flat_clim(20.0, 19.0, percentile=10.0))
    with pytest.raises(SquallError, match="minimum duration"):
        hw.detect(days(10), np.full(10, 20.0), flat_clim(), min_duration_days=0)


# --- categories -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("multiple", "name"),
    [
        # Hobday et al. (2018): I 1–2×, II 2–3×, III 3–4×, IV >= 4× of (thresh − seas).
        (1.0, "moderate"),
        (1.999, "moderate"),
        (2.0, "strong"),
        (2.999, "strong"),
        (3.0, "severe"),
        (3.999, "severe"),
        (4.0, "extreme"),
        (9.5, "extreme"),
    ],
)
def test_category_boundaries(multiple: float, name: str) -> None:
    assert hw.category_name(multiple) == name
    assert hw.CATEGORY_MULTIPLES[name] <= multiple


def test_category_multiple_and_its_limits() -> None:
    assert hw.category_multiple(23.0, 20.0, 21.0) == pytest.approx(3.0)
    assert hw.category_multiple(17.0, 20.0, 19.0) == pytest.approx(3.0)  # cold spell
    assert hw.CATEGORY_MULTIPLES == {"moderate": 1, "strong": 2, "severe": 3, "extreme": 4}
    with pytest.raises(SquallError, match="below 1"):
        hw.category_name(0.99)
    with pytest.raises(SquallError, match="equals the climatology"):
        hw.category_multiple(22.0, 20.0, 20.0)


@pytest.mark.parametrize(
    ("peak_c", "name"), [(21.9, "moderate"), (22.0, "strong"), (23.5, "severe")]
)
def test_event_takes_its_highest_daily_category(peak_c: float, name: str) -> None:
    temps = [20.0, 21.5, 21.5, peak_c, 21.5, 21.5, 20.0]
    (ev,) = hw.detect(days(7), temps, flat_clim())
    assert ev.category == name


# --- cold spells ----------------------------------------------------------------------------


def _seasonal_series(
    seed: int, start: str = "1990-01-01", end: str = "1999-12-31"
) -> tuple[pd.DatetimeIndex, np.ndarray]:
    dates = pd.date_range(start, end, freq="D")
    rng = np.random.default_rng(seed)
    doy = dates.day_of_year.to_numpy()
    noise = np.convolve(rng.normal(0.0, 1.0, len(dates) + 9), np.ones(10) / 3.0, mode="valid")
    temps = 15.0 + 4.0 * np.sin(2 * np.pi * (doy - 100) / 365.25) + noise
    return dates, temps


def test_cold_spells_mirror_heatwaves_of_the_negated_series() -> None:
    # Schlegel et al. (2017): cold spells are the same algorithm below the 10th percentile.
    dates, temps = _seasonal_series(7)
    cold_clim = hw.climatology(dates, temps, percentile=10.0)
    mirror_clim = hw.climatology(dates, -temps, percentile=90.0)
    np.testing.assert_allclose(cold_clim.thresh_c, -mirror_clim.thresh_c, atol=1e-12)
    np.testing.assert_allclose(cold_clim.seas_c, -mirror_clim.seas_c, atol=1e-12)
    spells = hw.detect(dates, temps, cold_clim, cold=True)
    mirrored = hw.detect(dates, -temps, mirror_clim)
    assert len(spells) == len(mirrored) >= 3
    for c, m in zip(spells, mirrored, strict=True):
        assert (c.start, c.end, c.peak, c.duration_days) == (
            m.start,
            m.end,
            m.peak,
            m.duration_days,
        )
        assert c.intensity_max_c == pytest.approx(-m.intensity_max_c)
        assert c.intensity_mean_c == pytest.approx(-m.intensity_mean_c)
        assert c.intensity_cumulative_c_days == pytest.approx(-m.intensity_cumulative_c_days)
        assert c.intensity_var_c == pytest.approx(m.intensity_var_c)
        assert c.rate_onset_c_per_day == pytest.approx(m.rate_onset_c_per_day)
        assert c.rate_decline_c_per_day == pytest.approx(m.rate_decline_c_per_day)
        assert c.category == m.category
        assert c.intensity_max_c < 0.0 and c.intensity_cumulative_c_days < 0.0


def test_synthetic_cold_spell() -> None:
    temps = [20, 20, 18.5, 18, 17, 16, 17.5, 18.5, 20, 20]
    (ev,) = hw.detect(days(10), temps, flat_clim(20.0, 19.0, percentile=10.0), cold=True)
    assert ev.duration_days == 6 and ev.category == "extreme"
    assert ev.intensity_max_c == pytest.approx(-4.0)
    assert ev.intensity_cumulative_c_days == pytest.approx(-14.5)
    assert ev.rate_onset_c_per_day == pytest.approx(0.928571, abs=5e-7)


# --- climatology ----------------------------------------------------------------------------


def _loop_climatology(
    dates: pd.DatetimeIndex,
    temps: np.ndarray,
    y0: int,
    y1: int,
    pct: float,
    half: int,
    width: int,
) -> tuple[np.ndarray, np.ndarray]:
    """Direct transcription of the method (reference notes §4), one day of year at a time."""
    index = pd.DatetimeIndex(dates)
    doy = index.day_of_year.to_numpy() + ((~index.is_leap_year) & (index.month > 2))
    years = index.year.to_numpy()
    seas = np.zeros(366)
    thresh = np.zeros(366)
    for d in range(1, 367):
        if d == 60:
            continue
        centres = np.flatnonzero((doy == d) & (years >= y0) & (years <= y1))
        picks = [c + w for c in centres for w in range(-half, half + 1)]
        picks = [p for p in picks if 0 <= p < len(temps)]
        pool = temps[picks]
        pool = pool[~np.isnan(pool)]
        seas[d - 1] = pool.mean()
        thresh[d - 1] = np.percentile(pool, pct)
    for arr in (seas, thresh):
        arr[59] = 0.5 * (arr[58] + arr[60])
    smooth = []
    for arr in (seas, thresh):
        out = np.empty(366)
        for i in range(366):
            out[i] = np.mean([arr[(i + k) % 366] for k in range(-(width // 2), width // 2 + 1)])
        smooth.append(out)
    return smooth[0], smooth[1]


def test_climatology_equals_a_day_by_day_transcription_of_the_method() -> None:
    dates, temps = _seasonal_series(11, "1991-03-10", "1999-10-20")
    temps[np.random.default_rng(5).random(temps.size) < 0.05] = np.nan
    keep = np.ones(temps.size, bool)
    keep[400:420] = False  # a gap in the dates themselves
    clim = hw.climatology(dates[keep], temps[keep], baseline_years=(1992, 1998))
    seas, thresh = _loop_climatology(dates, np.where(keep, temps, np.nan), 1992, 1998, 90, 5, 31)
    np.testing.assert_allclose(clim.seas_c, seas, rtol=0, atol=1e-10)
    np.testing.assert_allclose(clim.thresh_c, thresh, rtol=0, atol=1e-10)
    assert clim.percentile == 90.0
    np.testing.assert_array_equal(clim.doy, DOY)


def _offset_series() -> tuple[pd.DatetimeIndex, np.ndarray]:
    """Three non-leap years: offset 0, 10, 20 °C by year plus 0.01 °C per ordinary day of year."""
    dates = pd.date_range("2021-01-01", "2023-12-31", freq="D")
    offsets = {2021: 0.0, 2022: 10.0, 2023: 20.0}
    temps = np.array([offsets[y] for y in dates.year]) + 0.01 * dates.day_of_year.to_numpy()
    return dates, temps


def test_climatology_pool_percentile_is_known_analytically() -> None:
    # Each 11-day × 3-year pool sorts into three year groups of 11 (offsets 10 °C apart, the
    # seasonal ramp spans 0.1 °C). With ordinary day k at the window centre the pool is
    # {o + 0.01·(k + j)}, j = −5..5: mean 10 + 0.01·k; numpy linear percentile at virtual index
    # 0.9·32 = 28.8, the 7th/8th values of the top group: 20 + 0.01·(k + 1.8);
    # 10th percentile at 3.2: 0.01·(k − 1.8).
    dates, temps = _offset_series()
    d = np.arange(61, 362)  # interior days after 29 Feb: ordinary day k = d − 1
    k = d - 1
    raw = hw.climatology(dates, temps, smooth_width_days=1)
    np.testing.assert_allclose(raw.seas_c[d - 1], 10.0 + 0.01 * k, atol=1e-9)
    np.testing.assert_allclose(raw.thresh_c[d - 1], 20.0 + 0.01 * (k + 1.8), atol=1e-9)
    low = hw.climatology(dates, temps, percentile=10.0, smooth_width_days=1)
    np.testing.assert_allclose(low.thresh_c[d - 1], 0.01 * (k - 1.8), atol=1e-9)
    early = np.arange(6, 60)  # before 29 Feb the ordinary day equals the leap-calendar day
    np.testing.assert_allclose(raw.thresh_c[early - 1], 20.0 + 0.01 * (early + 1.8), atol=1e-9)
    # 29 Feb is the mean of 28 Feb and 1 Mar.
    assert raw.thresh_c[59] == pytest.approx(0.5 * (raw.thresh_c[58] + raw.thresh_c[60]))
    # A 31-day moving average leaves a straight line unchanged away from the bends.
    smooth = hw.climatology(dates, temps)
    d_in = np.arange(76, 347)
    np.testing.assert_allclose(smooth.thresh_c[d_in - 1], 20.0 + 0.01 * (d_in - 1 + 1.8), atol=1e-9)
    # Smoothing conserves the yearly mean (the average is periodic).
    assert smooth.seas_c.mean() == pytest.approx(raw.seas_c.mean(), abs=1e-9)


def test_climatology_at_maps_dates_through_the_leap_calendar() -> None:
    dates, temps = _offset_series()
    clim = hw.climatology(dates, temps, smooth_width_days=1)
    when = pd.DatetimeIndex(["2023-02-28", "2024-02-29", "2023-03-01", "2024-03-01", "2023-12-31"])
    seas, thresh = clim.at(when)
    assert seas[0] == clim.seas_c[58] and seas[1] == clim.seas_c[59]
    assert seas[2] == seas[3] == clim.seas_c[60]
    assert thresh[4] == clim.thresh_c[365]
    np.testing.assert_array_equal(hw.leap_day_of_year(when), [59, 60, 61, 61, 366])


def test_climatology_baseline_and_option_errors() -> None:
    dates, temps = _offset_series()
    with pytest.raises(SquallError, match="outside the series"):
        hw.climatology(dates, temps, baseline_years=(1983, 2012))
    with pytest.raises(SquallError, match="backwards"):
        hw.climatology(dates, temps, baseline_years=(2023, 2021))
    with pytest.raises(SquallError, match="odd"):
        hw.climatology(dates, temps, smooth_width_days=30)
    with pytest.raises(SquallError, match="percentile"):
        hw.climatology(dates, temps, percentile=120.0)
    holey = temps.copy()
    holey[(dates.month == 6)] = np.nan
    with pytest.raises(SquallError, match="no value within"):
        hw.climatology(dates, holey)


def test_baseline_restricts_the_years_pooled() -> None:
    dates, temps = _offset_series()
    only_2022 = hw.climatology(dates, temps, baseline_years=(2022, 2022), smooth_width_days=1)
    d = np.arange(61, 362)
    np.testing.assert_allclose(only_2022.seas_c[d - 1], 10.0 + 0.01 * (d - 1), atol=1e-9)


def test_climatology_is_immutable_and_validated() -> None:
    clim = flat_clim()
    with pytest.raises(ValueError):
        clim.seas_c[0] = 5.0
    with pytest.raises(SquallError, match="366"):
        hw.Climatology(doy=DOY[:365], seas_c=np.zeros(365), thresh_c=np.zeros(365), percentile=90)


# --- CSV files ------------------------------------------------------------------------------


def write(tmp_path: Path, text: str, name: str = "series.csv") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_load_series_csv_reads_dates_temperatures_and_missing_values(tmp_path: Path) -> None:
    path = write(
        tmp_path,
        "# Saltmarrow Lagoon (fictional) logger\n"
        "site,date,temperature_c\n"
        "A,2021-07-01,18.5\n"
        "\n"
        "A,2021-07-02T00:00:00+02:00,\n"
        "A,2021-07-03,NaN\n"
        "A,2021-07-04,19.25\n",
    )
    dates, temps = hw.load_series_csv(path)
    assert list(dates.strftime("%Y-%m-%d")) == [
        "2021-07-01",
        "2021-07-02",
        "2021-07-03",
        "2021-07-04",
    ]
    np.testing.assert_array_equal(np.isnan(temps), [False, True, True, False])
    assert temps[3] == 19.25


@pytest.mark.parametrize(
    ("text", "line", "field", "words"),
    [
        (
            "date,temperature_c\n2021-07-01,18.5\n2021-07-02,warm\n",
            3,
            "temperature_c",
            "not a number",
        ),
        ("date,temperature_c\n2021-07-01,18.5\n\n2021-13-02,18\n", 4, "date", "ISO 8601"),
        ("date,temp\n2021-07-01,18.5\n", 1, "temperature_c", "no 'temperature_c' column"),
        ("date,temperature_c\n2021-07-01,18.5\n2021-07-01,18.7\n", 3, "date", "line 2"),
        ("date,temperature_c\n2021-07-01,inf\n", 2, "temperature_c", "finite"),
        ("date,temperature_c\n2021-07-01\n", 2, "temperature_c", "cells"),
        ("date,temperature_c\n", 1, None, "no data rows"),
        ("", 1, None, "empty"),
    ],
)
def test_load_series_csv_errors_name_the_line(
    tmp_path: Path, text: str, line: int, field: str | None, words: str
) -> None:
    path = write(tmp_path, text)
    with pytest.raises(SquallError) as info:
        hw.load_series_csv(path)
    err = info.value
    assert (err.file, err.line, err.field) == (str(path), line, field)
    assert words in err.message
    assert err.one_line().startswith(f"{path}:{line}: ")


def test_load_series_csv_missing_file(tmp_path: Path) -> None:
    with pytest.raises(SquallError, match="cannot read"):
        hw.load_series_csv(tmp_path / "absent.csv")


def test_climatology_csv_round_trip_and_365_day_tables(tmp_path: Path) -> None:
    dates, temps = _offset_series()
    clim = hw.climatology(dates, temps)
    path = tmp_path / "clim.csv"
    clim.to_frame().to_csv(path, index=False)
    loaded = hw.load_climatology_csv(path)
    np.testing.assert_allclose(loaded.thresh_c, clim.thresh_c)
    assert loaded.percentile == 90.0
    # 365 rows: 29 Feb is inserted as the mean of 28 Feb and 1 Mar.
    seas = np.arange(1, 366) * 0.1
    rows = "\n".join(f"{d},{s:.1f},{s + 1:.1f}" for d, s in zip(range(1, 366), seas, strict=True))
    short = write(tmp_path, "doy,seas_c,thresh_c\n" + rows + "\n", "clim365.csv")
    table = hw.load_climatology_csv(short)
    assert table.seas_c[58] == pytest.approx(5.9) and table.seas_c[60] == pytest.approx(6.0)
    assert table.seas_c[59] == pytest.approx(5.95) and table.seas_c[365] == pytest.approx(36.5)
    cold_rows = "\n".join(f"{d},10,9" for d in range(1, 367))
    cold = write(tmp_path, "doy,seas_c,thresh_c\n" + cold_rows + "\n", "cold.csv")
    assert hw.load_climatology_csv(cold).percentile == 10.0


@pytest.mark.parametrize(
    ("body", "line", "field", "words"),
    [
        ("1,10,11\n1,10,11\n", 3, "doy", "already appears on line 2"),
        ("1,10,x\n", 2, "thresh_c", "not a number"),
        ("0,10,11\n", 2, "doy", "outside"),
        ("1.5,10,11\n", 2, "doy", "whole day"),
        ("1,10,11\n2,10,11\n", 3, "doy", "needs 366"),
    ],
)
def test_load_climatology_csv_errors_name_the_line(
    tmp_path: Path, body: str, line: int, field: str, words: str
) -> None:
    path = write(tmp_path, "doy,seas_c,thresh_c\n" + body, "clim.csv")
    with pytest.raises(SquallError) as info:
        hw.load_climatology_csv(path)
    assert (info.value.line, info.value.field) == (line, field)
    assert words in info.value.message


def test_series_from_csv_feeds_climatology_and_detection(tmp_path: Path) -> None:
    dates, temps = _seasonal_series(2, "2000-01-01", "2004-12-31")
    temps[1500:1510] += 6.0  # an imposed 10-day warm anomaly
    path = tmp_path / "site.csv"
    pd.DataFrame({"date": dates.strftime("%Y-%m-%d"), "temperature_c": temps}).to_csv(
        path, index=False
    )
    d, t = hw.load_series_csv(path)
    clim = hw.climatology(d, t)
    events = hw.detect(d, t, clim)
    imposed = [e for e in events if e.start <= dates[1505].date() <= e.end]
    assert len(imposed) == 1 and imposed[0].duration_days >= 10
