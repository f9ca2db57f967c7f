"""One segment of simulated time: every chamber stepped at once, no Python loop over steps.

Rule: a pure update function in the manner of a state-space model's ``update``: the water
state at the segment start and the inputs held over it go in, the state at the end and the
heat that flowed come out. Nothing here reads a clock, draws a random number or keeps state.
Within a segment, pump flow and water volume are constant; heater and chiller power may
change at sub-step boundaries (actuator changes arriving after their dead time), so each
thermal node is stepped with the exact solution of C·dT/dt = P_k − UA·(T − T_room) −
G·(T − T_in) for the power P_k held over sub-step k.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from simulator._oxygen import source_umol_l_s
from simulator._params import RackParams
from simulator._physics import Memo, first_order, lag_final, recurrence
from simulator._science import ArrheniusLine, SaturationTable

__all__ = ["Drive", "SegmentResult", "WaterState", "step_segment"]

F = NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class WaterState:
    """What the water and the sensors remember.

    Attributes
    ----------
    temp_c
        Temperature of each thermal node, °C, shape ``(M,)``.
    o2_umol_l
        Dissolved O2 of each chamber, µmol L⁻¹, shape ``(N,)``.
    probe_c
        Lagged temperature inside each chamber's probe, °C, shape ``(N,)``.
    optode_umol_l
        Lagged O2 inside each chamber's optode, µmol L⁻¹, shape ``(N,)``.
    warmth
        Lamp warm-up state, 0 (cold) to 1 (warm), dimensionless, shape ``(N,)``.
    """

    temp_c: F
    o2_umol_l: F
    probe_c: F
    optode_umol_l: F
    warmth: F


@dataclass(frozen=True, slots=True)
class Drive:
    """Inputs held over a segment (actuators after faults, water after leaks).

    Attributes
    ----------
    heater_w
        Heater power reaching each node in each sub-step, W, shape ``(n, M)``.
    chiller_w
        Heat removed by each node's chiller in each sub-step, W, shape ``(n, M)``.
    lit
        1 where the lamp is on, else 0, dimensionless, shape ``(N,)``.
    par_warm
        PAR the lamp gives when warm (drive and age applied), µmol m⁻² s⁻¹, shape ``(N,)``.
    flush_w_k
        Flushing heat flow q·ρ·cp of each node, W K⁻¹, shape ``(M,)``.
    exchange_per_s
        O2 exchange with air-saturated water (flushing plus re-aeration), s⁻¹, ``(N,)``.
    capacity_j_k
        Heat capacity of each node, J K⁻¹, shape ``(M,)``.
    volume_l
        Water in each chamber, L, shape ``(N,)``.
    """

    heater_w: F
    chiller_w: F
    lit: F
    par_warm: F
    flush_w_k: F
    exchange_per_s: F
    capacity_j_k: F
    volume_l: F


@dataclass(frozen=True, slots=True)
class SegmentResult:
    """State at the segment end and the heat exchanged during it (J, shape ``(M,)``)."""

    state: WaterState
    heater_j: F
    chiller_j: F
    room_loss_j: F
    flush_loss_j: F


def step_segment(
    state: WaterState,
    drive: Drive,
    p: RackParams,
    saturation: SaturationTable,
    arrhenius: ArrheniusLine,
    n: int,
    h: float,
    memo: Memo | None = None,
) -> SegmentResult:
    """Advance every chamber through ``n`` sub-steps of ``h`` seconds.

    Parameters
    ----------
    state
        Water and sensor state at the segment start.
    drive
        Inputs held over the segment.
    p
        Resolved rack parameters.
    saturation
        O2 saturation of each chamber's water as a function of temperature.
    arrhenius
        ln of the 1 eV Arrhenius factor of each chamber as a function of temperature.
    n
        Number of sub-steps, dimensionless (≥ 1).
    h
        Sub-step length, s.
    memo
        Cache of coefficients shared between segments of equal length.

    Returns
    -------
    SegmentResult
        The new state and the heat flows over the segment.

    Notes
    -----
    Thermal node, per sub-step with G_tot = UA + G, τ = C/G_tot, a = e^(−h/τ):
    T_k = a·T_(k−1) + (1 − a)·T∞_k with T∞_k = (P_k + UA·T_room + G·T_in)/G_tot, and the
    loss integrals ∫(T − X)dt = (T∞_k − X)·h + (T_(k−1) − T∞_k)·τ·(1 − a) summed over k.
    Oxygen holds temperature and light at their sub-step start values (see
    :func:`simulator._oxygen.source_umol_l_s`); sensor lags use a first-order hold.
    """
    node_of = p.node_of_chamber
    g_tot = p.ua_w_k + drive.flush_w_k
    tau = drive.capacity_j_k / g_tot
    keep = np.exp(-h / tau)
    fresh = 1.0 - keep
    base = p.ua_w_k * p.room_temperature_c + drive.flush_w_k * p.inflow_temperature_c
    t_inf = (drive.heater_w - drive.chiller_w + base) / g_tot
    temps = recurrence(keep, fresh * t_inf, state.temp_c, memo=memo)
    node_path = np.concatenate((state.temp_c[None, :], temps))
    sum_inf = t_inf.sum(axis=0)
    sum_start = node_path[:-1].sum(axis=0)
    transient = (sum_start - sum_inf) * tau * fresh
    room_loss = p.ua_w_k * ((sum_inf - n * p.room_temperature_c) * h + transient)
    flush_loss = drive.flush_w_k * ((sum_inf - n * p.inflow_temperature_c) * h + transient)

    path = node_path[:, node_of]
    starts = path[:-1]
    cold = p.cold_output_frac
    if (state.warmth == drive.lit).all():
        warmth_end = state.warmth
        par = drive.par_warm * (cold + (1.0 - cold) * state.warmth)
    else:
        warmth = first_order(state.warmth, drive.lit, p.warmup_tau_s, h, n)
        # a lamp within 1e-9 of fully warm (or cold) counts as settled
        warmth_end = np.where(np.abs(warmth[-1] - drive.lit) < 1e-9, drive.lit, warmth[-1])
        par = drive.par_warm * (cold + (1.0 - cold) * warmth[:-1])
    source = source_umol_l_s(par, starts, arrhenius(starts), drive.volume_l, p)
    kh = drive.exchange_per_s * h
    o2_keep = np.exp(-kh)
    phi = np.where(kh > 0.0, -np.expm1(-kh) / np.where(kh > 0.0, drive.exchange_per_s, 1.0), h)
    u = (1.0 - o2_keep) * saturation(starts) + phi * source
    o2 = recurrence(o2_keep, u, state.o2_umol_l, floor=True, memo=memo)

    n_ch = len(node_of)
    x = np.concatenate((path, np.concatenate((state.o2_umol_l[None, :], o2))), axis=1)
    lagged = lag_final(
        np.concatenate((state.probe_c, state.optode_umol_l)),
        x,
        np.concatenate((p.temperature_tau_s, p.optode_tau_s)),
        h,
        memo,
    )
    return SegmentResult(
        state=WaterState(
            temp_c=node_path[-1],
            o2_umol_l=o2[-1],
            probe_c=lagged[:n_ch],
            optode_umol_l=lagged[n_ch:],
            warmth=warmth_end,
        ),
        heater_j=drive.heater_w.sum(axis=0) * h,
        chiller_j=drive.chiller_w.sum(axis=0) * h,
        room_loss_j=room_loss,
        flush_loss_j=flush_loss,
    )
