"""Sun-driven daylight: dark at night, centred on solar noon, within its tessellation bound."""

from __future__ import annotations

import datetime as dt

import astral
import astral.sun
import numpy as np
import pandas as pd
import pvlib
import pytest

from controller.protocol import LIGHT_TOL_FRACTION, daily_light_integral, sample

from ._build import compile_doc, document

D = 86400.0
LAT, LON = 46.9, -30.5  # invented point at sea (Saltmarrow Lagoon scenario)
# 00:00 local (UTC-02:00) on the reference date 2027-07-20
START = dt.datetime(2027, 7, 20, 2, 0, tzinfo=dt.UTC)


def sun_protocol(**light: float) -> dict[str, object]:
    return document(
        [{"kind": "hold", "value": 18.0}],
        light=[{"kind": "daylight", "source": "sun", **light}],
        duration="2d",
        utc_offset="-02:00",
        site={"latitude_deg": LAT, "longitude_deg": LON, "reference_date": "2027-07-20"},
    )


@pytest.fixture(scope="module")
def day_curve() -> tuple[np.ndarray, np.ndarray]:
    compiled = compile_doc(sun_protocol(peak=1500.0), start=START)
    t = np.arange(0.0, 2 * D, 30.0)
    return t, sample(compiled, t)["C1"]["par"]


def test_dark_at_night_and_lit_by_day(day_curve: tuple[np.ndarray, np.ndarray]) -> None:
    t, par = day_curve
    observer = astral.Observer(latitude=LAT, longitude=LON)
    sun = astral.sun.sun(observer, date=dt.date(2027, 7, 20))
    rise_s = (sun["sunrise"] - START).total_seconds()
    set_s = (sun["sunset"] - START).total_seconds()
    assert np.all(par >= 0.0)
    # astral's sunrise includes refraction (sun at -0.833°), so geometric daylight starts a few
    # minutes later: dark before astral sunrise and after astral sunset (astral 3.2)
    assert np.all(par[(t < rise_s) | ((t > set_s) & (t < D))] == 0.0)
    lit = t[(t < D) & (par > 0)]
    assert 0 < lit[0] - rise_s < 10 * 60
    assert 0 < set_s - lit[-1] < 10 * 60
    assert par[(t > rise_s + 1800) & (t < set_s - 1800)].min() > 0


def test_daylight_is_centred_on_solar_noon(day_curve: tuple[np.ndarray, np.ndarray]) -> None:
    t, par = day_curve
    first = t < D
    half = par[first] >= 0.5 * par[first].max()
    times = t[first][half]
    centre = START + dt.timedelta(seconds=float((times[0] + times[-1]) / 2))
    observer = astral.Observer(latitude=LAT, longitude=LON)
    noon = astral.sun.noon(observer, date=dt.date(2027, 7, 20))  # astral 3.2 solar noon
    assert abs((centre - noon).total_seconds()) < 3 * 60
    assert par[first].max() == pytest.approx(1500.0, rel=LIGHT_TOL_FRACTION)


def test_sun_tessellation_error_is_within_bound(day_curve: tuple[np.ndarray, np.ndarray]) -> None:
    t, par = day_curve
    times = pd.DatetimeIndex(START.replace(tzinfo=None) + pd.to_timedelta(t, unit="s"))
    elevation = pvlib.solarposition.get_solarposition(times, LAT, LON, method="nrel_numpy")[
        "elevation"
    ].to_numpy()
    shape = np.clip(np.sin(np.radians(elevation)), 0, None)
    # scale fitted on day 1 (the block's first local day): peak 1500 at the day's highest sun
    scale = 1500.0 / shape[t < D].max()
    assert np.max(np.abs(par - scale * shape)) <= LIGHT_TOL_FRACTION * 1500.0


def test_sun_daylight_by_dli_delivers_it_on_the_first_day() -> None:
    compiled = compile_doc(sun_protocol(dli_mol_m2_d=40.0), start=START)
    dli = daily_light_integral(compiled)["C1"]
    assert dli[0] == pytest.approx(40.0, rel=LIGHT_TOL_FRACTION)
    assert dli[1] == pytest.approx(40.0, rel=0.01)  # one day later the sun is a little lower
