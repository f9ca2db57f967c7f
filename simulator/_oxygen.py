"""Community oxygen metabolism: gross production and respiration of each chamber.

Rule: pure functions over arrays shaped ``(..., N)`` (N chambers); parameters come from
:class:`simulator._params.RackParams`. The chamber balance they feed is
dC/dt = (GPP(I, T) − R(T))·A/V − k·(C − C_sat(T)), where k (s⁻¹) is the flushing exchange
rate q/V plus surface re-aeration while the incubation is open, C_sat is air saturation at
the chamber's temperature and salinity (the inflow is air-saturated), and C never goes
below zero (see :mod:`simulator._step`).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from simulator._params import RackParams
from simulator._science import light_limited, log_arrhenius_per_ev

__all__ = ["metabolism", "rates_from_log_arrhenius", "source_umol_l_s"]

F = NDArray[np.float64]


def rates_from_log_arrhenius(par: F, temp_c: F, ln_a1: F, p: RackParams) -> tuple[F, F]:
    """Gross production and respiration given ln of the 1 eV Arrhenius factor.

    Parameters
    ----------
    par
        PAR at the community, µmol photons m⁻² s⁻¹, shape ``(..., N)``.
    temp_c
        Water temperature, °C, shape ``(..., N)``.
    ln_a1
        ln of the Boltzmann–Arrhenius factor at 1 eV for ``temp_c``, eV⁻¹, same shape.
    p
        Resolved rack parameters.

    Returns
    -------
    tuple of numpy.ndarray
        (GPP, R), both µmol O2 m⁻² h⁻¹.

    Notes
    -----
    GPP = gpp_max·tanh(I/Ik)·A(T; ea_gpp) (Jassby & Platt 1976) and R = resp·A(T; ea_resp),
    with the Boltzmann–Arrhenius factor A(T; E) = exp((E/k)(1/T_ref − 1/T)) = exp(E·ln A₁).
    Above ``stress_threshold_c`` by ΔT, GPP is multiplied by max(0, 1 − loss·ΔT) and R by
    (1 + gain·ΔT): a linear, documented stand-in for heat damage, not a published model.
    """
    gpp = light_limited(par, p.gpp_max_umol_m2_h, p.ik_umol_m2_s) * np.exp(p.ea_gpp_ev * ln_a1)
    resp = p.resp_umol_m2_h * np.exp(p.ea_resp_ev * ln_a1)
    if np.isfinite(p.stress_threshold_c).any():
        excess = np.maximum(temp_c - p.stress_threshold_c, 0.0)
        gpp = gpp * np.maximum(1.0 - p.stress_gpp_loss_per_c * excess, 0.0)
        resp = resp * (1.0 + p.stress_resp_gain_per_c * excess)
    return gpp, resp


def metabolism(par: F, temp_c: F, p: RackParams) -> tuple[F, F]:
    """Gross production and respiration of each chamber's community (exact evaluation).

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
        (GPP, R), both µmol O2 m⁻² h⁻¹; see :func:`rates_from_log_arrhenius`.
    """
    return rates_from_log_arrhenius(par, temp_c, log_arrhenius_per_ev(temp_c, p.t_ref_c), p)


def source_umol_l_s(par: F, temp_c: F, ln_a1: F, volume_l: F, p: RackParams) -> F:
    """Net O2 change the community causes in the chamber water.

    Parameters
    ----------
    par
        PAR at the community, µmol photons m⁻² s⁻¹, shape ``(..., N)``.
    temp_c
        Water temperature, °C, same shape.
    ln_a1
        ln of the 1 eV Arrhenius factor at ``temp_c``, eV⁻¹, same shape.
    volume_l
        Chamber water volume, L, shape ``(N,)``.
    p
        Resolved rack parameters.

    Returns
    -------
    numpy.ndarray
        (GPP − R)·A/V, µmol L⁻¹ s⁻¹.
    """
    gpp, resp = rates_from_log_arrhenius(par, temp_c, ln_a1, p)
    return np.asarray((gpp - resp) * (p.area_m2 / volume_l) / 3600.0, dtype=float)
