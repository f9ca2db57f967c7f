"""Simulator parameters in the rig file: chamber physics, biology, sensors, baths and faults.

Rule: every table here is optional, so a rig written for real hardware is also a valid
simulated rig; defaults describe a plausible 20 L seawater chamber. The biology names under
``[chambers.sim.biology]`` are a contract (see the design notes) and are only ever added to.
Thermal parameters belong to the thermal node: under ``[chambers.sim.thermal]`` for a chamber
with its own water, under ``[baths.thermal]`` for chambers that share a bath.
"""

from __future__ import annotations

from enum import StrEnum
from typing import Self

from pydantic import Field, model_validator

from controller._model import FileModel

__all__ = [
    "COMM_DEVICES",
    "SENSORS",
    "Bath",
    "BiologySim",
    "ChamberSim",
    "Fault",
    "FaultKind",
    "LampSim",
    "OptodeSim",
    "PumpSim",
    "RackSim",
    "SensorSim",
    "ThermalSim",
]

SENSORS: tuple[str, ...] = ("temperature", "optode", "par", "flow")
"""Sensor names a sensor fault may target."""

COMM_DEVICES: tuple[str, ...] = ("modbus", "optode")
"""Device names a comm-timeout fault may target (``None`` covers both)."""


class FaultKind(StrEnum):
    """What goes wrong in a simulated fault."""

    STUCK = "stuck"
    """A sensor keeps returning the value it had when the fault began."""
    DROPOUT = "dropout"
    """A sensor does not answer (:class:`simulator.SensorNoReply`)."""
    SPIKES = "spikes"
    """A sensor's readings jump by ±magnitude now and then."""
    DRIFT = "drift"
    """A sensor's readings wander off by magnitude per hour."""
    HEATER_STUCK_ON = "heater-stuck-on"
    """The heater relay welds shut: full power whatever the command."""
    HEATER_STUCK_OFF = "heater-stuck-off"
    """The heater delivers nothing whatever the command."""
    CHILLER_FAILURE = "chiller-failure"
    """The chiller delivers no cooling."""
    PUMP_FAILURE = "pump-failure"
    """The pump stops: no flow, no flushing."""
    LEAK = "leak"
    """Water is lost at magnitude L/h; the level switch trips past the alarm loss."""
    COMM_TIMEOUT = "comm-timeout"
    """A device stops answering on its bus (``sensor`` names the device or None for all)."""
    POWER_LOSS = "power-loss"
    """Mains lost: every actuator off and no device answers."""


_SENSOR_KINDS = frozenset({FaultKind.STUCK, FaultKind.DROPOUT, FaultKind.SPIKES, FaultKind.DRIFT})
_NEEDS_MAGNITUDE = frozenset({FaultKind.SPIKES, FaultKind.DRIFT, FaultKind.LEAK})


