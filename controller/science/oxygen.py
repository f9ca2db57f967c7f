"""Dissolved oxygen: solubility (Garcia & Gordon 1992) and unit conversions (SCOR WG 142).

Rule: pure functions, vectorised over numpy arrays (all array arguments broadcast together;
all-scalar calls return a float). The temperature is applied to the Garcia & Gordon equation as
given, as the SCOR WG 142 conversion code does; gsw instead converts ITS-90 to IPTS-68 first
(t68 = 1.00024·t90), a difference below 0.02 % of the solubility over 0–35 °C.

Units (the ``unit`` strings, case-insensitive, ``µ`` may stand for ``u``):

``umol/kg``  µmol O2 per kg of seawater
``umol/L``   µmol O2 per litre
``mg/L``     mg O2 per litre (M(O2) = 31.9988 g/mol)
``mL/L``     mL O2 per litre (real-gas molar volume 22.3916 L/mol at STP)
``%sat``     % of the air-saturation concentration at the given barometric pressure
``hPa``      partial pressure of O2, hPa (= mbar; ``mbar`` is accepted too)

Two fits of the same Benson & Krause (1984) data are used, each where its source uses it:
the µmol/kg fit for ``solubility(unit="umol/kg")`` (as gsw does) and the mL/L fit for every
per-volume value and for ``%sat`` and ``hPa`` (as SCOR WG 142 does). They differ by less than
0.015 % over 0–30 °C and salinity 0–35.

References
----------
Garcia, H. E. & Gordon, L. I. (1992) Oxygen solubility in seawater: better fitting equations.
Limnology and Oceanography 37:1307–1312 (erratum 1993, 38:656).
Benson, B. B. & Krause, D. (1984) The concentration and isotopic fractionation of oxygen
dissolved in freshwater and seawater in equilibrium with the atmosphere. Limnology and
Oceanography 29:620–632.
Weiss, R. F. & Price, B. A. (1980) Nitrous oxide solubility in water and seawater. Marine
Chemistry 8:347–359.
Bittig, H. C. et al. (2018) SCOR WG 142: Quality Control Procedures for Oxygen and Other
Biogeochemical Sensors on Floats and Gliders. Recommendations on the conversion between
oxygen quantities for Bio-Argo floats and other autonomous sensor platforms.
doi:10.13155/45915.
"""

from __future__ import annotations

import math
from typing import Final

import gsw
import numpy as np
import numpy.typing as npt

from controller.errors import SquallError

__all__ = [
    "O2_MOLAR_MASS_G_PER_MOL",
    "O2_MOLAR_VOLUME_L_PER_MOL",
    "O2_MOLE_FRACTION",
    "STANDARD_PRESSURE_HPA",
    "UNITS",
    "convert",
    "normalise_unit",
    "seawater_density_kg_m3",
    "solubility",
    "solubility_umol_l_scalar",
    "water_vapour_pressure_hpa",
]

ArrayLike = float | npt.ArrayLike

O2_MOLAR_MASS_G_PER_MOL: Final = 31.9988
"""Molar mass of O2, g/mol (SCOR WG 142)."""

O2_MOLAR_VOLUME_L_PER_MOL: Final = 22.3916
"""Real-gas molar volume of O2 at STP, L/mol (SCOR WG 142; not the ideal 22.414)."""

O2_MOLE_FRACTION: Final = 0.20946
"""Mole fraction of O2 in dry air (Glueckauf 1951, as used by SCOR WG 142)."""

STANDARD_PRESSURE_HPA: Final = 1013.25
"""One standard atmosphere, hPa."""

UNITS: Final = ("umol/L", "umol/kg", "mg/L", "mL/L", "%sat", "hPa")
"""Oxygen units understood by :func:`solubility` and :func:`convert`."""

_ALIASES: Final = {unit.lower(): unit for unit in UNITS} | {"mbar": "hPa"}

_UMOL_PER_ML: Final = 1000.0 / O2_MOLAR_VOLUME_L_PER_MOL

# Garcia & Gordon (1992) fits of Benson & Krause (1984): A0..A5, B0..B3, C0.
_GG92_UMOL_KG: Final = (
    (5.80871, 3.20291, 4.17887, 5.10006, -9.86643e-2, 3.80369),
    (-7.01577e-3, -7.70028e-3, -1.13864e-2, -9.51519e-3),
    -2.75915e-7,
)
_GG92_ML_L: Final = (
    (2.00907, 3.22014, 4.05010, 4.94457, -2.56847e-1, 3.88767),
    (-6.24523e-3, -7.37614e-3, -1.03410e-2, -8.17083e-3),
    -4.88682e-7,
)


