"""Oxygen optodes: two-point Stern–Volmer calibration and its inverse.

Rule: pure functions on frozen calibration records. An optode's luminophore is quenched by O2:
its luminescence lifetime τ falls as oxygen rises. Instruments report either the lifetime (µs)
or the phase angle φ (degrees) of the luminescence against the modulated excitation; with
``tan φ = ω·τ`` every ratio of lifetimes equals the ratio of the phase tangents, so the same
equations serve both. Concentrations are µmol/L; use :func:`controller.science.oxygen.convert`
for other units.

Model (simplified Lehrer/Demas form, Klimant et al. 1995), with s the signal (τ or tan φ),
s0 its value without oxygen, f the quenchable fraction and KSV the Stern–Volmer constant::

    s/s0 = f/(1 + KSV·C) + (1 − f)          (f = 1: the plain law s0/s = 1 + KSV·C)

Two-point calibration: s0 in oxygen-free water (sulfite or N2 purged), s100 in air-saturated
water of known concentration C100; then ``KSV = (f/(s100/s0 − 1 + f) − 1)/C100``.

Temperature: KSV and s0 both change with temperature. Here each is corrected linearly from the
calibration temperature, ``KSV(T) = KSV_cal + dKSV/dT·(T − T_cal)`` and
``s0(T) = s0_cal + ds0/dT·(T − T_cal)``; the slopes come from the foil maker's data sheet or a
calibration at several temperatures. The linear form is common practice; it is the first-order
part of Uchida et al. (2008), whose KSV is quadratic and whose zero phase is linear in T.
With both slopes 0 (the default) calibrate at the working temperature.

References
----------
Klimant, I., Meyer, V. & Kühl, M. (1995) Fiber-optic oxygen microsensors, a new tool in aquatic
biology. Limnology and Oceanography 40:1159–1165.
Uchida, H. et al. (2008) In situ calibration of optode-based oxygen sensors. Journal of
Atmospheric and Oceanic Technology 25:2271–2281.
Bittig, H. C. et al. (2018) Oxygen optode sensors: principle, characterization, calibration,
and application in the ocean. Frontiers in Marine Science 4:429.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import StrEnum

import numpy as np
import numpy.typing as npt

from controller.errors import SquallError

__all__ = [
    "OptodeCalibration",
    "SignalKind",
    "calibrate_two_point",
    "concentration_from_lifetime",
    "concentration_from_phase",
    "concentration_from_signal",
    "lifetime_from_concentration",
    "phase_from_concentration",
    "signal_from_concentration",
]

ArrayLike = float | npt.ArrayLike


class SignalKind(StrEnum):
    """What the calibration's zero and span readings are."""

    LIFETIME_US = "lifetime_us"
    """Luminescence lifetime τ, µs."""
    PHASE_DEG = "phase_deg"
    """Phase angle φ, degrees (0 < φ < 90); the equations use tan φ."""


def _out(value: np.ndarray) -> np.ndarray | float:
    """A float for 0-d results, the array otherwise."""
    return float(value) if np.ndim(value) == 0 else value


def _to_signal(reading: ArrayLike, kind: SignalKind, field: str) -> np.ndarray:
    """Lifetime (µs) as is; phase (deg) to tan φ."""
    values = np.asarray(reading, dtype=float)
    if kind is SignalKind.PHASE_DEG:
        if np.any((values <= 0.0) | (values >= 90.0)):
            raise SquallError("phase angles must lie between 0 and 90 degrees", field=field)
        return np.tan(np.radians(values))
    if np.any(values <= 0.0):
        raise SquallError("lifetimes must be positive (µs)", field=field)
    return values


def _from_signal(signal: np.ndarray, kind: SignalKind) -> np.ndarray:
    """Inverse of :func:`_to_signal`."""
    if kind is SignalKind.PHASE_DEG:
        return np.degrees(np.arctan(signal))
    return signal