class Fault(FileModel):
    """One scheduled fault, from the rig file (``[[sim.faults]]``) or ``Rack.inject``.

    The fault is active from ``at_s`` (or from the moment it is injected, if that is later)
    for ``duration_s`` seconds, or until cleared when ``duration_s`` is absent.
    """

    kind: FaultKind = Field(description="What goes wrong (see FaultKind).")
    chamber: str | None = Field(
        None, description="Chamber id the fault hits; absent = every chamber."
    )
    sensor: str | None = Field(
        None,
        description="For stuck/dropout/spikes/drift: 'temperature', 'optode', 'par' or 'flow'. "
        "For comm-timeout: 'modbus' or 'optode' (absent = both). Absent otherwise.",
    )
    at_s: float = Field(0.0, ge=0, description="Simulated time the fault begins, s.")
    duration_s: float | None = Field(
        None, gt=0, description="How long the fault lasts, s; absent = until cleared."
    )
    magnitude: float | None = Field(
        None,
        description="Kind-specific size: drift in sensor units per hour (°C h⁻¹, µmol L⁻¹ h⁻¹, "
        "µmol m⁻² s⁻¹ h⁻¹, cm s⁻¹ h⁻¹), spike size in sensor units, leak rate in L h⁻¹.",
    )

    @model_validator(mode="after")
    def _fields_fit_kind(self) -> Self:
        if self.kind in _SENSOR_KINDS:
            if self.sensor not in SENSORS:
                raise ValueError(
                    f"a {self.kind.value} fault needs sensor = one of {', '.join(SENSORS)}"
                )
        elif self.kind is FaultKind.COMM_TIMEOUT:
            if self.sensor is not None and self.sensor not in COMM_DEVICES:
                raise ValueError(
                    f"a comm-timeout fault's sensor names a device: {', '.join(COMM_DEVICES)}"
                    " (or leave it out for both)"
                )
        elif self.sensor is not None:
            raise ValueError(f"a {self.kind.value} fault takes no sensor")
        if self.kind in _NEEDS_MAGNITUDE:
            if self.magnitude is None:
                raise ValueError(f"a {self.kind.value} fault needs a magnitude")
            if self.kind is not FaultKind.DRIFT and self.magnitude <= 0:
                raise ValueError(f"a {self.kind.value} fault needs a positive magnitude")
        elif self.magnitude is not None:
            raise ValueError(f"a {self.kind.value} fault takes no magnitude")
        return self


class ThermalSim(FileModel):
    """Lumped heat balance of one thermal node (a chamber's own water, or a shared bath).

    C·dT/dt = P_heater − P_chiller − UA·(T − T_room) − q·ρ·cp·(T − T_inflow), with C = m·cp
    from the node's water.
    """

    ua_w_k: float = Field(
        8.0, gt=0, le=10000, description="Heat-loss coefficient to the room, W K⁻¹."
    )
    heater_max_w: float = Field(
        300.0, ge=0, le=100000, description="Heater power at 100 % drive, W."
    )
    chiller_max_w: float = Field(
        250.0, ge=0, le=100000, description="Heat removed by the chiller at 100 % drive, W."
    )
    dead_time_s: float = Field(
        20.0,
        ge=0,
        le=3600,
        description="Transport delay between an actuator change and the water feeling it, s.",
    )


class LampSim(FileModel):
    """Lamp drive → PAR at the community.

    PAR(d) = par_at_full_drive · (1 − e^(−k·d/100)) / (1 − e^(−k)) with k = curve_shape
    (k = 0: linear), times warm-up (cold_output_fraction rising to 1 with warmup_tau_s after
    switch-on) and ageing ((1 − ageing_pct_per_1000_h/100) per 1000 h lit).
    """

    par_at_full_drive: float | None = Field(
        None,
        ge=0,
        le=5000,
        description="PAR of a new, warm lamp at 100 % drive, µmol photons m⁻² s⁻¹; "
        "absent = the chamber's limits.max_par.",
    )
    curve_shape: float = Field(
        1.2,
        ge=0,
        le=20,
        description="Saturation of the drive→PAR curve, dimensionless (0 = linear).",
    )
    warmup_tau_s: float = Field(
        90.0, ge=0, le=7200, description="Time constant of lamp warm-up and cool-down, s."
    )
    cold_output_fraction: float = Field(
        0.85, gt=0, le=1, description="Output of a cold lamp relative to a warm one, fraction."
    )
    ageing_pct_per_1000_h: float = Field(
        2.0, ge=0, le=100, description="Output lost per 1000 h lit, %."
    )
    lamp_hours_h: float = Field(
        0.0, ge=0, le=200000, description="Hours the lamp has already been lit at start, h."
    )


