"""Community metabolism and the dissolved-oxygen balance against published formulas."""

from __future__ import annotations

import math

import gsw
import numpy as np
import pytest
from sim_rigs import chamber, rack, thermal

K_BOLTZMANN_EV_K = 8.617333262e-5  # CODATA 2018, exact


def _bio_rack(temp_c: float, **biology: float):  # type: ignore[no-untyped-def]
    """One closed chamber held at ``temp_c`` (huge heat capacity, room at the same temperature)."""
    bio = {
        "gpp_max_umol_m2_h": 2000.0,
        "ik_umol_m2_s": 250.0,
        "resp_umol_m2_h": 900.0,
        "ea_gpp_ev": 0.32,
        "ea_resp_ev": 0.65,
        "t_ref_c": 20.0,
        **biology,
    }
    return rack(
        chamber(
            sim={
                "biology": bio,
                "lamp": {"par_at_full_drive": 1000.0, "curve_shape": 0.0},
                "thermal": thermal(ua_w_k=1.0),
                "initial_temperature_c": temp_c,
            }
        ),
        sim={"room_temperature_c": temp_c},
    )


def test_gross_production_follows_jassby_platt() -> None:
    # Jassby & Platt (1976, L&O 21:540): P = Pmax·tanh(I/Ik). Check value (computed):
    # Pmax = 10, I = Ik = 100 → 7.61594.
    r = _bio_rack(20.0, gpp_max_umol_m2_h=10.0, ik_umol_m2_s=100.0)
    r.set_outputs("C1", lamp_pct=10.0)  # 100 µmol m-2 s-1
    assert r.truth("C1").gpp_umol_m2_h == pytest.approx(7.61594, abs=5e-6)
    for drive in (0.0, 3.0, 40.0, 100.0):
        r.set_outputs("C1", lamp_pct=drive)
        par = 10.0 * drive
        assert r.truth("C1").gpp_umol_m2_h == pytest.approx(10.0 * math.tanh(par / 100.0))


@pytest.mark.parametrize(
    ("t1", "t2", "resp_ratio", "gpp_ratio"),
    # Boltzmann–Arrhenius check values (computed with k = 8.617333262e-5 eV/K):
    # 20 → 30 °C: 2.33678 (0.65 eV), 1.51871 (0.32 eV); 15 → 20 °C: 1.56280, 1.24583.
    [(20.0, 30.0, 2.33678, 1.51871), (15.0, 20.0, 1.56280, 1.24583)],
)
def test_rates_scale_by_boltzmann_arrhenius(
    t1: float, t2: float, resp_ratio: float, gpp_ratio: float
) -> None:
    cool, warm = _bio_rack(t1), _bio_rack(t2)
    for r in (cool, warm):
        r.set_outputs("C1", lamp_pct=60.0)
    a, b = cool.truth("C1"), warm.truth("C1")
    assert b.resp_umol_m2_h / a.resp_umol_m2_h == pytest.approx(resp_ratio, abs=5e-6)
    assert b.gpp_umol_m2_h / a.gpp_umol_m2_h == pytest.approx(gpp_ratio, abs=5e-6)
    # and against the formula itself, R(T) = R_ref·exp((E/k)(1/T_ref − 1/T))
    expected = 900.0 * math.exp(0.65 / K_BOLTZMANN_EV_K * (1 / 293.15 - 1 / (t2 + 273.15)))
    assert b.resp_umol_m2_h == pytest.approx(expected, rel=1e-12)


def test_closed_chamber_changes_by_net_flux_times_area_over_volume() -> None:
    # Closed-chamber flux definition F = b·V/A (b = dC/dt): a known net flux must give
    # dC/dt = F·A/V. Chamber 10 L over 0.05 m², held at t_ref.
    r = _bio_rack(20.0)
    r.set_outputs("C1", lamp_pct=40.0)
    truth = r.truth("C1")
    start = truth.o2_umol_l
    r.advance(3600.0)
    slope = r.truth("C1").o2_umol_l - start  # µmol L-1 per hour
    assert slope == pytest.approx(truth.net_umol_m2_h * 0.05 / 10.0, rel=1e-6)


def test_net_production_turns_negative_in_a_hot_chamber() -> None:
    # Respiration (0.65 eV) rises faster than photosynthesis (0.32 eV) with warming
    # (López-Urrutia et al. 2006, PNAS 103:8739), so under the same light the balance tips.
    slopes = {}
    for temp in (18.0, 31.0):
        r = _bio_rack(temp)
        r.set_outputs("C1", lamp_pct=15.0)  # 150 µmol m-2 s-1
        start = r.truth("C1").o2_umol_l
        r.advance(1800.0)
        slopes[temp] = r.truth("C1").o2_umol_l - start
        assert (r.truth("C1").net_umol_m2_h > 0) == (temp < 25.0)
    assert slopes[18.0] > 0 > slopes[31.0]


