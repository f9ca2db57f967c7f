"""Analysis of a relay-feedback record: the settled limit cycle's period, triangle amplitude
and effective hysteresis, and the FOPDT model and SIMC gains they give.

Rules of this module
--------------------
- Pure: arrays in, numbers out; no I/O, no clock.
- The last cycles of the record are averaged on a common phase grid (noise falls as
  1/√cycles). On a lag-dominant thermal node (τ1 much longer than the cycle) the limit cycle
  of the water is a triangle; the probe's first-order lag delays it by its time constant and
  rounds its corners, and probe noise makes the relay switch early. Straight lines fitted to
  the middle of the averaged rising and falling ramps undo both: their intersections give
  the triangle's amplitude, their values at the switching instants the effective
  hysteresis. The delayed triangle is the exact limit cycle of a FOPDT plant whose dead time
  includes the probe lag, for which :func:`~controller.control.fopdt_from_relay` is exact.
- The period is the one :func:`~controller.control.relay_cycle` measures between rising
  switches; its raw amplitude (peak-to-peak of the noisy record) is kept for comparison.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from controller.control import (
    Fopdt,
    PidGains,
    fopdt_from_relay,
    relay_cycle,
    relay_ultimate_gain,
    simc,
)

__all__ = ["RelayAnalysis", "analyse_relay", "identify"]

F = NDArray[np.float64]

#: Phase grid of the averaged cycle, points per cycle.
_GRID = 400
#: Share of a ramp (between its extremes) left out at each end of the line fit, fraction.
_RAMP_TRIM = 0.2


@dataclass(frozen=True, kw_only=True)
class RelayAnalysis:
    """What the analysed cycles of a relay record show.

    Attributes
    ----------
    period_s
        Mean period between rising switches, s (from :func:`relay_cycle`).
    amplitude_c
        Half the peak-to-peak of the triangle through the averaged cycle's ramps, °C.
    raw_amplitude_c
        Half the raw peak-to-peak of the record (noise and corner rounding included), °C.
    hysteresis_c
        Effective hysteresis: the ramps' distance from the centre at the switches, °C.
    rise_c_per_s, fall_c_per_s
        Slopes of the heating and cooling ramps, °C s⁻¹.
    asymmetry
        Mean (t_heat − t_cool)/(t_heat + t_cool) of the cycles, dimensionless.
    cycles
        Cycles analysed, dimensionless.
    """

    period_s: float
    amplitude_c: float
    raw_amplitude_c: float
    hysteresis_c: float
    rise_c_per_s: float
    fall_c_per_s: float
    asymmetry: float
    cycles: int


def _switches(u: F) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    high = u > 0.5 * (u.max() + u.min())
    rises = np.flatnonzero(~high[:-1] & high[1:]) + 1
    falls = np.flatnonzero(high[:-1] & ~high[1:]) + 1
    return rises, falls


def _line(phase: F, values: F, start: float, end: float) -> tuple[float, float]:
    """Least-squares line (slope per cycle, intercept) over the middle of [start, end]."""
    trim = _RAMP_TRIM * (end - start)
    pick = (phase >= start + trim) & (phase <= end - trim)
    if pick.sum() < 4:
        raise ValueError("a ramp of the limit cycle is too short to fit; sample faster")
    slope, intercept = np.polyfit(phase[pick], values[pick], 1)
    return float(slope), float(intercept)


def analyse_relay(t_s: ArrayLike, y_c: ArrayLike, u_pct: ArrayLike, cycles: int) -> RelayAnalysis:
    """Measure the settled limit cycle of a relay record (see the module's rules).

    Parameters
    ----------
    t_s
        Sample times, s, increasing.
    y_c
        Measured temperature at those times, °C.
    u_pct
        Relay output at those times (two levels), %.
    cycles
        Whole cycles at the end of the record to analyse, dimensionless (at least 2).

    Returns
    -------
    RelayAnalysis
        Period, triangle amplitude, effective hysteresis, ramp slopes and asymmetry.

    Raises
    ------
    ValueError
        Too few cycles, or no clean limit cycle (ramps that do not rise and fall).
    """
    t = np.asarray(t_s, dtype=float)
    y = np.asarray(y_c, dtype=float)
    u = np.asarray(u_pct, dtype=float)
    measured = relay_cycle(t, y, u, cycles)
    rises, falls = _switches(u)
    edges = rises[-cycles - 1 :]
    grid = np.arange(_GRID) / _GRID
    total = np.zeros(_GRID)
    fall_phase, asym = [], []
    for a, b in itertools.pairwise(edges):
        span = t[b] - t[a]
        total += np.interp(grid, (t[a : b + 1] - t[a]) / span, y[a : b + 1])
        inside = falls[(falls > a) & (falls < b)]
        if inside.size != 1:
            raise ValueError("a relay cycle switched more than twice; raise the hysteresis")
        heat = t[inside[0]] - t[a]
        fall_phase.append(heat / span)
        asym.append((2.0 * heat - span) / span)
    mean = total / len(fall_phase)
    pf = float(np.mean(fall_phase))
    low, high = float(grid[int(np.argmin(mean))]), float(grid[int(np.argmax(mean))])
    if high < low:
        high += 1.0
    phase2, mean2 = np.concatenate([grid, grid + 1.0]), np.concatenate([mean, mean])
    rise = _line(phase2, mean2, low, high)
    fall = _line(phase2, mean2, high, low + 1.0)
    if not (rise[0] > 0 > fall[0]):
        raise ValueError("the averaged cycle does not rise while heating and fall while cooling")
    # Triangle corners: the peak where the rise meets the fall, the trough where the rise
    # meets the previous cycle's fall (the fall line shifted back by one cycle).
    x_peak = (fall[1] - rise[1]) / (rise[0] - fall[0])
    x_trough = (fall[1] + fall[0] - rise[1]) / (rise[0] - fall[0])
    amplitude = 0.5 * (rise[0] * (x_peak - x_trough))
    at_fall = rise[0] * pf + rise[1]  # the rising ramp where heating switched off
    at_rise = fall[0] * 1.0 + fall[1]  # the falling ramp where heating switched on
    return RelayAnalysis(
        period_s=measured.period_s,
        amplitude_c=float(amplitude),
        raw_amplitude_c=measured.amplitude,
        hysteresis_c=float(max(0.0, 0.5 * (at_fall - at_rise))),
        rise_c_per_s=rise[0] / measured.period_s,
        fall_c_per_s=fall[0] / measured.period_s,
        asymmetry=float(np.mean(asym)),
        cycles=cycles,
    )


def identify(
    analysis: RelayAnalysis,
    relay_amplitude_pct: float,
    static_gain: float,
    period_s: float,
    tau_c_factor: float = 1.0,
) -> tuple[float, Fopdt, Fopdt, PidGains]:
    """Model and gains from an analysed relay cycle.

    Parameters
    ----------
    analysis
        The analysed limit cycle (°C, s).
    relay_amplitude_pct
        Relay amplitude d, % heater drive.
    static_gain
        Static gain k of the node, °C per % heater drive.
    period_s
        Control tick period the gains are for, s.
    tau_c_factor
        SIMC τc as a multiple of the control model's dead time, dimensionless.

    Returns
    -------
    tuple
        ``(ku, model, control_model, gains)``: the ultimate gain by the describing function
        (% per °C), the identified FOPDT (°C per %, s, s), the same with half a tick added
        to the dead time, and its SIMC gains (% per °C, s, s).
    """
    d, a, eps = relay_amplitude_pct, analysis.amplitude_c, analysis.hysteresis_c
    ku = relay_ultimate_gain(d, a, min(eps, 0.99 * a))
    model = fopdt_from_relay(d, a, analysis.period_s, static_gain, min(eps, 0.99 * a))
    control = Fopdt(gain=model.gain, tau_s=model.tau_s, theta_s=model.theta_s + period_s / 2.0)
    return ku, model, control, simc(control, tau_c_factor * control.theta_s)
