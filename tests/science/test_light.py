"""Sun elevation, half-sine days, daily light integral and Beer–Lambert attenuation."""

from __future__ import annotations

import datetime as dt
import math

import astral
import astral.sun
import numpy as np
import pandas as pd
import pytest

from controller.errors import SquallError
from controller.science import light


# Solar elevation check values: pvlib 0.16 SPA (Reda & Andreas 2004), geometric elevation,
# as tabulated in the project's reference notes ([computed] with pvlib).
@pytest.mark.parametrize(
    ("when_utc", "lat", "lon", "expected_deg"),
    [
        ("2021-06-21T12:00", 50.0, 0.0, 63.4334),
        ("2021-12-21T04:00", -31.95, 115.86, 80.8993),
        ("2021-03-20T12:00", 0.0, 0.0, 88.1472),
    ],
)
def test_sun_elevation_matches_pvlib_spa_table(
    when_utc: str, lat: float, lon: float, expected_deg: float
) -> None:
    got = light.sun_elevation_deg(pd.DatetimeIndex([when_utc]), lat, lon)
    assert got.shape == (1,)
    assert got[0] == pytest.approx(expected_deg, abs=0.02)  # source: pvlib SPA


@pytest.mark.parametrize(
    ("lat", "lon"),
    [(50.0, 0.0), (-31.95, 115.86), (0.0, 0.0), (46.9, -30.5), (65.0, 20.0), (-70.0, -60.0)],
)
def test_sun_elevation_agrees_with_astral_without_refraction(lat: float, lon: float) -> None:
    # Irregular steps sample every season and every hour of the day, day and night.
    times = pd.date_range("2021-01-01", periods=120, freq="73h11min")
    ours = light.sun_elevation_deg(times, lat, lon)
    observer = astral.Observer(latitude=lat, longitude=lon)
    theirs = np.array(
        [
            # source: astral 3.2, astral.sun.elevation(with_refraction=False)
            astral.sun.elevation(
                observer, t.to_pydatetime().replace(tzinfo=dt.UTC), with_refraction=False
            )
            for t in times
        ]
    )
    assert np.all(np.abs(ours - theirs) < 0.05)
    assert ours.min() < -10.0 < 10.0 < ours.max()  # the sample really spans day and night


def test_sun_elevation_accepts_naive_aware_numpy_and_datetime_inputs() -> None:
    naive = pd.DatetimeIndex(["2021-06-21T12:00", "2021-06-21T18:30"])
    aware = naive.tz_localize("UTC").tz_convert("Etc/GMT-5")  # same instants, UTC+5 clock
    as_numpy = naive.to_numpy()
    as_datetimes = [t.to_pydatetime().replace(tzinfo=dt.UTC) for t in naive]
    reference = light.sun_elevation_deg(naive, 50.0, 0.0)
    for variant in (aware, as_numpy, as_datetimes):
        np.testing.assert_allclose(light.sun_elevation_deg(variant, 50.0, 0.0), reference)
    assert light.sun_elevation_deg(pd.DatetimeIndex([]), 50.0, 0.0).shape == (0,)


def test_sun_elevation_rejects_impossible_latitude() -> None:
    with pytest.raises(SquallError, match="latitude"):
        light.sun_elevation_deg(pd.DatetimeIndex(["2021-06-21"]), 95.0, 0.0)


def test_constant_light_dli() -> None:
    # 500 µmol m-2 s-1 for 12 h = 500·43200/1e6 (arithmetic; reference notes §6)
    assert light.dli_from_constant(500.0, 12.0) == pytest.approx(21.6, abs=1e-12)
    assert light.dli_from_constant(1.0, 24.0) == pytest.approx(0.0864, abs=1e-12)


def test_half_sine_dli_closed_form_and_sampled() -> None:
    # (2/π)·1000·43200/1e6 = 27.502 mol m-2 d-1 (arithmetic; reference notes §6)
    assert light.dli_of_half_sine(1000.0, 12.0) == pytest.approx(27.502, abs=5e-4)
    t_s = np.linspace(0.0, 86_400.0, 86_401)
    par = light.half_sine_daylight(t_s / 3600.0, 6.0, 18.0, 1000.0)
    assert light.daily_light_integral(t_s, par) == pytest.approx(27.502, abs=5e-4)


def test_half_sine_peak_for_dli_inverts_the_integral() -> None:
    peak = light.half_sine_peak_for_dli(27.502, 12.0)
    assert peak == pytest.approx(1000.0, rel=2e-5)
    assert light.dli_of_half_sine(peak, 12.0) == pytest.approx(27.502, rel=1e-12)