def normalise_unit(unit: str, *, field: str = "unit") -> str:
    """The canonical spelling of an oxygen unit.

    Parameters
    ----------
    unit
        A unit string such as ``"umol/L"``, ``"µmol/l"``, ``"%sat"`` or ``"mbar"``.
    field
        Name reported in the error when the unit is unknown.

    Returns
    -------
    str
        One of :data:`UNITS`.
    """
    key = str(unit).strip().replace("µ", "u").replace("μ", "u").lower()
    if key not in _ALIASES:
        raise SquallError(
            f"unknown oxygen unit '{unit}'; use one of {', '.join(UNITS)}", field=field
        )
    return _ALIASES[key]


def _out(value: np.ndarray) -> np.ndarray | float:
    """A float for 0-d results, the array otherwise."""
    return float(value) if np.ndim(value) == 0 else value


def _check(temp_c: np.ndarray, salinity: np.ndarray, pressure_hpa: np.ndarray) -> None:
    """Refuse inputs outside the range where the equations mean anything."""
    if np.any((temp_c < -5.0) | (temp_c > 50.0)):
        raise SquallError(
            "temperature must be within -5..50 °C (Garcia & Gordon fit 0..40 °C)", field="temp_c"
        )
    if np.any((salinity < 0.0) | (salinity > 50.0)):
        raise SquallError("salinity must be within 0..50 (fit 0..42, PSS-78)", field="salinity")
    if np.any((pressure_hpa < 100.0) | (pressure_hpa > 2000.0)):
        raise SquallError("barometric pressure must be within 10..200 kPa", field="pressure_kpa")


def _gg92(temp_c: np.ndarray, salinity: np.ndarray, coeffs: tuple) -> np.ndarray:
    """Garcia & Gordon (1992) equation 8: saturation at 1 atm of water-saturated air."""
    a, b, c0 = coeffs
    ts = np.log((298.15 - temp_c) / (273.15 + temp_c))
    fresh = a[0] + ts * (a[1] + ts * (a[2] + ts * (a[3] + ts * (a[4] + ts * a[5]))))
    salt = b[0] + ts * (b[1] + ts * (b[2] + ts * b[3]))
    return np.exp(fresh + salinity * salt + c0 * salinity * salinity)


def water_vapour_pressure_hpa(temp_c: ArrayLike, salinity: ArrayLike) -> np.ndarray | float:
    """Saturation vapour pressure of water over seawater (Weiss & Price 1980).

    Parameters
    ----------
    temp_c
        Water temperature, °C.
    salinity
        Practical salinity (PSS-78), dimensionless.

    Returns
    -------
    numpy.ndarray or float
        Water vapour pressure, hPa (= mbar).
    """
    kelvin = np.asarray(temp_c, dtype=float) + 273.15
    sal = np.asarray(salinity, dtype=float)
    return _out(
        STANDARD_PRESSURE_HPA
        * np.exp(
            24.4543 - 67.4509 * (100.0 / kelvin) - 4.8489 * np.log(kelvin / 100.0) - 0.000544 * sal
        )
    )


def seawater_density_kg_m3(temp_c: ArrayLike, salinity: ArrayLike) -> np.ndarray | float:
    """In-situ density of seawater at the sea surface (TEOS-10 via gsw).

    Parameters
    ----------
    temp_c
        In-situ temperature (ITS-90), °C.
    salinity
        Practical salinity (PSS-78), dimensionless; taken as Reference Salinity (no
        location-dependent Absolute Salinity anomaly).

    Returns
    -------
    numpy.ndarray or float
        Density at sea pressure 0 dbar, kg m-3.
    """
    reference_salinity = gsw.SR_from_SP(np.asarray(salinity, dtype=float))
    return _out(np.asarray(gsw.rho_t_exact(reference_salinity, temp_c, 0.0), dtype=float))


def _pressure_factor(pressure_hpa: np.ndarray, vapour_hpa: np.ndarray) -> np.ndarray:
    """Barometric correction (p − pH2O)/(1013.25 − pH2O) of a 1 atm saturation."""
    return (pressure_hpa - vapour_hpa) / (STANDARD_PRESSURE_HPA - vapour_hpa)