@dataclass(frozen=True)
class OptodeCalibration:
    """A two-point Stern–Volmer calibration of one optode foil.

    Attributes
    ----------
    kind
        Whether readings are lifetimes (µs) or phase angles (degrees).
    zero_reading
        Reading in oxygen-free water at ``temp_c``, µs or degrees.
    ksv_l_per_umol
        Stern–Volmer constant at ``temp_c``, L/µmol.
    quenchable_fraction
        f, the quenchable share of the luminescence (1 − f is not quenched), 0 < f <= 1.
    temp_c
        Temperature of the calibration, °C.
    ksv_slope_l_per_umol_per_k
        dKSV/dT, L µmol-1 K-1 (0: no correction).
    zero_slope_per_k
        d(zero reading)/dT, µs/K or degrees/K, in the unit of ``zero_reading`` (0: none).
    """

    kind: SignalKind
    zero_reading: float
    ksv_l_per_umol: float
    quenchable_fraction: float = 1.0
    temp_c: float = 20.0
    ksv_slope_l_per_umol_per_k: float = 0.0
    zero_slope_per_k: float = 0.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "kind", SignalKind(self.kind))
        if not 0.0 < self.quenchable_fraction <= 1.0:
            raise SquallError(
                f"quenchable fraction must be in (0, 1], got {self.quenchable_fraction}",
                field="quenchable_fraction",
            )
        if not (math.isfinite(self.ksv_l_per_umol) and self.ksv_l_per_umol > 0.0):
            raise SquallError("KSV must be a positive number (L/µmol)", field="ksv_l_per_umol")
        _to_signal(self.zero_reading, self.kind, "zero_reading")

    def at(self, temp_c: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
        """Temperature-corrected KSV and zero signal.

        Parameters
        ----------
        temp_c
            Foil temperature, °C.

        Returns
        -------
        tuple of numpy.ndarray
            KSV, L/µmol, and the zero signal s0: lifetime τ0, µs, or tan φ0 (dimensionless)
            for phase calibrations.
        """
        delta = np.asarray(temp_c, dtype=float) - self.temp_c
        ksv = self.ksv_l_per_umol + self.ksv_slope_l_per_umol_per_k * delta
        zero = self.zero_reading + self.zero_slope_per_k * delta
        if np.any(ksv <= 0.0):
            raise SquallError(
                "the temperature correction makes KSV non-positive; check the slope or "
                "calibrate nearer the working temperature",
                field="ksv_slope_l_per_umol_per_k",
            )
        return ksv, _to_signal(zero, self.kind, "zero_slope_per_k")


def calibrate_two_point(
    zero_reading: float,
    span_reading: float,
    span_umol_l: float,
    *,
    kind: SignalKind | str,
    temp_c: float,
    quenchable_fraction: float = 1.0,
    ksv_slope_l_per_umol_per_k: float = 0.0,
    zero_slope_per_k: float = 0.0,
) -> OptodeCalibration:
    """Two-point calibration from an oxygen-free and an air-saturated standard.

    Parameters
    ----------
    zero_reading
        Reading in oxygen-free water, µs or degrees (see ``kind``).
    span_reading
        Reading in the air-saturated standard, same unit.
    span_umol_l
        Oxygen of the saturated standard, µmol/L; usually
        ``oxygen.solubility(temp_c, salinity, pressure_kpa, unit="umol/L")``.
    kind
        ``"lifetime_us"`` or ``"phase_deg"``.
    temp_c
        Temperature of both standards, °C.
    quenchable_fraction
        f of the two-component model, 0 < f <= 1 (1: plain Stern–Volmer).
    ksv_slope_l_per_umol_per_k
        dKSV/dT used away from ``temp_c``, L µmol-1 K-1.
    zero_slope_per_k
        d(zero reading)/dT used away from ``temp_c``, µs/K or degrees/K.

    Returns
    -------
    OptodeCalibration
        With ``KSV = (f/(s100/s0 − 1 + f) − 1)/C100``, L/µmol.
    """
    kind = SignalKind(kind)
    if not (math.isfinite(span_umol_l) and span_umol_l > 0.0):
        raise SquallError(
            f"the span standard's oxygen must be positive, got {span_umol_l}", field="span_umol_l"
        )
    if not 0.0 < quenchable_fraction <= 1.0:
        raise SquallError(
            f"quenchable fraction must be in (0, 1], got {quenchable_fraction}",
            field="quenchable_fraction",
        )
    zero = float(_to_signal(zero_reading, kind, "zero_reading"))
    span = float(_to_signal(span_reading, kind, "span_reading"))
    ratio = span / zero
    if not 1.0 - quenchable_fraction < ratio < 1.0:
        raise SquallError(
            "the air-saturated reading must be below the oxygen-free one (oxygen quenches) "
            f"and above the unquenchable floor; got {span_reading} vs {zero_reading}",
            field="span_reading",
        )
    ksv = (quenchable_fraction / (ratio - 1.0 + quenchable_fraction) - 1.0) / span_umol_l
    return OptodeCalibration(
        kind=kind,
        zero_reading=float(zero_reading),
        ksv_l_per_umol=ksv,
        quenchable_fraction=quenchable_fraction,
        temp_c=temp_c,
        ksv_slope_l_per_umol_per_k=ksv_slope_l_per_umol_per_k,
        zero_slope_per_k=zero_slope_per_k,
    )


def concentration_from_signal(
    cal: OptodeCalibration, reading: ArrayLike, temp_c: ArrayLike
) -> np.ndarray | float:
    """Oxygen from a reading in the calibration's own kind (lifetime or phase).

    Parameters
    ----------
    cal
        The foil's calibration.
    reading
        Lifetime, µs, or phase angle, degrees, as ``cal.kind`` says.
    temp_c
        Foil temperature, °C.

    Returns
    -------
    numpy.ndarray or float
        Oxygen, µmol/L: ``(f/(s/s0 − 1 + f) − 1)/KSV``. Readings above the zero reading give
        slightly negative values (noise around anoxia) rather than being clipped.
    """
    ksv, zero = cal.at(temp_c)
    signal = _to_signal(reading, cal.kind, "reading")
    f = cal.quenchable_fraction
    ratio = signal / zero
    if np.any(ratio <= 1.0 - f):
        raise SquallError(
            "reading is at or below the unquenchable floor of the calibration", field="reading"
        )
    return _out((f / (ratio - 1.0 + f) - 1.0) / ksv)


def signal_from_concentration(
    cal: OptodeCalibration, o2_umol_l: ArrayLike, temp_c: ArrayLike
) -> np.ndarray | float:
    """The reading a calibrated foil gives at an oxygen concentration (inverse model).

    Parameters
    ----------
    cal
        The foil's calibration.
    o2_umol_l
        Oxygen, µmol/L (>= 0).
    temp_c
        Foil temperature, °C.

    Returns
    -------
    numpy.ndarray or float
        Lifetime, µs, or phase angle, degrees, as ``cal.kind`` says.
    """
    ksv, zero = cal.at(temp_c)
    conc = np.asarray(o2_umol_l, dtype=float)
    if np.any(conc < 0.0):
        raise SquallError("oxygen must be >= 0 µmol/L", field="o2_umol_l")
    f = cal.quenchable_fraction
    signal = zero * (f / (1.0 + ksv * conc) + (1.0 - f))
    return _out(_from_signal(signal, cal.kind))


def _require(cal: OptodeCalibration, kind: SignalKind) -> None:
    """Refuse to read lifetimes with a phase calibration and the other way round."""
    if cal.kind is not kind:
        raise SquallError(
            f"this calibration is for {cal.kind.value} readings, not {kind.value}", field="kind"
        )


def concentration_from_lifetime(
    cal: OptodeCalibration, tau_us: ArrayLike, temp_c: ArrayLike
) -> np.ndarray | float:
    """Oxygen from a luminescence lifetime (calibration of kind ``lifetime_us``).

    Parameters
    ----------
    cal
        The foil's calibration, made with lifetimes.
    tau_us
        Luminescence lifetime τ, µs.
    temp_c
        Foil temperature, °C.

    Returns
    -------
    numpy.ndarray or float
        Oxygen, µmol/L.
    """
    _require(cal, SignalKind.LIFETIME_US)
    return concentration_from_signal(cal, tau_us, temp_c)


def lifetime_from_concentration(
    cal: OptodeCalibration, o2_umol_l: ArrayLike, temp_c: ArrayLike
) -> np.ndarray | float:
    """Luminescence lifetime a foil shows at an oxygen concentration (inverse model).

    Parameters
    ----------
    cal
        The foil's calibration, made with lifetimes.
    o2_umol_l
        Oxygen, µmol/L (>= 0).
    temp_c
        Foil temperature, °C.

    Returns
    -------
    numpy.ndarray or float
        Luminescence lifetime τ, µs.
    """
    _require(cal, SignalKind.LIFETIME_US)
    return signal_from_concentration(cal, o2_umol_l, temp_c)


def concentration_from_phase(
    cal: OptodeCalibration, phase_deg: ArrayLike, temp_c: ArrayLike
) -> np.ndarray | float:
    """Oxygen from a phase angle (calibration of kind ``phase_deg``).

    Parameters
    ----------
    cal
        The foil's calibration, made with phase angles.
    phase_deg
        Phase angle φ of the luminescence, degrees (0 to 90).
    temp_c
        Foil temperature, °C.

    Returns
    -------
    numpy.ndarray or float
        Oxygen, µmol/L.
    """
    _require(cal, SignalKind.PHASE_DEG)
    return concentration_from_signal(cal, phase_deg, temp_c)


def phase_from_concentration(
    cal: OptodeCalibration, o2_umol_l: ArrayLike, temp_c: ArrayLike
) -> np.ndarray | float:
    """Phase angle a foil shows at an oxygen concentration (inverse model; simulators).

    Parameters
    ----------
    cal
        The foil's calibration, made with phase angles.
    o2_umol_l
        Oxygen, µmol/L (>= 0).
    temp_c
        Foil temperature, °C.

    Returns
    -------
    numpy.ndarray or float
        Phase angle φ, degrees.
    """
    _require(cal, SignalKind.PHASE_DEG)
    return signal_from_concentration(cal, o2_umol_l, temp_c)
