"""Metabolic rates: photosynthesis–irradiance curves and temperature scaling (Q10, Arrhenius).

Rule: pure functions, vectorised over numpy arrays (scalars in, 0-d arrays or floats out).
PAR is µmol photons m-2 s-1; rates keep whatever unit the caller gives ``pmax`` or the
reference rate (for example µmol O2 m-2 h-1); temperatures are °C at the interface and kelvin
inside.
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

from controller.errors import SquallError

__all__ = [
    "BOLTZMANN_EV_PER_K",
    "ZERO_CELSIUS_K",
    "arrhenius_factor",
    "jassby_platt",
    "platt",
    "platt_optimum",
    "q10_equivalent",
    "q10_factor",
    "q10_from_rates",
    "webb",
]

BOLTZMANN_EV_PER_K = 8.617333262e-5
"""Boltzmann constant, eV K-1 (CODATA 2018, exact by the 2019 SI definition)."""

ZERO_CELSIUS_K = 273.15
"""0 °C in kelvin, K."""

ArrayLike = float | npt.ArrayLike


def _kelvin(temp_c: ArrayLike, field: str) -> np.ndarray:
    """Celsius to kelvin, refusing temperatures at or below absolute zero."""
    kelvin = np.asarray(temp_c, dtype=float) + ZERO_CELSIUS_K
    if np.any(kelvin <= 0.0):
        raise SquallError("temperature must be above absolute zero (-273.15 °C)", field=field)
    return kelvin


def _light(par: ArrayLike) -> np.ndarray:
    """PAR as an array; negative readings (sensor noise in the dark) count as darkness."""
    return np.clip(np.asarray(par, dtype=float), 0.0, None)


def _positive(value: float, field: str) -> None:
    if not (math.isfinite(value) and value > 0.0):
        raise SquallError(f"{field} must be a positive number, got {value}", field=field)


def jassby_platt(par: ArrayLike, pmax: float, ik: float) -> np.ndarray:
    """Photosynthesis–irradiance curve of Jassby & Platt (1976), hyperbolic tangent form.

    Parameters
    ----------
    par
        Irradiance, µmol photons m-2 s-1 (negative values count as 0).
    pmax
        Light-saturated gross production, any rate unit (>= 0).
    ik
        Saturation irradiance Ik = Pmax/α, µmol photons m-2 s-1 (> 0).

    Returns
    -------
    numpy.ndarray
        Gross production ``Pmax·tanh(I/Ik)``, in the unit of ``pmax``.

    References
    ----------
    Jassby, A. D. & Platt, T. (1976) Mathematical formulation of the relationship between
    photosynthesis and light for phytoplankton. Limnology and Oceanography 21:540–547.
    """
    _positive(ik, "ik")
    return pmax * np.tanh(_light(par) / ik)


def webb(par: ArrayLike, pmax: float, ik: float) -> np.ndarray:
    """Photosynthesis–irradiance curve of Webb et al. (1974), exponential form.

    Parameters
    ----------
    par
        Irradiance, µmol photons m-2 s-1 (negative values count as 0).
    pmax
        Light-saturated gross production, any rate unit (>= 0).
    ik
        Saturation irradiance Ik = Pmax/α, µmol photons m-2 s-1 (> 0).

    Returns
    -------
    numpy.ndarray
        Gross production ``Pmax·(1 − exp(−I/Ik))``, in the unit of ``pmax``.

    References
    ----------
    Webb, W. L., Newton, M. & Starr, D. (1974) Carbon dioxide exchange of *Alnus rubra*:
    a mathematical model. Oecologia 17:281–291.
    """
    _positive(ik, "ik")
    return pmax * -np.expm1(-_light(par) / ik)


def platt(par: ArrayLike, ps: float, alpha: float, beta: float) -> np.ndarray:
    """Photosynthesis–irradiance curve with photoinhibition of Platt et al. (1980).

    Parameters
    ----------
    par
        Irradiance, µmol photons m-2 s-1 (negative values count as 0).
    ps
        Production the curve would reach without photoinhibition, any rate unit (> 0).
    alpha
        Initial slope, rate unit per µmol photons m-2 s-1 (> 0).
    beta
        Photoinhibition slope, rate unit per µmol photons m-2 s-1 (>= 0; 0 = none).

    Returns
    -------
    numpy.ndarray
        Gross production ``Ps·(1 − exp(−αI/Ps))·exp(−βI/Ps)``, in the unit of ``ps``.

    References
    ----------
    Platt, T., Gallegos, C. L. & Harrison, W. G. (1980) Photoinhibition of photosynthesis in
    natural assemblages of marine phytoplankton. Journal of Marine Research 38:687–701.
    """
    _positive(ps, "ps")
    _positive(alpha, "alpha")
    if not (math.isfinite(beta) and beta >= 0.0):
        raise SquallError(f"beta must be >= 0, got {beta}", field="beta")
    light = _light(par)
    return ps * -np.expm1(-alpha * light / ps) * np.exp(-beta * light / ps)


def platt_optimum(ps: float, alpha: float, beta: float) -> tuple[float, float]:
    """Maximum of the Platt et al. (1980) curve and the irradiance where it is reached.

    Parameters
    ----------
    ps
        Production without photoinhibition, any rate unit (> 0).
    alpha
        Initial slope, rate unit per µmol photons m-2 s-1 (> 0).
    beta
        Photoinhibition slope, rate unit per µmol photons m-2 s-1 (> 0).

    Returns
    -------
    tuple of float
        ``(pm, im)``: the peak production ``Ps·(α/(α+β))·(β/(α+β))^(β/α)`` in the unit of
        ``ps``, and the irradiance ``(Ps/α)·ln((α+β)/β)``, µmol photons m-2 s-1.
    """
    _positive(ps, "ps")
    _positive(alpha, "alpha")
    _positive(beta, "beta")
    total = alpha + beta
    pm = ps * (alpha / total) * (beta / total) ** (beta / alpha)
    im = ps / alpha * math.log(total / beta)
    return float(pm), float(im)


def q10_from_rates(r1: ArrayLike, r2: ArrayLike, t1_c: float, t2_c: float) -> np.ndarray:
    """Q10 temperature coefficient from two rates measured at two temperatures.

    Parameters
    ----------
    r1
        Rate at ``t1_c``, any unit (> 0).
    r2
        Rate at ``t2_c``, same unit (> 0).
    t1_c
        First temperature, °C.
    t2_c
        Second temperature, °C (different from ``t1_c``).

    Returns
    -------
    numpy.ndarray
        ``(r2/r1)^(10/(t2 − t1))``, dimensionless.
    """
    if t1_c == t2_c:
        raise SquallError("the two temperatures must differ to give a Q10", field="t2_c")
    rate1 = np.asarray(r1, dtype=float)
    rate2 = np.asarray(r2, dtype=float)
    if np.any(rate1 <= 0.0) or np.any(rate2 <= 0.0):
        raise SquallError("rates must be positive to give a Q10", field="r1")
    return (rate2 / rate1) ** (10.0 / (t2_c - t1_c))


def q10_factor(temp_c: ArrayLike, t_ref_c: float, q10: float) -> np.ndarray:
    """Factor by which a rate changes from the reference temperature under a constant Q10.

    Parameters
    ----------
    temp_c
        Temperature, °C.
    t_ref_c
        Reference temperature at which the factor is 1, °C.
    q10
        Rate ratio per 10 °C, dimensionless (> 0).

    Returns
    -------
    numpy.ndarray
        ``Q10^((T − T_ref)/10)``, dimensionless.
    """
    _positive(q10, "q10")
    return q10 ** ((np.asarray(temp_c, dtype=float) - t_ref_c) / 10.0)


def arrhenius_factor(temp_c: ArrayLike, t_ref_c: ArrayLike, ea_ev: float) -> np.ndarray:
    """Boltzmann–Arrhenius factor by which a rate changes from the reference temperature.

    Parameters
    ----------
    temp_c
        Temperature, °C.
    t_ref_c
        Reference temperature at which the factor is 1, °C.
    ea_ev
        Activation energy, eV (about 0.65 for respiration and 0.32 for photosynthesis).

    Returns
    -------
    numpy.ndarray
        ``exp((E/k)·(1/T_ref − 1/T))`` with T in kelvin, dimensionless.

    References
    ----------
    Gillooly, J. F. et al. (2001) Effects of size and temperature on metabolic rate.
    Science 293:2248–2251.
    Allen, A. P., Gillooly, J. F. & Brown, J. H. (2005) Linking the global carbon cycle to
    individual metabolism. Functional Ecology 19:202–213.
    """
    if not math.isfinite(ea_ev):
        raise SquallError(f"activation energy must be finite, got {ea_ev}", field="ea_ev")
    kelvin = _kelvin(temp_c, "temp_c")
    ref = _kelvin(t_ref_c, "t_ref_c")
    return np.exp(ea_ev / BOLTZMANN_EV_PER_K * (1.0 / ref - 1.0 / kelvin))


def q10_equivalent(ea_ev: float, temp_c: ArrayLike) -> np.ndarray:
    """Q10 that an activation energy implies over the 10 °C above a temperature.

    Parameters
    ----------
    ea_ev
        Activation energy, eV.
    temp_c
        Lower end of the 10 °C interval, °C.

    Returns
    -------
    numpy.ndarray
        ``exp(10·E/(k·T·(T + 10)))`` with T in kelvin, dimensionless; equals
        ``arrhenius_factor(temp_c + 10, temp_c, ea_ev)``.
    """
    kelvin = _kelvin(temp_c, "temp_c")
    return np.exp(10.0 * ea_ev / (BOLTZMANN_EV_PER_K * kelvin * (kelvin + 10.0)))