def test_half_sine_shape() -> None:
    hours = np.array([0.0, 5.9, 6.0, 9.0, 12.0, 15.0, 18.0, 18.1, 23.9, 24.0, 36.0])
    par = light.half_sine_daylight(hours, 6.0, 18.0, 800.0)
    expected = [0.0, 0.0, 0.0, 800 * math.sin(math.pi / 4), 800.0, 800 * math.sin(math.pi / 4)]
    np.testing.assert_allclose(par[:6], expected, atol=1e-9)
    assert par[6] == pytest.approx(0.0, abs=1e-9)
    assert par[7] == 0.0 and par[8] == 0.0 and par[9] == 0.0
    assert par[10] == pytest.approx(800.0)  # hours wrap modulo 24
    assert float(light.half_sine_daylight(12.0, 6.0, 18.0, 800.0)) == pytest.approx(800.0)


def test_half_sine_light_period_past_midnight_and_full_day() -> None:
    # Light from 20:00 to 08:00 peaks at 02:00.
    par = light.half_sine_daylight(np.array([2.0, 12.0, 21.0]), 20.0, 8.0, 100.0)
    np.testing.assert_allclose(par, [100.0, 0.0, 100.0 * math.sin(math.pi / 12)], atol=1e-9)
    full = light.half_sine_daylight(np.array([0.0, 6.0, 12.0]), 0.0, 24.0, 100.0)
    np.testing.assert_allclose(full, [0.0, 100.0 * math.sin(math.pi / 4), 100.0], atol=1e-9)


@pytest.mark.parametrize(
    ("sunrise", "sunset", "peak"), [(6.0, 6.0, 100.0), (6.0, 18.0, -1.0), (math.nan, 18.0, 1.0)]
)
def test_half_sine_rejects_bad_arguments(sunrise: float, sunset: float, peak: float) -> None:
    with pytest.raises(SquallError):
        light.half_sine_daylight(12.0, sunrise, sunset, peak)


def test_daily_light_integral_trapezoid_and_limits() -> None:
    # A 1-hour triangle up to 100 µmol m-2 s-1: area 0.5·3600·100 µmol m-2 = 0.18 mol m-2.
    assert light.daily_light_integral([0.0, 1800.0, 3600.0], [0.0, 100.0, 0.0]) == pytest.approx(
        0.18
    )
    assert light.daily_light_integral([0.0], [5.0]) == 0.0
    with pytest.raises(SquallError, match="24 h"):
        light.daily_light_integral([0.0, 90_000.0], [1.0, 1.0])
    with pytest.raises(SquallError, match="increasing"):
        light.daily_light_integral([0.0, 10.0, 5.0], [1.0, 1.0, 1.0])
    with pytest.raises(SquallError, match="equal length"):
        light.daily_light_integral([0.0, 10.0], [1.0])


def test_beer_lambert_check_values() -> None:
    # I(z)/I0 = exp(−Kd·z): exp(−1) = 0.367879, exp(−5) = 0.006738 (reference notes §6, Kirk)
    assert float(light.beer_lambert(1.0, 0.2, 5.0)) == pytest.approx(0.367879, abs=5e-7)
    assert float(light.beer_lambert(1.0, 1.0, 5.0)) == pytest.approx(0.006738, abs=5e-7)
    # The 1 % light depth is 4.605/Kd (reference notes §6).
    assert float(light.beer_lambert(100.0, 0.5, 4.60517 / 0.5)) == pytest.approx(1.0, rel=1e-5)
    np.testing.assert_allclose(
        light.beer_lambert(np.array([1000.0, 500.0]), 0.2, 5.0), [367.879441, 183.939721]
    )


def test_attenuation_factor_is_the_extra_beer_lambert_loss() -> None:
    factor = light.attenuation_factor(np.array([0.0, 1.2]), 1.2)
    np.testing.assert_allclose(factor, [1.0, math.exp(-1.44)])
    # Raising Kd from 0.3 to 1.5 m-1 at 1.2 m multiplies PAR by exp(−1.2·1.2).
    before = light.beer_lambert(600.0, 0.3, 1.2)
    after = light.beer_lambert(600.0, 1.5, 1.2)
    assert float(after) == pytest.approx(float(before * factor[1]))
    with pytest.raises(SquallError):
        light.attenuation_factor(-0.1, 1.0)
    with pytest.raises(SquallError):
        light.beer_lambert(1.0, 0.2, -1.0)
