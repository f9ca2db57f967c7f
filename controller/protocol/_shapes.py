"""Curved setpoint shapes tessellated into breakpoint tables with a stated maximum error.

Rules
-----
- Every function returns a :class:`Channel` over ``[t0_s, t1_s]`` whose end points are exact
  values of the curve, and whose linear interpolation deviates from the curve by at most the
  stated bound (tests check each bound by dense sampling):

  * daily cycle (24 h sinusoid, amplitude A): chords of phase width θ err by at most
    A·θ²/8; θ = 2π/n with n chosen so that this is <= ``tol`` (the compiler passes 0.01 °C
    for temperature and 0.01 cm s-1 for flow). Breakpoints sit on the daily maximum, so the
    peak is exact.
  * half-sine daylight (peak P, day length L): chords over L/n err by at most
    P·(π/n)²/8; n chosen so that this is <= ``tol_fraction``·P.
  * sun-driven daylight: PAR = s·max(sin(elevation), 0); on a grid of step h the error is at
    most s·b·ω²·h²/8 with b = cos(latitude) >= cos(latitude)·cos(declination) the amplitude of
    sin(elevation) over a day and ω = 2π/86400 s-1; h is chosen for <= ``tol_fraction`` of the
    lowest daily peak in the block (clamped to 30..900 s), and horizon crossings are inserted.
  * storm shading exp(-ΔKd(t)·z) with ΔKd ramping linearly: chords err by at most
    a²/(8 n²) with a = ΔKd·z; n chosen so that this is <= ``tol`` (dimensionless factor).
- Local clock: ``tod0_s`` is the local time of day (s after local midnight) at elapsed 0.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from datetime import datetime, timedelta

import numpy as np

from controller.protocol._channel import Channel, FloatArray
from controller.science.light import sun_elevation_deg

__all__ = [
    "DAY_S",
    "daily_cycle",
    "half_sine_days",
    "shading_ramp",
    "sun_days",
    "sun_scale",
]

DAY_S = 86_400.0
"""Seconds in a day, s."""

_OMEGA = 2.0 * math.pi / DAY_S


def _exact_on_grid(
    func: Callable[[FloatArray], FloatArray], grid: FloatArray, t0_s: float, t1_s: float
) -> Channel:
    inner = grid[(grid > t0_s) & (grid < t1_s)]
    times = np.concatenate(([t0_s], inner, [t1_s])) if t1_s > t0_s else np.array([t0_s])
    return Channel(times, func(times))


def daily_cycle(
    mean: float,
    amplitude: float,
    warmest_s: float,
    tod0_s: float,
    t0_s: float,
    t1_s: float,
    tol: float,
) -> Channel:
    """A 24 h sinusoid ``mean + amplitude·cos(ω(t_local - warmest))`` on ``[t0_s, t1_s]``.

    Parameters
    ----------
    mean, amplitude
        Daily mean and half range, variable's unit.
    warmest_s
        Local time of day of the maximum, s after midnight.
    tod0_s
        Local time of day at elapsed time 0, s after midnight.
    t0_s, t1_s
        Interval, s from the experiment start.
    tol
        Largest deviation of the breakpoint table from the sinusoid, variable's unit.

    Returns
    -------
    Channel
        Breakpoints on the daily maxima and evenly between them.
    """

    def func(t: FloatArray) -> FloatArray:
        return mean + amplitude * np.cos(_OMEGA * (t + tod0_s - warmest_s))

    if amplitude == 0:
        return _exact_on_grid(func, np.empty(0), t0_s, t1_s)
    theta = math.sqrt(8.0 * tol / amplitude)
    n = max(4, math.ceil(2.0 * math.pi / theta))
    step = DAY_S / n
    first_peak = warmest_s - tod0_s
    j0 = math.floor((t0_s - first_peak) / step)
    j1 = math.ceil((t1_s - first_peak) / step)
    grid = first_peak + step * np.arange(j0, j1 + 1, dtype=np.float64)
    return _exact_on_grid(func, grid, t0_s, t1_s)


def _day_starts(tod0_s: float, t0_s: float, t1_s: float) -> FloatArray:
    first = -tod0_s + DAY_S * math.floor((t0_s + tod0_s) / DAY_S)
    count = math.ceil((t1_s - first) / DAY_S) + 1
    return first + DAY_S * np.arange(count, dtype=np.float64)


def half_sine_days(
    peak: float,
    sunrise_s: float,
    sunset_s: float,
    tod0_s: float,
    t0_s: float,
    t1_s: float,
    tol_fraction: float,
) -> Channel:
    """Daylight as half a sine from sunrise to sunset each local day, dark otherwise.

    Parameters
    ----------
    peak
        PAR at the middle of the day, µmol photons m-2 s-1.
    sunrise_s, sunset_s
        Local clock times, s after midnight (sunrise < sunset).
    tod0_s
        Local time of day at elapsed time 0, s after midnight.
    t0_s, t1_s
        Interval, s from the experiment start.
    tol_fraction
        Largest deviation as a fraction of ``peak``, dimensionless.

    Returns
    -------
    Channel
        PAR breakpoints, µmol photons m-2 s-1.
    """
    length = sunset_s - sunrise_s
    n = max(2, math.ceil(math.pi / math.sqrt(8.0 * tol_fraction)))
    n += n % 2  # even: a breakpoint at midday keeps the peak exact

    def func(t: FloatArray) -> FloatArray:
        since = np.mod(t + tod0_s, DAY_S) - sunrise_s
        lit = (since > 0) & (since < length)
        value = peak * np.sin(np.pi * (np.clip(since, 0, length) / length))
        return np.where(lit, np.maximum(value, 0.0), 0.0)

    days = _day_starts(tod0_s, t0_s, t1_s)
    fractions = np.linspace(0.0, 1.0, n + 1)
    grid = (days[:, None] + sunrise_s + length * fractions[None, :]).ravel()
    return _exact_on_grid(func, grid, t0_s, t1_s)


def _sin_elevation(
    scenario_utc0: datetime, t_s: FloatArray, latitude_deg: float, longitude_deg: float
) -> FloatArray:
    base = np.datetime64(scenario_utc0.replace(tzinfo=None), "us")
    times = base + np.round(t_s * 1e6).astype("timedelta64[us]")
    return np.sin(np.radians(sun_elevation_deg(times, latitude_deg, longitude_deg)))


def sun_scale(
    scenario_utc0: datetime,
    tod0_s: float,
    t0_s: float,
    latitude_deg: float,
    longitude_deg: float,
    *,
    peak: float | None,
    dli_mol_m2_d: float | None,
) -> float:
    """Factor s in PAR = s·max(sin(elevation), 0), fitted on the local day containing ``t0_s``.

    Parameters
    ----------
    scenario_utc0
        UTC instant the experiment's elapsed 0 represents (zone-aware or naive UTC).
    tod0_s
        Local time of day at elapsed 0, s after midnight.
    t0_s
        Start of the daylight block, s from the experiment start.
    latitude_deg, longitude_deg
        Site, degrees north and east.
    peak
        Wanted PAR at the day's highest sun, µmol photons m-2 s-1; or
    dli_mol_m2_d
        wanted daily light integral of that day, mol photons m-2 d-1.

    Returns
    -------
    float
        Scale s, µmol photons m-2 s-1 (0 when the sun stays below the horizon that day).
    """
    day0 = float(_day_starts(tod0_s, t0_s, t0_s)[0])
    grid = day0 + np.arange(0.0, DAY_S + 1.0, 120.0)
    sin_e = np.clip(_sin_elevation(scenario_utc0, grid, latitude_deg, longitude_deg), 0, None)
    if peak is not None:
        top = float(sin_e.max())
        return peak / top if top > 0 else 0.0
    integral = float(np.trapezoid(sin_e, grid))
    return float(dli_mol_m2_d) * 1e6 / integral if integral > 0 else 0.0  # type: ignore[arg-type]


def sun_days(
    scale: float,
    scenario_utc0: datetime,
    t0_s: float,
    t1_s: float,
    latitude_deg: float,
    longitude_deg: float,
    tol_fraction: float,
) -> Channel:
    """PAR following the sun: ``scale·max(sin(elevation), 0)`` on ``[t0_s, t1_s]``.

    Parameters
    ----------
    scale
        From :func:`sun_scale`, µmol photons m-2 s-1.
    scenario_utc0
        UTC instant the experiment's elapsed 0 represents.
    t0_s, t1_s
        Interval, s from the experiment start.
    latitude_deg, longitude_deg
        Site, degrees north and east.
    tol_fraction
        Largest deviation as a fraction of the lowest daily peak in the interval.

    Returns
    -------
    Channel
        PAR breakpoints, µmol photons m-2 s-1; zero at night (no breakpoints inside nights).
    """
    coarse = np.arange(t0_s, t1_s + 600.0, 600.0)
    sin_coarse = _sin_elevation(scenario_utc0, coarse, latitude_deg, longitude_deg)
    lowest_peak = max(float(sin_coarse.max()), 1e-3)
    for start in np.arange(t0_s, t1_s, DAY_S):
        day = sin_coarse[(coarse >= start) & (coarse < start + DAY_S)]
        if day.size and day.max() > 0:
            lowest_peak = min(lowest_peak, float(day.max()))
    b = max(math.cos(math.radians(latitude_deg)), 1e-3)
    step = math.sqrt(8.0 * tol_fraction * lowest_peak / b) / _OMEGA
    step = min(max(step, 30.0), 900.0)
    count = max(1, math.ceil((t1_s - t0_s) / step))
    grid = np.linspace(t0_s, t1_s, count + 1)
    sin_e = _sin_elevation(scenario_utc0, grid, latitude_deg, longitude_deg)
    up = sin_e > 0
    change = np.nonzero(up[1:] != up[:-1])[0]
    fraction = sin_e[change] / (sin_e[change] - sin_e[change + 1])
    crossings = grid[change] + fraction * (grid[change + 1] - grid[change])
    times = np.concatenate((grid, crossings))
    values = np.concatenate((scale * np.clip(sin_e, 0, None), np.zeros(crossings.size)))
    order = np.argsort(times, kind="stable")
    times, values = times[order], values[order]
    dark = values == 0
    interior_dark = np.zeros(times.size, dtype=bool)
    interior_dark[1:-1] = dark[1:-1] & dark[:-2] & dark[2:]
    return Channel(times[~interior_dark], values[~interior_dark])


def shading_ramp(kd_z: float, t0_s: float, t1_s: float, rising: bool, tol: float) -> Channel:
    """Light factor exp(-ΔKd(t)·z) while ΔKd ramps linearly between 0 and its storm value.

    Parameters
    ----------
    kd_z
        Storm value of ΔKd·z, dimensionless (Kd rise, m-1, times depth, m).
    t0_s, t1_s
        Ramp interval, s from the experiment start.
    rising
        True while turbidity builds (factor falls from 1), False while it clears.
    tol
        Largest deviation of the factor from the exponential, dimensionless.

    Returns
    -------
    Channel
        Dimensionless factor breakpoints.
    """
    n = max(1, math.ceil(kd_z / math.sqrt(8.0 * tol)))
    fractions = np.linspace(0.0, 1.0, n + 1)
    level = fractions if rising else 1.0 - fractions
    return Channel(t0_s + (t1_s - t0_s) * fractions, np.exp(-kd_z * level))


def scenario_utc(scenario_start_local: datetime, utc_offset: timedelta) -> datetime:
    """UTC instant (naive) that the scenario's local start represents."""
    return scenario_start_local - utc_offset
