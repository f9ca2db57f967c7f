"""The science the simulator borrows: light curve, temperature scaling, O2 solubility.

Rule: the formulas live in :mod:`controller.science`; this module only adapts them to the
array shapes the stepping code uses and tabulates O2 saturation once per salinity so that a
step costs an interpolation instead of a full Garcia & Gordon evaluation.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from controller.science.optode import OptodeCalibration, SignalKind, phase_from_concentration
from controller.science.oxygen import solubility
from controller.science.rates import (
    BOLTZMANN_EV_PER_K,
    ZERO_CELSIUS_K,
    arrhenius_factor,
    jassby_platt,
)

__all__ = [
    "BOLTZMANN_EV_PER_K",
    "ZERO_CELSIUS_K",
    "ArrheniusLine",
    "SaturationTable",
    "light_limited",
    "log_arrhenius_per_ev",
    "optode_phase_deg",
    "saturation_umol_l",
]

F = NDArray[np.float64]

_TABLE_MIN_C = -5.0
_TABLE_MAX_C = 50.0
_TABLE_STEP_C = 0.02
_BLOCK_C = 1000.0  # temperature-axis offset between the tables of distinct salinities
_PAD_C = 495.0  # end values extended to here around each block (flat = clamped)
_CLAMP_C = 490.0  # temperatures clamped to ±this before shifting into a block


def log_arrhenius_per_ev(temp_c: F, t_ref_c: F) -> F:
    """Natural log of the Boltzmann–Arrhenius factor for an activation energy of 1 eV.

    Parameters
    ----------
    temp_c
        Temperature, °C.
    t_ref_c
        Reference temperature, °C (broadcast against ``temp_c``).

    Returns
    -------
    numpy.ndarray
        ln A₁ = (1/k)(1/T_ref − 1/T), eV⁻¹; the factor for energy E is exp(E·ln A₁).

    Notes
    -----
    ``arrhenius_factor`` takes one activation energy; since the factor for E is the factor for
    1 eV raised to the power E, one call serves every chamber's energies at once.
    """
    return np.asarray(np.log(arrhenius_factor(temp_c, t_ref_c, 1.0)), dtype=float)


def light_limited(par: F, pmax: F, ik: F) -> F:
    """Jassby & Platt (1976) light curve pmax·tanh(I/Ik), elementwise.

    Parameters
    ----------
    par
        Irradiance, µmol photons m⁻² s⁻¹.
    pmax
        Light-saturated rate, any rate unit (returned in the same unit).
    ik
        Saturation irradiance, µmol photons m⁻² s⁻¹ (> 0).

    Returns
    -------
    numpy.ndarray
        Rate in the unit of ``pmax``.

    Notes
    -----
    ``jassby_platt`` takes one Ik; irradiance expressed in units of each chamber's Ik lets one
    call (with Ik = 1) serve every chamber.
    """
    return np.asarray(pmax * jassby_platt(par / ik, 1.0, 1.0), dtype=float)


def saturation_umol_l(temp_c: F | float, salinity: F | float, pressure_kpa: float) -> F:
    """Air-saturation O2 concentration (Garcia & Gordon 1992 via controller.science.oxygen).

    Parameters
    ----------
    temp_c
        Water temperature, °C.
    salinity
        Practical salinity (PSS-78), dimensionless.
    pressure_kpa
        Barometric pressure, kPa.

    Returns
    -------
    numpy.ndarray
        Saturation concentration, µmol L⁻¹.
    """
    t, s = np.broadcast_arrays(np.asarray(temp_c, dtype=float), np.asarray(salinity, dtype=float))
    return np.asarray(solubility(t, s, pressure_kpa, unit="umol/L"), dtype=float)


def optode_phase_deg(
    o2_umol_l: float, temp_c: float, phase0_deg: float, ksv_l_umol: float, fraction: float
) -> float:
    """Phase angle an optode foil shows at an oxygen concentration (Stern–Volmer).

    Parameters
    ----------
    o2_umol_l
        Oxygen the foil sees, µmol L⁻¹ (negative values count as 0).
    temp_c
        Foil temperature, °C (the calibration is taken at this temperature, so KSV and φ0
        do not vary with it).
    phase0_deg
        Phase angle without oxygen, degrees.
    ksv_l_umol
        Stern–Volmer constant, L µmol⁻¹.
    fraction
        Quenchable fraction of the luminescence, dimensionless (1 = plain Stern–Volmer).

    Returns
    -------
    float
        Phase angle, degrees: tan φ/tan φ0 = f/(1 + KSV·C) + (1 − f).
    """
    cal = OptodeCalibration(
        kind=SignalKind.PHASE_DEG,
        zero_reading=phase0_deg,
        ksv_l_per_umol=ksv_l_umol,
        quenchable_fraction=fraction,
        temp_c=temp_c,
    )
    return float(phase_from_concentration(cal, max(o2_umol_l, 0.0), temp_c))


class SaturationTable:
    """O2 saturation tabulated over temperature for each chamber's salinity.

    Linear interpolation on a 0.02 °C grid from −5 to 50 °C; the interpolation error is below
    2e-5 µmol L⁻¹ (the curve's second derivative is under 0.4 µmol L⁻¹ K⁻²). Temperatures
    outside the grid are clamped to it.

    Parameters
    ----------
    salinity
        Practical salinity of each chamber (PSS-78), dimensionless, shape ``(N,)``.
    pressure_kpa
        Barometric pressure, kPa.

    Notes
    -----
    Looked up with chamber-major temperatures (:meth:`rows`). One ``numpy.interp`` call serves
    every chamber: the table of the g-th distinct salinity
    is laid out on the temperature axis shifted by g·1000 °C, padded with its end values out
    to ±495 °C around its block, and each chamber's temperatures are shifted by its block's
    offset (after clamping to ±490 °C) before the lookup.
    """

    def __init__(self, salinity: F, pressure_kpa: float) -> None:
        grid = np.arange(_TABLE_MIN_C, _TABLE_MAX_C + _TABLE_STEP_C / 2, _TABLE_STEP_C)
        sal, sal_of = np.unique(np.asarray(salinity, dtype=float), return_inverse=True)
        xs: list[F] = []
        ys: list[F] = []
        for g, s in enumerate(sal):
            sat = saturation_umol_l(grid, s, pressure_kpa)
            offset = g * _BLOCK_C
            xs.append(np.concatenate(([-_PAD_C], grid, [_PAD_C])) + offset)
            ys.append(np.concatenate(([sat[0]], sat, [sat[-1]])))
        self._grid: F = np.concatenate(xs)
        self._values: F = np.concatenate(ys)
        self._single = len(sal) == 1
        self._offset: F = np.asarray(sal_of, dtype=float).reshape(-1) * _BLOCK_C

    def rows(self, temp_c: F) -> F:
        """Saturation at chamber-major ``temp_c`` (°C, shape ``(N, n)``), µmol L⁻¹."""
        if self._single:
            return np.interp(temp_c, self._grid, self._values)
        shifted = np.clip(temp_c, -_CLAMP_C, _CLAMP_C)
        shifted += self._offset[:, None]
        return np.interp(shifted, self._grid, self._values)


class ArrheniusLine:
    """ln A₁ = (1/k)(1/T_ref − 1/T), the 1 eV Arrhenius exponent, as a line in 1/T.

    The integrators evaluate it as ln A₁ = slope·(1/T) + intercept per chamber (scaled by each
    activation energy, see :class:`simulator._oxygen.Metabolism`), with the slope and
    intercept taken from ``arrhenius_factor`` at two temperatures, which saves the per-call
    validation of the science function on every sub-step.

    Parameters
    ----------
    t_ref_c
        Reference temperature of each chamber's rates, °C, shape ``(N,)``.
    """

    def __init__(self, t_ref_c: F) -> None:
        cold, warm = 0.0, 40.0
        ln_cold = log_arrhenius_per_ev(np.full_like(t_ref_c, cold), t_ref_c)
        ln_warm = log_arrhenius_per_ev(np.full_like(t_ref_c, warm), t_ref_c)
        inv_cold, inv_warm = 1.0 / (cold + ZERO_CELSIUS_K), 1.0 / (warm + ZERO_CELSIUS_K)
        self.slope: F = (ln_warm - ln_cold) / (inv_warm - inv_cold)
        """Slope of ln A₁ against 1/T, K eV⁻¹, shape ``(N,)``."""
        self.intercept: F = ln_cold - self.slope * inv_cold
        """ln A₁ extrapolated to 1/T = 0, eV⁻¹, shape ``(N,)``."""
