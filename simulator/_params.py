"""Turn a validated rig into flat numpy parameter arrays, one entry per chamber or per node.

Rule: everything the physics needs is resolved here once (defaults filled in from the
chamber limits, baths grouped into thermal nodes, water heat capacity computed with gsw), so
the stepping code only does array arithmetic. A *node* is one body of water with one
temperature: a chamber with its own water, or a bath with every chamber in it.
"""

from __future__ import annotations

from dataclasses import dataclass

import gsw
import numpy as np
from numpy.typing import NDArray

from controller.rig import Fault, Rig, ThermalSim

__all__ = ["RackParams", "resolve", "water_rho_cp"]

F = NDArray[np.float64]
I = NDArray[np.intp]  # noqa: E741


def water_rho_cp(salinity: F | float, temp_c: F | float) -> F:
    """Volumetric heat capacity of water at the surface.

    Parameters
    ----------
    salinity
        Practical salinity (PSS-78), dimensionless; 0 for fresh water.
    temp_c
        In-situ temperature (ITS-90), °C.

    Returns
    -------
    numpy.ndarray
        ρ·cp, J L⁻¹ K⁻¹.

    Notes
    -----
    ρ and cp from TEOS-10 (gsw ``rho_t_exact`` and ``cp_t_exact`` at sea pressure 0) with
    Reference Salinity ``SR_from_SP``. At 20 °C this gives cp = 3996.1 J kg⁻¹ K⁻¹ and
    ρ = 1024.77 kg m⁻³ for S = 35, and cp = 4184.1, ρ = 998.21 for fresh water.
    """
    sr = gsw.SR_from_SP(np.asarray(salinity, dtype=float))
    t = np.asarray(temp_c, dtype=float)
    rho = gsw.rho_t_exact(sr, t, 0.0)
    cp = gsw.cp_t_exact(sr, t, 0.0)
    return np.asarray(rho * cp / 1000.0, dtype=float)


@dataclass(frozen=True, slots=True, kw_only=True)
class RackParams:
    """Resolved simulator parameters (per chamber ``(N,)`` or per thermal node ``(M,)``).

    Units are in the names: ``_c`` °C, ``_s`` s, ``_w`` W, ``_l`` L, ``_per_s`` s⁻¹,
    ``_frac`` fraction. Biology rates are µmol O2 m⁻² h⁻¹ as in the rig file.
    """

    chamber_ids: tuple[str, ...]
    node_names: tuple[str, ...]
    node_of_chamber: I
    driver_of_node: I
    # thermal nodes (M,)
    ua_w_k: F
    heater_max_w: F
    chiller_max_w: F
    dead_time_s: F
    bath_volume_l: F
    bath_rho_cp_j_l_k: F
    initial_node_temperature_c: F
    # chamber water (N,)
    volume_l: F
    area_m2: F
    salinity: F
    rho_cp_j_l_k: F
    initial_o2_sat_frac: F
    reaeration_per_s: F
    # lamp (N,)
    par_at_full: F
    curve_shape: F
    warmup_tau_s: F
    cold_output_frac: F
    ageing_frac_per_1000_h: F
    lamp_hours0_h: F
    # pump (N,)
    dead_band_pct: F
    flow_at_full_cm_s: F
    flush_at_full_l_s: F
    # biology (N,)
    gpp_max_umol_m2_h: F
    ik_umol_m2_s: F
    resp_umol_m2_h: F
    ea_gpp_ev: F
    ea_resp_ev: F
    t_ref_c: F
    stress_threshold_c: F
    stress_gpp_loss_per_c: F
    stress_resp_gain_per_c: F
    # sensors (N,)
    temperature_noise_c: F
    temperature_tau_s: F
    temperature_offset_c: F
    par_noise_frac: F
    flow_noise_cm_s: F
    optode_tau_s: F
    optode_noise_umol_l: F
    optode_drift_umol_l_per_s: F
    optode_offset_umol_l: F
    phase0_deg: F
    ksv_l_umol: F
    quenchable_fraction: F
    # rack
    room_temperature_c: float
    inflow_temperature_c: float
    pressure_kpa: float
    physics_step_s: float
    seed: int
    level_alarm_frac: float
    faults: tuple[Fault, ...]


def _arr(values: list[float]) -> F:
    return np.array(values, dtype=float)


