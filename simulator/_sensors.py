"""What a sensor reports, given the true (lagged) value, its calibration and active faults.

Rule: randomness comes only from the rack's seeded ``numpy.random.Generator``, passed in, so a
rack with the same seed and the same sequence of calls reads the same numbers. Dropout and
stuck faults are handled by the rack before these functions are called; these add noise,
offset, drift and spikes.
"""

from __future__ import annotations

import numpy as np

from controller.rig import FaultKind
from simulator._faults import ScheduledFault
from simulator._science import optode_phase_deg
from simulator._types import OptodeReading

__all__ = ["SPIKE_PROBABILITY", "fault_offset", "noisy", "optode_reading"]

SPIKE_PROBABILITY = 0.2
"""Chance that one reading under a spikes fault jumps by ±magnitude, dimensionless."""


def fault_offset(faults: list[ScheduledFault], t_s: float, rng: np.random.Generator) -> float:
    """Error added by active drift and spikes faults to one reading.

    Parameters
    ----------
    faults
        Active faults on this sensor.
    t_s
        Simulated time of the reading, s.
    rng
        The rack's random generator.

    Returns
    -------
    float
        Error in the sensor's unit: drift magnitude (per hour) × hours since the fault began,
        plus ±magnitude with probability :data:`SPIKE_PROBABILITY` per spikes fault.
    """
    error = 0.0
    for entry in faults:
        magnitude = entry.fault.magnitude or 0.0
        if entry.fault.kind is FaultKind.DRIFT:
            error += magnitude * (t_s - entry.start_s) / 3600.0
        elif entry.fault.kind is FaultKind.SPIKES and rng.random() < SPIKE_PROBABILITY:
            error += magnitude if rng.random() < 0.5 else -magnitude
    return error


def noisy(value: float, sd: float, rng: np.random.Generator) -> float:
    """Add Gaussian noise to a reading.

    Parameters
    ----------
    value
        Noise-free reading, in the sensor's unit.
    sd
        Standard deviation of the noise, in the sensor's unit (0 = no noise, no draw).
    rng
        The rack's random generator.

    Returns
    -------
    float
        The noisy reading, in the sensor's unit.
    """
    return value + sd * float(rng.standard_normal()) if sd > 0.0 else value


def optode_reading(
    o2_umol_l: float,
    temperature_c: float,
    saturation_umol_l: float,
    phase0_deg: float,
    ksv_l_umol: float,
    fraction: float,
) -> OptodeReading:
    """Assemble an optode reply from its oxygen and temperature readings.

    Parameters
    ----------
    o2_umol_l
        The optode's oxygen reading (after noise, drift and faults), µmol L⁻¹; clipped at 0.
    temperature_c
        The optode's temperature reading, °C.
    saturation_umol_l
        Air saturation at that temperature and the chamber's salinity, µmol L⁻¹.
    phase0_deg
        Phase angle without oxygen, degrees.
    ksv_l_umol
        Stern–Volmer constant, L µmol⁻¹.
    fraction
        Quenchable fraction of the luminescence, dimensionless.

    Returns
    -------
    OptodeReading
        Oxygen, % saturation, temperature and the phase angle consistent with the oxygen.
    """
    o2 = max(float(o2_umol_l), 0.0)
    phase = optode_phase_deg(o2, float(temperature_c), phase0_deg, ksv_l_umol, fraction)
    return OptodeReading(
        o2_umol_l=o2,
        o2_sat_pct=100.0 * o2 / float(saturation_umol_l),
        temperature_c=float(temperature_c),
        phase_deg=phase,
    )
