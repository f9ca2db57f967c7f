"""Pure stepping functions for stretches of simulated time.

Rule: no clock, no state, no randomness. The workhorses solve the linear recurrence every
exactly discretised first-order process reduces to, y_k = a_k·y_(k−1) + u_k, for many steps
at once instead of one Python step at a time: :func:`recurrence` for one segment with a
constant a (time along axis 0), :func:`series_recurrence` for a long series whose a may
change from step to step (chamber-major, time along the last axis). The rest are sensor-lag
weights and the actuator calibration curves.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray
from scipy.signal import lfilter

__all__ = [
    "aged_lamps",
    "ageing_factor",
    "apply_floor",
    "lag_weights",
    "lamp_curve",
    "pump_fraction",
    "recurrence",
    "series_recurrence",
    "water_exchange",
]

F = NDArray[np.float64]

_MIN_TAU_S = 1e-9
_MAX_EXPONENT = 500.0
_ONE = np.ones(1)
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
        apply_floor(a, u, np.asarray(y0, dtype=float), out)
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


def apply_floor(a: F, u: F, y0: F, out: F) -> None:
    """Redo the columns of ``out`` that went negative with a floor at zero (in place).

    Parameters
    ----------
    a
        Decay factor of each column, dimensionless, shape ``(c,)``.
    u
        Input of each step (unscaled, as in :func:`recurrence`), shape ``(n, c)``.
    y0
        Starting value of each column, shape ``(c,)``.
    out
        The unfloored solution y_1..y_n, shape ``(n, c)``; negative columns are replaced by
        the solution of y_k = max(0, a·y_(k−1) + u_k).
    """
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


def series_recurrence(
    a: F,
    u: F,
    y0: F,
    *,
    floor: bool = False,
    b0: F | None = None,
    b1: F | None = None,
    u0: F | None = None,
) -> F:
    """Solve y_k = a_k·y_(k−1) + b0_k·u_k + b1_k·u_(k−1) along the last axis, many rows at once.

    Parameters
    ----------
    a
        Decay factor of each row and step, dimensionless, 0 ≤ a ≤ 1, shape ``(c, L)``, or
        ``(c, 1)`` for a factor constant along each row.
    u
        Input of each step, shape ``(c, L)``.
    y0
        Value before the first step, shape ``(c,)``.
    floor
        When True, y never goes below 0 (y_k = max(0, …)), exactly.
    b0, b1
        Weights of the present and the previous input, shape ``(c, 1)`` or ``(c, L)``; None
        for b0 = 1 and b1 = 0 (then y_k = a_k·y_(k−1) + u_k).
    u0
        The input before the first step (for ``b1``), shape ``(c,)``.

    Returns
    -------
    numpy.ndarray
        y_1..y_L, shape ``(c, L)``, in the unit of ``y0``.

    Notes
    -----
    Rows whose coefficients are constant are filtered with ``scipy.signal.lfilter`` (the
    recurrence itself: u filtered by (b0 + b1·z⁻¹)/(1 − a·z⁻¹), its state started from
    a·y_0 + b1·u_0), one row per call, which is lfilter's fastest path. Other rows use
    y_k = P_k·(y_0 + Σ_(j≤k) v_j/P_j) with P_k = Π_(j≤k) a_j and v the weighted inputs, in
    chunks along which −ln P stays below 500 (a step that alone exceeds it is taken
    directly). The floor is exact: from the first step that goes negative, y stays 0 while
    the input is ≤ 0 and the recurrence restarts from 0 at the next positive input.
    """
    rows, length = u.shape
    out = np.empty((rows, length))
    if length == 0:
        return out
    y0 = np.asarray(y0, dtype=float)
    weighted = b0 is not None or b1 is not None
    if weighted:
        b0 = np.ones((rows, 1)) if b0 is None else b0
        b1 = np.zeros((rows, 1)) if b1 is None else b1
        x0 = np.zeros(rows) if u0 is None else np.asarray(u0, dtype=float)
    constant = _constant_rows(a)
    if weighted:
        constant &= _constant_rows(b0) & _constant_rows(b1)  # type: ignore[arg-type]
    for r in np.flatnonzero(constant):  # one row at a time: lfilter's 1-D path is fastest
        value = float(a[r, 0])
        if weighted:
            first, second = float(b0[r, 0]), float(b1[r, 0])  # type: ignore[index]
            state = [value * float(y0[r]) + second * float(x0[r])]
            out[r] = lfilter([first, second], [1.0, -value], u[r], zi=state)[0]
        else:
            out[r] = lfilter(_ONE, [1.0, -value], u[r], zi=[value * float(y0[r])])[0]
    varying = np.flatnonzero(~constant)
    if len(varying) or floor:
        inputs = _weighted(u, b0, b1, x0) if weighted else u
    if len(varying):
        a_v = np.broadcast_to(a, u.shape)[varying]
        with np.errstate(divide="ignore"):
            rate = -np.log(a_v)
        out[varying] = _chunked_series(a_v, rate, inputs[varying], y0[varying])
    if floor:
        for r in np.flatnonzero(out.min(axis=1) < 0.0):
            _floor_row(np.broadcast_to(a[r], (length,)), inputs[r], out[r])
    return out


def _constant_rows(x: F) -> NDArray[np.bool_]:
    """Rows of ``x`` (shape ``(c, 1)`` or ``(c, L)``) whose every value is the first."""
    if x.shape[1] == 1:
        return np.ones(x.shape[0], dtype=bool)
    return np.asarray((x == x[:, :1]).all(axis=1))


def _weighted(u: F, b0: F | None, b1: F | None, u0: F) -> F:
    """b0_k·u_k + b1_k·u_(k−1), with u_(−1) = u0."""
    out = u * b0
    previous = np.empty_like(u)
    previous[:, 0] = u0
    previous[:, 1:] = u[:, :-1]
    previous *= b1
    out += previous
    return np.asarray(out, dtype=float)


def _chunked_series(a: F, rate: F, u: F, y0: F) -> F:
    """:func:`series_recurrence` without floor or forgetful rows."""
    length = u.shape[1]
    worst = np.minimum(rate.max(axis=0), 2.0 * _MAX_EXPONENT)  # finite, so reach is too
    reach = np.cumsum(worst)
    out = np.empty_like(u)
    start = np.array(y0, dtype=float)
    lo = 0
    while lo < length:
        if worst[lo] > _MAX_EXPONENT:  # one step that forgets (nearly) everything
            start = a[:, lo] * start + u[:, lo]
            out[:, lo] = start
            lo += 1
            continue
        base = reach[lo - 1] if lo else 0.0
        hi = int(np.searchsorted(reach, base + _MAX_EXPONENT, side="right"))
        hi = max(lo + 1, min(hi, length))  # Σ worst over [lo, hi) ≤ 500
        growth = np.exp(-np.cumsum(rate[:, lo:hi], axis=1))
        acc = np.cumsum(u[:, lo:hi] / growth, axis=1)
        acc += start[:, None]
        acc *= growth
        out[:, lo:hi] = acc
        start = acc[:, -1].copy()
        lo = hi
    return out


def _floor_row(a: F, u: F, y: F) -> None:
    """Redo one row of :func:`series_recurrence` with its floor at 0, in place.

    From a step that went negative, y is 0 until the next positive input; from there the
    unfloored recurrence is solved forward in windows that double in length until it goes
    negative again, so each return to zero costs a few vectorised calls.
    """
    length = len(u)
    positive = np.flatnonzero(u > 0.0)
    i = int(np.argmax(y < 0.0))
    while True:
        nxt = int(np.searchsorted(positive, i + 1))
        if nxt == len(positive):
            y[i:] = 0.0
            return
        j = int(positive[nxt])
        y[i:j] = 0.0  # a·0 + u ≤ 0 keeps it at 0
        start, width, before = j, 64, np.zeros(1)
        while True:
            stop = min(length, start + width)
            part = series_recurrence(a[None, start:stop], u[None, start:stop], before)[0]
            below = np.flatnonzero(part < 0.0)
            if len(below):
                y[start : start + int(below[0])] = part[: int(below[0])]
                i = start + int(below[0])
                break
            y[start:stop] = part
            if stop == length:
                return
            start, width, before = stop, 2 * width, part[-1:]


def lag_weights(tau_s: F, h: float, n: int) -> tuple[F, F]:
    """Weights giving the end value of a first-order lag (sensor) over a segment.

    Parameters
    ----------
    tau_s
        Time constants, s, shape ``(c,)``; 0 means no lag.
    h
        Sub-step length, s.
    n
        Number of sub-steps, dimensionless.

    Returns
    -------
    tuple of numpy.ndarray
        a^n, shape ``(c,)``, and W_0..W_n, shape ``(n + 1, c)``, dimensionless: the sensor
        value at t = n·h is a^n·y0 + Σ_k W_k·x_k for input x at t = 0, h, …, n·h.

    Notes
    -----
    For input linear over each sub-step (first-order hold) the lag obeys exactly
    y_(k+1) = a·y_k + (1 − c)·x_(k+1) − (a − c)·x_k with a = e^(−h/τ) and c = τ(1 − a)/h,
    so a ramp of slope r is followed with the textbook steady lag r·τ. Unrolled, the end value
    is a^n·y0 + Σ_k W_k·x_k with fixed weights W.
    """
    tau = np.maximum(tau_s, _MIN_TAU_S)
    a = np.exp(-h / tau)
    c = tau * -np.expm1(-h / tau) / h
    power = np.exp(np.arange(n + 1, dtype=float)[:, None] * np.log(np.maximum(a, 1e-300)))
    power = np.where(a > 0.0, power, (np.arange(n + 1) == 0)[:, None].astype(float))
    weights = np.zeros((n + 1, len(a)))
    weights[1:] += (1.0 - c) * power[n - 1 :: -1]  # k = 1..n: a^(n−k)
    weights[:-1] -= (a - c) * power[n - 1 :: -1]  # k = 0..n−1: a^(n−k−1)
    return power[n], weights


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


def aged_lamps(
    lit_before_s: list[float],
    lit: F,
    new_par: list[float],
    since_s: float,
    keep_per_1000_h: list[float],
) -> tuple[list[float], list[float]]:
    """Lamp hours and aged warm PAR of every lamp when the lamps change, in plain floats.

    Parameters
    ----------
    lit_before_s
        Seconds each lamp had been lit at the previous change, s, N values.
    lit
        1 where the lamp was on since then, else 0, dimensionless, shape ``(N,)``.
    new_par
        PAR of each lamp when new and warm at its new drive, µmol photons m⁻² s⁻¹, N values.
    since_s
        Time since the previous change, s.
    keep_per_1000_h
        1 − fractional output loss per 1000 h lit of each lamp, fraction, N values.

    Returns
    -------
    tuple of list
        Seconds lit now (s), and PAR at the new drive and present age (µmol photons m⁻² s⁻¹):
        :func:`ageing_factor` applied with the same operations, one lamp at a time.
    """
    seconds = [done + on * since_s for done, on in zip(lit_before_s, lit.tolist(), strict=True)]
    par = [
        new * keep ** (s / 3600.0 / 1000.0)
        for new, keep, s in zip(new_par, keep_per_1000_h, seconds, strict=True)
    ]
    return seconds, par


def water_exchange(
    flush_l_s: list[float],
    volume_l: F,
    node_of: list[int],
    rho_cp_j_l_k: list[float],
    reaeration_per_s: list[float],
) -> tuple[list[float], list[float]]:
    """Flushing heat flow of each thermal node and O2 exchange of each chamber, in floats.

    Parameters
    ----------
    flush_l_s
        Fresh inflow into each chamber, L s⁻¹, N values.
    volume_l
        Water in each chamber, L, shape ``(N,)``.
    node_of
        Thermal node of each chamber (nodes numbered from 0), dimensionless, N values.
    rho_cp_j_l_k
        Volumetric heat capacity of each chamber's water, J L⁻¹ K⁻¹, N values.
    reaeration_per_s
        Surface re-aeration of each chamber while its incubation is open, s⁻¹, N values.

    Returns
    -------
    tuple of list
        q·ρ·cp summed per node in chamber order, as ``numpy.bincount`` sums (W K⁻¹, one
        value per node up to the highest in ``node_of``), and q/V plus re-aeration where
        water flows (s⁻¹, N values).
    """
    flush_w_k = [0.0] * (max(node_of, default=-1) + 1)
    exchange = []
    for node, flush, rho_cp, volume, aeration in zip(
        node_of, flush_l_s, rho_cp_j_l_k, volume_l.tolist(), reaeration_per_s, strict=True
    ):
        flush_w_k[node] += flush * rho_cp
        exchange.append(flush / volume + (aeration if flush > 0.0 else 0.0))
    return flush_w_k, exchange