def resolve(rig: Rig) -> RackParams:
    """Resolve a rig's simulator parameters into arrays.

    Parameters
    ----------
    rig
        A validated rig; chambers naming the same bath become one thermal node, whose heater
        and chiller are driven through the first of those chambers.

    Returns
    -------
    RackParams
        Arrays over chambers (in rig order) and nodes (in order of first appearance).
    """
    chambers = rig.chambers
    room = rig.sim.room_temperature_c
    node_names: list[str] = []
    node_thermal: list[ThermalSim] = []
    node_bath_volume: list[float] = []
    node_bath_salinity: list[float] = []
    node_driver: list[int] = []
    node_of: list[int] = []
    index_of_bath: dict[str, int] = {}
    for i, ch in enumerate(chambers):
        if ch.bath is None:
            node_of.append(len(node_names))
            node_names.append(ch.id)
            node_thermal.append(ch.sim.thermal or ThermalSim())
            node_bath_volume.append(0.0)
            node_bath_salinity.append(ch.salinity)
            node_driver.append(i)
            continue
        if ch.bath not in index_of_bath:
            bath = rig.bath(ch.bath)
            index_of_bath[ch.bath] = len(node_names)
            node_names.append(ch.bath)
            # An undefined bath (allowed when no [[baths]] are given) is a bath with no
            # water of its own and default thermal parameters.
            node_thermal.append(bath.thermal if bath else ThermalSim())
            node_bath_volume.append(bath.water_volume_l if bath else 0.0)
            node_bath_salinity.append(bath.salinity if bath else ch.salinity)
            node_driver.append(i)
        node_of.append(index_of_bath[ch.bath])

    def initial(ch_index: int) -> float:
        value = chambers[ch_index].sim.initial_temperature_c
        return room if value is None else value

    node_t0 = _arr([initial(d) for d in node_driver])
    node_of_arr = np.array(node_of, dtype=np.intp)
    salinity = _arr([c.salinity for c in chambers])
    sims = [c.sim for c in chambers]
    optodes = [s.sensors.optode for s in sims]
    inflow = rig.sim.inflow_temperature_c
    return RackParams(
        chamber_ids=tuple(c.id for c in chambers),
        node_names=tuple(node_names),
        node_of_chamber=node_of_arr,
        driver_of_node=np.array(node_driver, dtype=np.intp),
        ua_w_k=_arr([t.ua_w_k for t in node_thermal]),
        heater_max_w=_arr([t.heater_max_w for t in node_thermal]),
        chiller_max_w=_arr([t.chiller_max_w for t in node_thermal]),
        dead_time_s=_arr([t.dead_time_s for t in node_thermal]),
        bath_volume_l=_arr(node_bath_volume),
        bath_rho_cp_j_l_k=water_rho_cp(_arr(node_bath_salinity), node_t0),
        initial_node_temperature_c=node_t0,
        volume_l=_arr([c.water_volume_l for c in chambers]),
        area_m2=_arr([c.sediment_area_m2 for c in chambers]),
        salinity=salinity,
        rho_cp_j_l_k=water_rho_cp(salinity, node_t0[node_of_arr]),
        initial_o2_sat_frac=_arr([s.initial_o2_sat_pct / 100.0 for s in sims]),
        reaeration_per_s=_arr([s.reaeration_per_h / 3600.0 for s in sims]),
        par_at_full=_arr(
            [
                c.limits.max_par
                if c.sim.lamp.par_at_full_drive is None
                else c.sim.lamp.par_at_full_drive
                for c in chambers
            ]
        ),
        curve_shape=_arr([s.lamp.curve_shape for s in sims]),
        warmup_tau_s=_arr([s.lamp.warmup_tau_s for s in sims]),
        cold_output_frac=_arr([s.lamp.cold_output_fraction for s in sims]),
        ageing_frac_per_1000_h=_arr([s.lamp.ageing_pct_per_1000_h / 100.0 for s in sims]),
        lamp_hours0_h=_arr([s.lamp.lamp_hours_h for s in sims]),
        dead_band_pct=_arr([s.pump.dead_band_pct for s in sims]),
        flow_at_full_cm_s=_arr(
            [
                c.limits.max_flow_cm_s
                if c.sim.pump.flow_at_full_drive_cm_s is None
                else c.sim.pump.flow_at_full_drive_cm_s
                for c in chambers
            ]
        ),
        flush_at_full_l_s=_arr([s.pump.flush_at_full_drive_l_h / 3600.0 for s in sims]),
        gpp_max_umol_m2_h=_arr([s.biology.gpp_max_umol_m2_h for s in sims]),
        ik_umol_m2_s=_arr([s.biology.ik_umol_m2_s for s in sims]),
        resp_umol_m2_h=_arr([s.biology.resp_umol_m2_h for s in sims]),
        ea_gpp_ev=_arr([s.biology.ea_gpp_ev for s in sims]),
        ea_resp_ev=_arr([s.biology.ea_resp_ev for s in sims]),
        t_ref_c=_arr([s.biology.t_ref_c for s in sims]),
        stress_threshold_c=_arr(
            [
                np.inf if s.biology.stress_threshold_c is None else s.biology.stress_threshold_c
                for s in sims
            ]
        ),
        stress_gpp_loss_per_c=_arr([s.biology.stress_gpp_loss_per_c for s in sims]),
        stress_resp_gain_per_c=_arr([s.biology.stress_resp_gain_per_c for s in sims]),
        temperature_noise_c=_arr([s.sensors.temperature_noise_c for s in sims]),
        temperature_tau_s=_arr([s.sensors.temperature_tau_s for s in sims]),
        temperature_offset_c=_arr([s.sensors.temperature_offset_c for s in sims]),
        par_noise_frac=_arr([s.sensors.par_noise_pct / 100.0 for s in sims]),
        flow_noise_cm_s=_arr([s.sensors.flow_noise_cm_s for s in sims]),
        optode_tau_s=_arr([o.t90_s / np.log(10.0) for o in optodes]),
        optode_noise_umol_l=_arr([o.noise_umol_l for o in optodes]),
        optode_drift_umol_l_per_s=_arr([o.drift_umol_l_per_day / 86400.0 for o in optodes]),
        optode_offset_umol_l=_arr([o.offset_umol_l for o in optodes]),
        phase0_deg=_arr([o.phase0_deg for o in optodes]),
        ksv_l_umol=_arr([o.ksv_l_umol for o in optodes]),
        quenchable_fraction=_arr([o.quenchable_fraction for o in optodes]),
        room_temperature_c=room,
        inflow_temperature_c=room if inflow is None else inflow,
        pressure_kpa=rig.sim.pressure_kpa,
        physics_step_s=rig.sim.physics_step_s,
        seed=rig.sim.seed,
        level_alarm_frac=rig.sim.level_alarm_loss_pct / 100.0,
        faults=tuple(rig.sim.faults),
    )
