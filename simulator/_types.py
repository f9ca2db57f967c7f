"""Values the simulated rack hands out: readings, actuator states, the true state, and the
exception a silent sensor raises.

Rule: these are plain frozen records with units in their field names; nothing here computes.
"""

from __future__ import annotations

from dataclasses import dataclass

from controller.errors import RuntimeFailure

__all__ = ["ChamberTruth", "OptodeReading", "Outputs", "SensorNoReply"]


class SensorNoReply(RuntimeFailure):
    """A simulated sensor did not answer (dropout, comm timeout or power loss).

    Parameters
    ----------
    chamber_id
        Chamber whose sensor is silent.
    sensor
        Which sensor: ``temperature``, ``optode``, ``par`` or ``flow``.
    """

    def __init__(self, chamber_id: str, sensor: str) -> None:
        super().__init__(f"{chamber_id}: {sensor} sensor did not reply")
        self.chamber_id = chamber_id
        self.sensor = sensor


@dataclass(frozen=True, slots=True, kw_only=True)
class OptodeReading:
    """One optode reply.

    Attributes
    ----------
    o2_umol_l
        Dissolved oxygen, µmol L⁻¹.
    o2_sat_pct
        Oxygen relative to air saturation at the optode's temperature reading, %.
    temperature_c
        The optode's own temperature reading, °C.
    phase_deg
        Luminescence phase angle the O2 value was derived from, degrees.
    """

    o2_umol_l: float
    o2_sat_pct: float
    temperature_c: float
    phase_deg: float


@dataclass(frozen=True, slots=True, kw_only=True)
class Outputs:
    """What a chamber's actuators actually do now, after faults and power loss.

    For a chamber in a shared bath, heater and chiller are the bath's.

    Attributes
    ----------
    heater_pct
        Heater drive, %.
    chiller_pct
        Chiller drive, %.
    lamp_pct
        Lamp drive, %.
    pump_pct
        Pump drive, %.
    """

    heater_pct: float
    chiller_pct: float
    lamp_pct: float
    pump_pct: float


@dataclass(frozen=True, slots=True, kw_only=True)
class ChamberTruth:
    """The true state of one chamber, for tests and for judging the controller.

    Thermal quantities (power, energy, heat capacity) are those of the chamber's thermal node,
    i.e. of the whole bath for a chamber in a shared bath.

    Attributes
    ----------
    temperature_c
        Water temperature, °C.
    o2_umol_l
        Dissolved oxygen, µmol L⁻¹.
    o2_sat_pct
        Dissolved oxygen relative to air saturation, %.
    o2_saturation_umol_l
        Air-saturation concentration at the water's temperature and salinity, µmol L⁻¹.
    par
        PAR at the community, µmol photons m⁻² s⁻¹.
    flow_cm_s
        Flow over the community, cm s⁻¹.
    incubation_open
        True while the pump flushes the chamber (open incubation), dimensionless.
    water_volume_l
        Water left in the chamber, L.
    gpp_umol_m2_h
        Gross O2 production now, µmol O2 m⁻² h⁻¹.
    resp_umol_m2_h
        Community respiration now, µmol O2 m⁻² h⁻¹.
    net_umol_m2_h
        Net community production (gpp − resp) now, µmol O2 m⁻² h⁻¹.
    heater_w
        Heater power reaching the water now (after the dead time), W.
    chiller_w
        Heat removed by the chiller now (after the dead time), W.
    heat_capacity_j_k
        Heat capacity of the thermal node, J K⁻¹.
    heater_energy_j
        Heat delivered by the heater since start, J.
    chiller_energy_j
        Heat removed by the chiller since start, J.
    room_loss_j
        Heat lost to the room since start (UA·∫(T − T_room)dt), J.
    flush_loss_j
        Heat carried out by flushing since start (∫q·ρ·cp·(T − T_inflow)dt), J.
    probe_temperature_c
        The temperature probe's lagged value before noise, offset and faults, °C.
    optode_o2_umol_l
        The optode's lagged value before noise, offset, drift and faults, µmol L⁻¹.
    lamp_hours_h
        Hours the lamp has been lit, h.
    """

    temperature_c: float
    o2_umol_l: float
    o2_sat_pct: float
    o2_saturation_umol_l: float
    par: float
    flow_cm_s: float
    incubation_open: bool
    water_volume_l: float
    gpp_umol_m2_h: float
    resp_umol_m2_h: float
    net_umol_m2_h: float
    heater_w: float
    chiller_w: float
    heat_capacity_j_k: float
    heater_energy_j: float
    chiller_energy_j: float
    room_loss_j: float
    flush_loss_j: float
    probe_temperature_c: float
    optode_o2_umol_l: float
    lamp_hours_h: float
