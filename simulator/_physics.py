"""Pure stepping functions for a stretch of simulated time with constant actuator inputs.

Rule: no clock, no state, no randomness. Each function takes the state at the start of a
segment of ``n`` equal sub-steps of ``h`` seconds, inputs that are constant over the segment,
and returns the trajectory at the sub-step boundaries as arrays of shape ``(n + 1, ...)`` or
``(n, ...)``, so whole segments are computed at once instead of one Python step at a time.
The thermal node is linear with constant input, so its closed form
T(t) = T∞ + (T0 − T∞)·e^(−t/τ) is exact at any step length. Oxygen holds its driving
temperature and light over each sub-step (zero-order hold) and is integrated exactly under
that hold; sensor lags take their input as linear between sub-step boundaries (first-order
hold), which is exact for ramps.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

__all__ = [
    "ThermalSegment",
    "ageing_factor",
    "first_order",
    "lag_segment",
    "lamp_curve",
    "pump_fraction",
    "recurrence",
    "thermal_segment",
]

F = NDArray[np.float64]

_MIN_TAU_S = 1e-9
_MAX_EXPONENT = 500.0
_NEGLIGIBLE = 1e-15
_STEPS = np.arange(1, 3601, dtype=float)[:, None]


def recurrence(a: F, u: F, y0: F, *, floor: bool = False) -> F:
    """Solve y_k = a·y_(k−1) + u_k for k = 1..n, column by column, without a Python loop.

    Parameters
    ----------
    a
        Decay factor of each column, dimensionless, 0 ≤ a ≤ 1, shape ``(c,)``.
    u
        Input of each step, in the unit of ``y``, shape ``(n, c)``.
    y0
        Starting value of each column, shape ``(c,)``.
    floor
        When True, y never goes below 0 (y_k = max(0, a·y_(k−1) + u_k)).

    Returns
    -------
    numpy.ndarray
        y_1..y_n, shape ``(n, c)``, in the unit of ``y0``.

    Notes
    -----
    Uses y_k = a^k·(y0 + Σ_(j≤k) a^(−j)·u_j), cut into chunks short enough that a^(−j) stays
    below e^500. Columns with a ≤ 1e-15 forget their past within one step: y_k = u_k.
    With ``floor``, columns with a = 1 use the reflection y_k = x_k − min(0, min_(j≤k) x_j)
    of the unfloored sum x (exact); other columns that would dip below zero are stepped one
    by one.
    """
    n = u.shape[0]
    if a.size and a.min() > _NEGLIGIBLE:
        log_a = np.log(a)
        if -float(log_a.min()) * n <= _MAX_EXPONENT:
            growth = np.exp(_steps(n) * log_a)
            out = growth * (y0 + np.cumsum(u / growth, axis=0))
        else:
            out = _chunked(log_a, u, y0)
    else:
        instant = a <= _NEGLIGIBLE
        out = _chunked(np.log(np.where(instant, 1.0, a)), u, y0)
        out[:, instant] = u[:, instant]
    if floor and n and out.min() < 0.0:
        _apply_floor(a, u, np.asarray(y0, dtype=float), out)
    return np.asarray(out, dtype=float)


def _steps(n: int) -> F:
    """Column vector 1..n as floats (cached for the usual short segments)."""
    if n <= _STEPS.shape[0]:
        return _STEPS[:n]
    return np.arange(1, n + 1, dtype=float)[:, None]


def _chunked(log_a: F, u: F, y0: F) -> F:
    """The recurrence in chunks short enough that a^(−k) stays below e^500."""
    n = u.shape[0]
    worst = max(float(-log_a.min()), 1e-300)
    chunk = max(1, min(n, int(_MAX_EXPONENT / worst)))
    out = np.empty_like(u)
    start_value = np.asarray(y0, dtype=float)
    for lo in range(0, n, chunk):
        hi = min(n, lo + chunk)
        growth = np.exp(_steps(hi - lo) * log_a)
        out[lo:hi] = growth * (start_value + np.cumsum(u[lo:hi] / growth, axis=0))
        start_value = out[hi - 1]
    return out


def _apply_floor(a: F, u: F, y0: F, out: F) -> None:
    """Redo the columns of ``out`` that went negative with a floor at zero (in place)."""
    for col in np.flatnonzero((out < 0.0).any(axis=0)):
        if a[col] == 1.0:
            x = y0[col] + np.cumsum(u[:, col])
            out[:, col] = x - np.minimum(np.minimum.accumulate(x), 0.0)
            continue
        y = float(y0[col])
        ac = float(a[col])
        for k in range(u.shape[0]):
            y = max(0.0, ac * y + float(u[k, col]))
            out[k, col] = y


def first_order(y0: F, target: F, tau_s: F, h: float, n: int) -> F:
    """Closed-form first-order approach to a constant target at n + 1 sub-step boundaries.

    Parameters
    ----------
    y0
        Value at the segment start, any unit, shape ``(c,)``.
    target
        Constant value approached, same unit, shape ``(c,)``.
    tau_s
        Time constant, s, shape ``(c,)``; 0 means the target is reached at once.
    h
        Sub-step length, s.
    n
        Number of sub-steps, dimensionless.

    Returns
    -------
    numpy.ndarray
        Values at t = 0, h, …, n·h, shape ``(n + 1, c)``.
    """
    t = np.arange(n + 1, dtype=float)[:, None] * h
    decay = np.exp(-t / np.maximum(tau_s, _MIN_TAU_S))
    return np.asarray(target + (y0 - target) * decay, dtype=float)


def lag_segment(y0: F, x: F, tau_s: F, h: float) -> F:
    """First-order lag (sensor response) of an input that varies linearly over each sub-step.

    Parameters
    ----------
    y0
        Sensor value at the segment start, any unit, shape ``(c,)``.
    x
        Input at the sub-step boundaries t = 0, h, …, n·h, same unit, shape ``(n + 1, c)``.
    tau_s
        Time constant, s, shape ``(c,)``; 0 gives no lag.
    h
        Sub-step length, s.

    Returns
    -------
    numpy.ndarray
        Sensor values at the ends of the sub-steps, shape ``(n, c)``.

    Notes
    -----
    Exact for piecewise-linear input (first-order hold): with a = e^(−h/τ) and
    c = τ·(1 − a)/h, y_(k+1) = a·y_k + x_(k+1) − a·x_k − c·(x_(k+1) − x_k). A ramp of slope r
    is therefore followed with the textbook steady lag r·τ.
    """
    tau = np.maximum(tau_s, _MIN_TAU_S)
    a = np.exp(-h / tau)
    c = tau * -np.expm1(-h / tau) / h
    x0, x1 = x[:-1], x[1:]
    return recurrence(a, x1 - a * x0 - c * (x1 - x0), y0)


@dataclass(frozen=True, slots=True)
class ThermalSegment:
    """Result of :func:`thermal_segment`.

    Attributes
    ----------
    temperature_c
        Node temperature at t = 0, h, …, n·h, °C, shape ``(n + 1, M)``.
    room_loss_j
        Heat lost to the room over the segment, J, shape ``(M,)``.
    flush_loss_j
        Heat carried away by flushing over the segment, J, shape ``(M,)``.
    """

    temperature_c: F
    room_loss_j: F
    flush_loss_j: F


def thermal_segment(
    temp0_c: F,
    net_power_w: F,
    ua_w_k: F,
    flush_w_k: F,
    heat_capacity_j_k: F,
    room_c: float,
    inflow_c: float,
    h: float,
    n: int,
) -> ThermalSegment:
    """Exact solution of C·dT/dt = P − UA·(T − T_room) − G·(T − T_in) with constant inputs.

    Parameters
    ----------
    temp0_c
        Node temperature at the segment start, °C, shape ``(M,)``.
    net_power_w
        Heater power minus chiller heat removal reaching the water, W, shape ``(M,)``.
    ua_w_k
        Heat-loss coefficient to the room, W K⁻¹, shape ``(M,)``.
    flush_w_k
        Flushing heat flow q·ρ·cp, W K⁻¹, shape ``(M,)``.
    heat_capacity_j_k
        Heat capacity C of each node, J K⁻¹, shape ``(M,)``.
    room_c
        Room temperature, °C.
    inflow_c
        Temperature of the flushing inflow, °C.
    h
        Sub-step length, s.
    n
        Number of sub-steps, dimensionless.

    Returns
    -------
    ThermalSegment
        Temperatures at the sub-step boundaries and the exact heat-loss integrals.

    Notes
    -----
    With G_tot = UA + G: T∞ = (P + UA·T_room + G·T_in)/G_tot and τ = C/G_tot. The loss
    integrals use ∫(T − X)dt = (T∞ − X)·Δt + (T0 − T∞)·τ·(1 − e^(−Δt/τ)).
    """
    g_tot = ua_w_k + flush_w_k
    t_inf = (net_power_w + ua_w_k * room_c + flush_w_k * inflow_c) / g_tot
    tau = heat_capacity_j_k / g_tot
    temps = first_order(temp0_c, t_inf, tau, h, n)
    span = n * h
    transient = (temp0_c - t_inf) * tau * -np.expm1(-span / tau)
    room = ua_w_k * ((t_inf - room_c) * span + transient)
    flush = flush_w_k * ((t_inf - inflow_c) * span + transient)
    return ThermalSegment(temperature_c=temps, room_loss_j=room, flush_loss_j=flush)


def lamp_curve(drive_pct: F, par_at_full: F, shape: F) -> F:
    """Lamp calibration: PAR of a new, warm lamp at a drive.

    Parameters
    ----------
    drive_pct
        Lamp drive, %, 0–100.
    par_at_full
        PAR at 100 % drive, µmol photons m⁻² s⁻¹.
    shape
        Saturation k of the curve, dimensionless; 0 = linear.

    Returns
    -------
    numpy.ndarray
        PAR, µmol photons m⁻² s⁻¹: par_at_full·(1 − e^(−k·d/100))/(1 − e^(−k)).
    """
    frac = np.clip(drive_pct, 0.0, 100.0) / 100.0
    k = np.where(shape > 1e-9, shape, 1.0)
    curved = np.expm1(-k * frac) / np.expm1(-k)
    return np.asarray(par_at_full * np.where(shape > 1e-9, curved, frac), dtype=float)


def ageing_factor(lamp_hours_h: F, loss_frac_per_1000_h: F) -> F:
    """Fraction of its new output an aged lamp still gives.

    Parameters
    ----------
    lamp_hours_h
        Hours lit, h.
    loss_frac_per_1000_h
        Fractional output loss per 1000 h lit, fraction.

    Returns
    -------
    numpy.ndarray
        (1 − loss)^(hours/1000), fraction.
    """
    return np.asarray((1.0 - loss_frac_per_1000_h) ** (lamp_hours_h / 1000.0), dtype=float)


def pump_fraction(drive_pct: F, dead_band_pct: F) -> F:
    """Share of full flow a pump gives at a drive (linear above a dead band).

    Parameters
    ----------
    drive_pct
        Pump drive, %, 0–100.
    dead_band_pct
        Drive below which the pump does not turn, %.

    Returns
    -------
    numpy.ndarray
        max(0, d − d0)/(100 − d0), fraction of full flow.
    """
    d = np.clip(drive_pct, 0.0, 100.0)
    return np.asarray(np.maximum(d - dead_band_pct, 0.0) / (100.0 - dead_band_pct), dtype=float)