def _prepare(
    temp_c: ArrayLike, salinity: ArrayLike, pressure_kpa: ArrayLike
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Arrays of temperature, salinity, pressure (hPa) and water vapour pressure (hPa)."""
    temp = np.asarray(temp_c, dtype=float)
    sal = np.asarray(salinity, dtype=float)
    pressure_hpa = 10.0 * np.asarray(pressure_kpa, dtype=float)
    _check(temp, sal, pressure_hpa)
    vapour = np.asarray(water_vapour_pressure_hpa(temp, sal), dtype=float)
    return temp, sal, pressure_hpa, vapour


def solubility(
    temp_c: ArrayLike,
    salinity: ArrayLike,
    pressure_kpa: ArrayLike = 101.325,
    unit: str = "umol/kg",
) -> np.ndarray | float:
    """Oxygen concentration of water in equilibrium with moist air.

    Parameters
    ----------
    temp_c
        Water temperature, °C (fit range 0–40).
    salinity
        Practical salinity (PSS-78), dimensionless (fit range 0–42).
    pressure_kpa
        Barometric (total air) pressure over the water, kPa.
    unit
        One of :data:`UNITS`; ``%sat`` gives 100 and ``hPa`` the O2 partial pressure of
        saturated water, ``xO2·(p − pH2O)``.

    Returns
    -------
    numpy.ndarray or float
        Air-saturation oxygen, in ``unit``.

    Notes
    -----
    Garcia & Gordon (1992) with the Benson & Krause coefficients gives the saturation at
    1 atm of water-saturated air; it is scaled to the barometric pressure p by
    ``(p − pH2O)/(1013.25 hPa − pH2O)`` with pH2O from Weiss & Price (1980). ``umol/kg`` uses
    the µmol/kg fit (274.610 µmol/kg at 10 °C, S = 35); the per-volume units use the mL/L fit
    (6.315 mL/L there) converted with 22.3916 L/mol and 31.9988 g/mol, as SCOR WG 142 does.
    """
    canonical = normalise_unit(unit)
    temp, sal, pressure_hpa, vapour = _prepare(temp_c, salinity, pressure_kpa)
    factor = _pressure_factor(pressure_hpa, vapour)
    if canonical == "umol/kg":
        return _out(_gg92(temp, sal, _GG92_UMOL_KG) * factor)
    umol_l = _saturation_umol_l_1atm(temp, sal) * factor
    return _out(_from_umol_l(umol_l, canonical, temp, sal, pressure_hpa, vapour))


def solubility_umol_l_scalar(temp_c: float, salinity: float, pressure_kpa: float) -> float:
    """:func:`solubility` in µmol/L for one water sample, in plain floats.

    Parameters
    ----------
    temp_c
        Water temperature, °C (fit range 0–40).
    salinity
        Practical salinity (PSS-78), dimensionless (fit range 0–42).
    pressure_kpa
        Barometric (total air) pressure over the water, kPa.

    Returns
    -------
    float
        Air-saturation oxygen, µmol L⁻¹.

    Notes
    -----
    The very operations of ``solubility(temp_c, salinity, pressure_kpa, unit="umol/L")`` in
    the same order, and the same range checks and errors, without building arrays: a
    fraction of its cost where one value at a time is wanted (a simulated optode's reading).
    Where numpy's ``exp`` and ``log`` are the C library's (no AVX-512 kernels), the result
    is the same double.
    """
    pressure_hpa = 10.0 * pressure_kpa
    if temp_c < -5.0 or temp_c > 50.0:
        raise SquallError(
            "temperature must be within -5..50 °C (Garcia & Gordon fit 0..40 °C)", field="temp_c"
        )
    if salinity < 0.0 or salinity > 50.0:
        raise SquallError("salinity must be within 0..50 (fit 0..42, PSS-78)", field="salinity")
    if pressure_hpa < 100.0 or pressure_hpa > 2000.0:
        raise SquallError("barometric pressure must be within 10..200 kPa", field="pressure_kpa")
    kelvin = temp_c + 273.15
    vapour = STANDARD_PRESSURE_HPA * math.exp(
        24.4543
        - 67.4509 * (100.0 / kelvin)
        - 4.8489 * math.log(kelvin / 100.0)
        - 0.000544 * salinity
    )
    factor = (pressure_hpa - vapour) / (STANDARD_PRESSURE_HPA - vapour)
    a, b, c0 = _GG92_ML_L
    ts = math.log((298.15 - temp_c) / (273.15 + temp_c))
    fresh = a[0] + ts * (a[1] + ts * (a[2] + ts * (a[3] + ts * (a[4] + ts * a[5]))))
    salt = b[0] + ts * (b[1] + ts * (b[2] + ts * b[3]))
    one_atm = math.exp(fresh + salinity * salt + c0 * salinity * salinity)
    return _UMOL_PER_ML * one_atm * factor


def _saturation_umol_l_1atm(temp: np.ndarray, sal: np.ndarray) -> np.ndarray:
    """SCOR WG 142 C*: µmol/L at 1 atm from the Garcia & Gordon mL/L fit."""
    return _UMOL_PER_ML * _gg92(temp, sal, _GG92_ML_L)


def _to_umol_l(
    value: np.ndarray,
    unit: str,
    temp: np.ndarray,
    sal: np.ndarray,
    pressure_hpa: np.ndarray,
    vapour: np.ndarray,
) -> np.ndarray:
    """Any unit to µmol/L (SCOR WG 142 relations)."""
    if unit == "umol/L":
        return value
    if unit == "umol/kg":
        return value * np.asarray(seawater_density_kg_m3(temp, sal)) / 1000.0
    if unit == "mg/L":
        return value * 1000.0 / O2_MOLAR_MASS_G_PER_MOL
    if unit == "mL/L":
        return value * _UMOL_PER_ML
    dry_1atm = STANDARD_PRESSURE_HPA - vapour
    c_star = _saturation_umol_l_1atm(temp, sal)
    if unit == "%sat":
        return value / 100.0 * c_star * (pressure_hpa - vapour) / dry_1atm
    # hPa: pO2 = [O2]·xO2·(1013.25 − pH2O)/C*, at the sea surface (no hydrostatic term).
    return value * c_star / (O2_MOLE_FRACTION * dry_1atm)


def _from_umol_l(
    umol_l: np.ndarray,
    unit: str,
    temp: np.ndarray,
    sal: np.ndarray,
    pressure_hpa: np.ndarray,
    vapour: np.ndarray,
) -> np.ndarray:
    """µmol/L to any unit (inverse of :func:`_to_umol_l`)."""
    if unit == "umol/L":
        return umol_l
    if unit == "umol/kg":
        return umol_l * 1000.0 / np.asarray(seawater_density_kg_m3(temp, sal))
    if unit == "mg/L":
        return umol_l * O2_MOLAR_MASS_G_PER_MOL / 1000.0
    if unit == "mL/L":
        return umol_l / _UMOL_PER_ML
    dry_1atm = STANDARD_PRESSURE_HPA - vapour
    c_star = _saturation_umol_l_1atm(temp, sal)
    if unit == "%sat":
        return 100.0 * umol_l / c_star * dry_1atm / (pressure_hpa - vapour)
    return umol_l * O2_MOLE_FRACTION * dry_1atm / c_star


def convert(
    value: ArrayLike,
    from_unit: str,
    to_unit: str,
    *,
    temp_c: ArrayLike,
    salinity: ArrayLike,
    pressure_kpa: ArrayLike = 101.325,
) -> np.ndarray | float:
    """Convert an oxygen quantity between units (SCOR WG 142, Bittig et al. 2018).

    Parameters
    ----------
    value
        Oxygen in ``from_unit``.
    from_unit
        Unit of ``value``, one of :data:`UNITS`.
    to_unit
        Wanted unit, one of :data:`UNITS`.
    temp_c
        Water temperature, °C.
    salinity
        Practical salinity (PSS-78), dimensionless.
    pressure_kpa
        Barometric pressure over the water, kPa (matters for ``%sat`` only).

    Returns
    -------
    numpy.ndarray or float
        Oxygen in ``to_unit``.

    Notes
    -----
    ``umol/kg = umol/L / ρ`` with ρ (kg/L) from TEOS-10 at the sample's temperature and
    salinity and 0 dbar; ``mg/L`` and ``mL/L`` use 31.9988 g/mol and 22.3916 L/mol.
    ``O2sat = 100·[O2]/C*·(1013.25 − pH2O)/(p − pH2O)`` and
    ``pO2 = [O2]·xO2·(1013.25 − pH2O)/C*`` with C* the WG 142 saturation in µmol/L at 1 atm
    (Garcia & Gordon 1992 mL/L fit) and xO2 = 0.20946; the sample is taken at the surface, so
    WG 142's hydrostatic factor is 1.
    """
    source = normalise_unit(from_unit, field="from_unit")
    target = normalise_unit(to_unit, field="to_unit")
    temp, sal, pressure_hpa, vapour = _prepare(temp_c, salinity, pressure_kpa)
    amount = np.asarray(value, dtype=float)
    umol_l = _to_umol_l(amount, source, temp, sal, pressure_hpa, vapour)
    result = _from_umol_l(umol_l, target, temp, sal, pressure_hpa, vapour)
    shape = np.broadcast(amount, temp, sal, pressure_hpa).shape
    return _out(np.broadcast_to(np.asarray(result, dtype=float), shape).copy())