def test_thermal_stress_cuts_production_above_the_threshold() -> None:
    plain = _bio_rack(30.0)
    stressed = _bio_rack(
        30.0, stress_threshold_c=26.0, stress_gpp_loss_per_c=0.1, stress_resp_gain_per_c=0.05
    )
    for r in (plain, stressed):
        r.set_outputs("C1", lamp_pct=50.0)
    a, b = plain.truth("C1"), stressed.truth("C1")
    assert b.gpp_umol_m2_h == pytest.approx(a.gpp_umol_m2_h * (1 - 0.1 * 4.0))
    assert b.resp_umol_m2_h == pytest.approx(a.resp_umol_m2_h * (1 + 0.05 * 4.0))


@pytest.mark.parametrize(("salinity", "temp_c"), [(35.0, 10.0), (0.0, 20.0), (32.0, 26.0)])
def test_flushing_equilibrates_oxygen_to_gsw_solubility(salinity: float, temp_c: float) -> None:
    # Inflow is air-saturated: with biology off and the pump flushing, O2 must settle at the
    # Garcia & Gordon (1992) saturation. Reference: gsw.O2sol_SP_pt (µmol/kg, ITS-90
    # temperature input, 1 atm moist air) times TEOS-10 density (gsw.rho_t_exact, p = 0).
    r = rack(
        chamber(
            salinity=salinity,
            sim={
                "biology": {"gpp_max_umol_m2_h": 0.0, "resp_umol_m2_h": 0.0},
                "thermal": thermal(ua_w_k=1.0),
                "pump": {"flush_at_full_drive_l_h": 20.0},
                "initial_temperature_c": temp_c,
                "initial_o2_sat_pct": 40.0,
            },
        ),
        sim={"room_temperature_c": temp_c},
    )
    r.set_outputs("C1", pump_pct=100.0)
    r.advance(12 * 3600.0)
    sr = gsw.SR_from_SP(salinity)
    expected = gsw.O2sol_SP_pt(salinity, temp_c) * gsw.rho_t_exact(sr, temp_c, 0.0) / 1000.0
    truth = r.truth("C1")
    assert truth.o2_umol_l == pytest.approx(expected, rel=2e-4)
    assert truth.o2_sat_pct == pytest.approx(100.0, abs=1e-6)


def test_flushing_exchange_is_first_order_with_rate_q_over_v() -> None:
    # dC/dt = −(q/V + k_air)(C − C_sat) ⇒ C − C_sat decays as exp(−(q/V + k_air)·t).
    r = rack(
        chamber(
            sim={
                "biology": {"gpp_max_umol_m2_h": 0.0, "resp_umol_m2_h": 0.0},
                "thermal": thermal(ua_w_k=1.0),
                "pump": {"flush_at_full_drive_l_h": 5.0, "dead_band_pct": 0.0},
                "reaeration_per_h": 0.3,
                "initial_o2_sat_pct": 50.0,
            },
        )
    )
    sat = r.truth("C1").o2_saturation_umol_l
    r.set_outputs("C1", pump_pct=100.0)
    r.advance(3600.0)
    rate_per_h = 5.0 / 10.0 + 0.3
    expected = sat + (0.5 * sat - sat) * math.exp(-rate_per_h)
    assert r.truth("C1").o2_umol_l == pytest.approx(expected, rel=1e-9)


def test_oxygen_never_goes_below_zero_and_recovers_from_zero() -> None:
    r = _bio_rack(20.0, resp_umol_m2_h=20000.0, gpp_max_umol_m2_h=60000.0)
    r.advance(8 * 3600.0)  # dark, closed: respiration would take O2 far below zero
    assert r.truth("C1").o2_umol_l == 0.0
    r.set_outputs("C1", lamp_pct=100.0)
    truth = r.truth("C1")
    r.advance(600.0)
    assert r.truth("C1").o2_umol_l == pytest.approx(truth.net_umol_m2_h * 0.05 / 10.0 / 6.0)


def test_o2_sat_pct_uses_the_chamber_temperature() -> None:
    r = _bio_rack(25.0)
    truth = r.truth("C1")
    assert truth.o2_sat_pct == pytest.approx(100.0)
    assert truth.o2_saturation_umol_l == pytest.approx(
        gsw.O2sol_SP_pt(35.0, 25.0) * gsw.rho_t_exact(gsw.SR_from_SP(35.0), 25.0, 0) / 1000,
        rel=2e-4,
    )
    assert np.isfinite(truth.o2_umol_l)