class PumpSim(FileModel):
    """Pump drive → flow over the community and flushing of the chamber water.

    flow = flow_at_full_drive · (d − dead_band_pct)/(100 − dead_band_pct) above the dead band,
    0 below it; flushing scales the same way. The incubation is open while the pump runs.
    """

    dead_band_pct: float = Field(
        8.0, ge=0, lt=100, description="Drive below which the pump does not turn, %."
    )
    flow_at_full_drive_cm_s: float | None = Field(
        None,
        ge=0,
        le=200,
        description="Flow over the community at 100 % drive, cm s⁻¹; absent = the chamber's "
        "limits.max_flow_cm_s.",
    )
    flush_at_full_drive_l_h: float = Field(
        30.0, ge=0, le=100000, description="Fresh inflow water at 100 % drive, L h⁻¹."
    )


class BiologySim(FileModel):
    """Community oxygen metabolism (names fixed by the design contract).

    GPP = gpp_max·tanh(I/Ik)·exp((ea_gpp/k)(1/T_ref − 1/T)) (Jassby & Platt 1976 with
    Boltzmann–Arrhenius), R = resp·exp((ea_resp/k)(1/T_ref − 1/T)). Above stress_threshold_c,
    GPP loses stress_gpp_loss_per_c of itself per °C (floored at 0) and respiration gains
    stress_resp_gain_per_c per °C.
    """

    gpp_max_umol_m2_h: float = Field(
        2000.0,
        ge=0,
        le=100000,
        description="Light-saturated gross O2 production at t_ref_c, µmol O2 m⁻² h⁻¹.",
    )
    ik_umol_m2_s: float = Field(
        250.0,
        gt=0,
        le=5000,
        description="Saturation irradiance of the Jassby & Platt curve, µmol photons m⁻² s⁻¹.",
    )
    resp_umol_m2_h: float = Field(
        900.0, ge=0, le=100000, description="Community respiration at t_ref_c, µmol O2 m⁻² h⁻¹."
    )
    ea_gpp_ev: float = Field(
        0.32, ge=0, le=3, description="Activation energy of gross production, eV."
    )
    ea_resp_ev: float = Field(0.65, ge=0, le=3, description="Activation energy of respiration, eV.")
    t_ref_c: float = Field(
        20.0, ge=-5, le=50, description="Reference temperature of the rates, °C."
    )
    stress_threshold_c: float | None = Field(
        None,
        ge=-5,
        le=50,
        description="Temperature above which thermal stress sets in, °C; absent = no stress.",
    )
    stress_gpp_loss_per_c: float = Field(
        0.1, ge=0, le=1, description="Fraction of GPP lost per °C above the threshold, °C⁻¹."
    )
    stress_resp_gain_per_c: float = Field(
        0.0, ge=0, le=10, description="Extra respiration per °C above the threshold, °C⁻¹."
    )


class OptodeSim(FileModel):
    """Oxygen optode: first-order response, noise, drift, offset, Stern–Volmer phase.

    The phase angle follows tan φ/tan φ0 = f/(1 + KSV·C) + (1 − f) (simplified Lehrer/Demas
    form, as in :mod:`controller.science.optode`); KSV and φ0 do not vary with temperature.
    """

    t90_s: float = Field(
        40.0, ge=0, le=3600, description="Time to 90 % of a step (τ = t90/ln 10), s."
    )
    noise_umol_l: float = Field(
        0.3, ge=0, le=100, description="Standard deviation of reading noise, µmol L⁻¹."
    )
    drift_umol_l_per_day: float = Field(
        0.0, ge=-100, le=100, description="Slow calibration drift, µmol L⁻¹ d⁻¹."
    )
    offset_umol_l: float = Field(
        0.0, ge=-100, le=100, description="Calibration offset at start, µmol L⁻¹."
    )
    phase0_deg: float = Field(60.0, gt=0, lt=90, description="Phase angle without oxygen, degrees.")
    ksv_l_umol: float = Field(
        3.54591e-3,
        gt=0,
        le=1,
        description="Stern–Volmer constant relating tan φ0/tan φ − 1 to O2, L µmol⁻¹.",
    )
    quenchable_fraction: float = Field(
        1.0,
        gt=0,
        le=1,
        description="Share of the luminescence that O2 quenches, fraction (1 = plain "
        "Stern–Volmer).",
    )


