"""Community oxygen metabolism and the dissolved-O2 balance of a chamber.

Rule: pure functions over arrays shaped ``(..., N)`` (N chambers); parameters come from
:class:`simulator._params.RackParams`. The balance is
dC/dt = (GPP(I, T) − R(T))·A/V − k·(C − C_sat(T)), where k (s⁻¹) is the flushing exchange
rate q/V plus surface re-aeration while the incubation is open, C_sat is air saturation at
the chamber's temperature and salinity (the inflow is air-saturated), and C never goes
below zero.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from simulator._params import RackParams
from simulator._physics import recurrence
from simulator._science import light_limited, log_arrhenius_per_ev

__all__ = ["metabolism", "oxygen_segment"]

F = NDArray[np.float64]


def metabolism(par: F, temp_c: F, p: RackParams) -> tuple[F, F]:
    """Gross production and respiration of each chamber's community.

    Parameters
    ----------
    par
        PAR at the community, µmol photons m⁻² s⁻¹, shape ``(..., N)``.
    temp_c
        Water temperature, °C, shape ``(..., N)``.
    p
        Resolved rack parameters.

    Returns
    -------
    tuple of numpy.ndarray
        (GPP, R), both µmol O2 m⁻² h⁻¹.

    Notes
    -----
    GPP = gpp_max·tanh(I/Ik)·A(T; ea_gpp) (Jassby & Platt 1976) and R = resp·A(T; ea_resp),
    with the Boltzmann–Arrhenius factor A(T; E) = exp((E/k)(1/T_ref − 1/T)). Above
    ``stress_threshold_c`` by ΔT, GPP is multiplied by max(0, 1 − loss·ΔT) and R by
    (1 + gain·ΔT): a linear, documented stand-in for heat damage, not a published model.
    """
    per_ev = log_arrhenius_per_ev(temp_c, p.t_ref_c)
    gpp = light_limited(par, p.gpp_max_umol_m2_h, p.ik_umol_m2_s) * np.exp(p.ea_gpp_ev * per_ev)
    resp = p.resp_umol_m2_h * np.exp(p.ea_resp_ev * per_ev)
    if np.isfinite(p.stress_threshold_c).any():
        excess = np.maximum(temp_c - p.stress_threshold_c, 0.0)
        gpp = gpp * np.maximum(1.0 - p.stress_gpp_loss_per_c * excess, 0.0)
        resp = resp * (1.0 + p.stress_resp_gain_per_c * excess)
    return gpp, resp


def oxygen_segment(
    o2_0: F,
    temp_starts_c: F,
    par_starts: F,
    sat_starts_umol_l: F,
    exchange_per_s: F,
    volume_l: F,
    p: RackParams,
    h: float,
) -> F:
    """Dissolved O2 over n sub-steps with temperature and light held over each sub-step.

    Parameters
    ----------
    o2_0
        O2 at the segment start, µmol L⁻¹, shape ``(N,)``.
    temp_starts_c
        Water temperature at the start of each sub-step, °C, shape ``(n, N)``.
    par_starts
        PAR at the start of each sub-step, µmol photons m⁻² s⁻¹, shape ``(n, N)``.
    sat_starts_umol_l
        Air saturation at the start of each sub-step, µmol L⁻¹, shape ``(n, N)``.
    exchange_per_s
        Exchange rate with air-saturated water (flushing plus re-aeration), s⁻¹, ``(N,)``.
    volume_l
        Chamber water volume, L, shape ``(N,)``.
    p
        Resolved rack parameters (biology and area).
    h
        Sub-step length, s.

    Returns
    -------
    numpy.ndarray
        O2 at the end of each sub-step, µmol L⁻¹, shape ``(n, N)``.

    Notes
    -----
    Over a sub-step with source s and rate k held, the exact solution is
    C(h) = a·C(0) + (1 − a)·C_sat + φ·s with a = e^(−k·h) and φ = (1 − e^(−k·h))/k
    (φ = h when k = 0, a closed incubation).
    """
    gpp, resp = metabolism(par_starts, temp_starts_c, p)
    source = (gpp - resp) * (p.area_m2 / volume_l) / 3600.0
    kh = exchange_per_s * h
    a = np.exp(-kh)
    phi = np.where(kh > 0.0, -np.expm1(-kh) / np.where(kh > 0.0, exchange_per_s, 1.0), h)
    u = (1.0 - a) * sat_starts_umol_l + phi * source
    return recurrence(a, u, o2_0, floor=True)
