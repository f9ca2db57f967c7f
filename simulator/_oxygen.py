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
from simulator._science import (
    ArrheniusLine,
    light_limited,
    log_arrhenius_per_ev,
)

__all__ = ["Metabolism", "metabolism", "rates_from_log_arrhenius"]

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


class Metabolism:
    """Net O2 source of every chamber's community, arranged for many sub-steps at once.

    Arrays are chamber-major: temperatures ``(N, n)`` (n sub-steps), terms ``(N, 2, n)`` with
    production in row 0 and respiration in row 1.

    Parameters
    ----------
    p
        Resolved rack parameters.

    Notes
    -----
    The same model as :func:`rates_from_log_arrhenius`, arranged for speed. With the 1 eV
    Arrhenius line ln A₁ = slope/T + intercept of :class:`ArrheniusLine`, a rate at T is
    rate_ref·exp(E·intercept)·exp(E·slope/T); the first factor, the second and the
    area-to-volume ratio A/(3600·V) are folded, as a logarithm, into the exponent
    (:meth:`log_scale`), so the net source is tanh(I/Ik)·exp(E_gpp·slope/T + ln w_gpp) −
    exp(E_resp·slope/T + ln w_resp), one ``exp`` over a stacked array.
    """

    def __init__(self, p: RackParams) -> None:
        line = ArrheniusLine(p.t_ref_c)
        energies = np.stack((p.ea_gpp_ev, p.ea_resp_ev), axis=1)  # (N, 2)
        self.exponent_k: F = energies * line.slope[:, None]
        """E·slope of production and respiration, K, shape ``(N, 2)``."""
        self._exponent3 = self.exponent_k[:, :, None]
        rates = np.stack((p.gpp_max_umol_m2_h, p.resp_umol_m2_h), axis=1)
        self._scale = (
            rates * np.exp(energies * line.intercept[:, None]) * (p.area_m2 / 3600.0)[:, None]
        )
        self._inv_ik = 1.0 / p.ik_umol_m2_s
        self.inv_ik: F = self._inv_ik
        """1/Ik of each chamber, m² s µmol⁻¹, shape ``(N,)``."""
        threshold = p.stress_threshold_c
        finite = np.isfinite(threshold)
        self.stressed = bool(finite.any())
        """Whether any chamber has a thermal-stress threshold."""
        self.lowest_threshold_c = float(threshold.min())
        """Lowest stress threshold, °C (``inf`` without any)."""
        thr = np.where(finite, threshold, 1e6)[:, None]
        loss = np.where(finite, p.stress_gpp_loss_per_c, 0.0)[:, None]
        gain = np.where(finite, p.stress_resp_gain_per_c, 0.0)[:, None]
        self._threshold_c = thr
        # 1 − loss·(max(T, thr) − thr) = (1 + loss·thr) − loss·max(T, thr), likewise for gain
        self._keep_base = 1.0 + loss * thr
        self._keep_slope = -loss
        self._gain_base = 1.0 - gain * thr
        self._gain_slope = gain
        self._gaining = bool((gain > 0.0).any())
        lossy = loss[:, 0] > 0.0
        self.zero_production_c = (
            float((threshold[lossy] + 1.0 / loss[lossy, 0]).min()) if lossy.any() else np.inf
        )
        """Lowest temperature at which stress stops a chamber's production entirely, °C."""

    def light(self, par: F, rows: NDArray[np.intp] | None = None) -> F:
        """Light limitation tanh(I/Ik) of Jassby & Platt (1976), dimensionless.

        Parameters
        ----------
        par
            PAR at the community (≥ 0), µmol photons m⁻² s⁻¹, shape ``(N,)`` or ``(N, n)``.
        rows
            The chambers ``par`` holds (rows of an ``(n_rows, n)`` array), or None for all.

        Returns
        -------
        numpy.ndarray
            tanh(I/Ik), dimensionless, shape of ``par``.

        Notes
        -----
        Evaluated as 1 − 2/(1 + e^(2x)) (x = I/Ik ≥ 0, capped at 40 where tanh is 1 to
        double precision): one ``exp`` costs about half a ``tanh`` where numpy has no vector
        kernel for it. The absolute error is below 1e-15.
        """
        inv_ik = self._inv_ik if rows is None else self._inv_ik[rows]
        x = par * (inv_ik if np.ndim(par) == 1 else inv_ik[:, None])
        np.minimum(x, 40.0, out=x)
        x *= 2.0
        np.exp(x, out=x)
        x += 1.0
        np.divide(-2.0, x, out=x)
        x += 1.0
        return x

    def log_scale(self, volume_l: F) -> F:
        """ln of the production and respiration weights at full light, for :meth:`factors`.

        Parameters
        ----------
        volume_l
            Chamber water volume, L, shape ``(N,)``.

        Returns
        -------
        numpy.ndarray
            ln(rate_ref·exp(E·intercept)·A/(3600·V)), ln(µmol L⁻¹ s⁻¹), shape ``(N, 2, 1)``;
            −inf for a rate of 0 (its term is then exactly 0).
        """
        scale = self._scale / volume_l[:, None]
        out = np.full(scale.shape, -np.inf)
        np.log(scale, out=out, where=scale > 0.0)
        return out[:, :, None]

    def factors(self, inv_temp_k: F, log_scale: F, light: F, out: F) -> None:
        """Weighted production and respiration terms, in place.

        Parameters
        ----------
        inv_temp_k
            1/T of the water at each sub-step start, K⁻¹, shape ``(N, n)``.
        log_scale
            From :meth:`log_scale`, shape ``(N, 2, 1)``.
        light
            Light limitation (see :meth:`light`), dimensionless, shape ``(N, 1)`` or ``(N, n)``.
        out
            Receives exp(E·slope/T + ln w)·(light, 1), µmol L⁻¹ s⁻¹, shape ``(N, 2, n)``;
            net source = row 0 − row 1 (before :meth:`stress`).
        """
        np.multiply(inv_temp_k[:, None, :], self._exponent3, out=out)
        out += log_scale
        np.exp(out, out=out)
        out[:, 0] *= light

    def stress(self, temp_c: F, terms: F, hottest_c: float) -> None:
        """Apply thermal stress to weighted terms, in place.

        Parameters
        ----------
        temp_c
            Water temperature at each sub-step start, °C, shape ``(N, n)``.
        terms
            From :meth:`factors`, shape ``(N, 2, n)``: production is multiplied by
            max(0, 1 − loss·ΔT), respiration by 1 + gain·ΔT, with ΔT the excess over the
            chamber's threshold (0 below it).
        hottest_c
            Highest temperature in ``temp_c`` or above, °C (skips the clamp at 0 when no
            chamber is hot enough to need it).
        """
        hot = np.maximum(temp_c, self._threshold_c)
        keep = hot * self._keep_slope
        keep += self._keep_base
        if hottest_c >= self.zero_production_c:
            np.maximum(keep, 0.0, out=keep)
        terms[:, 0] *= keep
        if self._gaining:
            hot *= self._gain_slope
            hot += self._gain_base
            terms[:, 1] *= hot