class SensorSim(FileModel):
    """Temperature probe, PAR sensor and flow sensor of one chamber, plus its optode."""

    temperature_noise_c: float = Field(
        0.01, ge=0, le=5, description="Standard deviation of probe noise, °C."
    )
    temperature_tau_s: float = Field(
        10.0, ge=0, le=3600, description="First-order lag of the temperature probe, s."
    )
    temperature_offset_c: float = Field(
        0.0, ge=-5, le=5, description="Calibration offset of the probe, °C."
    )
    par_noise_pct: float = Field(
        1.0, ge=0, le=50, description="Standard deviation of PAR noise, % of reading."
    )
    flow_noise_cm_s: float = Field(
        0.1, ge=0, le=10, description="Standard deviation of flow noise, cm s⁻¹."
    )
    optode: OptodeSim = Field(default_factory=OptodeSim, description="The chamber's optode.")


class ChamberSim(FileModel):
    """Everything the simulator needs to know about one chamber (``[chambers.sim]``)."""

    thermal: ThermalSim | None = Field(
        None,
        description="Heat balance of a chamber with its own water (not allowed for a chamber "
        "in a bath: give [baths.thermal] instead); absent = defaults.",
    )
    lamp: LampSim = Field(default_factory=LampSim, description="Lamp calibration.")
    pump: PumpSim = Field(default_factory=PumpSim, description="Pump calibration.")
    biology: BiologySim = Field(
        default_factory=BiologySim, description="Community oxygen metabolism."
    )
    sensors: SensorSim = Field(default_factory=SensorSim, description="Sensor behaviour.")
    reaeration_per_h: float = Field(
        0.5,
        ge=0,
        le=1000,
        description="O2 exchange with the air while the incubation is open, h⁻¹.",
    )
    initial_temperature_c: float | None = Field(
        None, ge=-5, le=50, description="Water temperature at start, °C; absent = room."
    )
    initial_o2_sat_pct: float = Field(
        100.0, ge=0, le=300, description="Dissolved O2 at start, % air saturation."
    )


class Bath(FileModel):
    """A water bath holding several chambers: one thermal node (``[[baths]]``).

    Its heat capacity is that of the bath's own water plus the water of every chamber in it.
    """

    id: str = Field(
        min_length=1,
        max_length=32,
        pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$",
        description="Bath identifier named by chambers' bath key.",
    )
    water_volume_l: float = Field(
        100.0, ge=0, le=100000, description="Bath water around the chambers, L."
    )
    salinity: float = Field(
        35.0, ge=0, le=42, description="Practical salinity of the bath water (PSS-78)."
    )
    thermal: ThermalSim = Field(
        default_factory=ThermalSim, description="Heat balance of the bath node."
    )


class RackSim(FileModel):
    """Rack-wide simulator settings (``[sim]``)."""

    room_temperature_c: float = Field(
        20.0, ge=-10, le=50, description="Air temperature around the rack, °C."
    )
    inflow_temperature_c: float | None = Field(
        None, ge=-5, le=50, description="Temperature of flushing water, °C; absent = room."
    )
    pressure_kpa: float = Field(
        101.325, ge=50, le=120, description="Barometric pressure for O2 saturation, kPa."
    )
    physics_step_s: float = Field(1.0, gt=0, le=60, description="Longest integration sub-step, s.")
    seed: int = Field(0, ge=0, description="Seed of the sensor-noise generator, dimensionless.")
    level_alarm_loss_pct: float = Field(
        5.0,
        gt=0,
        le=90,
        description="Water loss after which a chamber's level switch trips, % of volume.",
    )
    faults: list[Fault] = Field(
        default_factory=list, description="Faults scheduled from the start of a simulation."
    )
