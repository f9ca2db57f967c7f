"""Thermal model: lumped heat balance against its analytic solution and energy bookkeeping."""

from __future__ import annotations

import math

import gsw
import numpy as np
import pytest
from sim_rigs import chamber, rack, thermal

# Lumped-model check, 100 L seawater (S = 35) at 20 °C: C = 409.51 kJ/K from TEOS-10 density
# 1024.766 kg/m³ and cp 3996.13 J/(kg K) (gsw 3.6, rho_t_exact / cp_t_exact); UA = 50 W/K and
# 200 W give ΔT∞ = 4 K, τ = C/UA = 8190 s and ΔT(τ) = 4(1 − 1/e) = 2.528 K.
C_100L_SEAWATER_J_K = 409.51e3
UA_W_K = 50.0
HEATER_W = 200.0


def _analytic_rack(dead_time_s: float = 0.0):  # type: ignore[no-untyped-def]
    return rack(
        chamber(
            water_volume_l=100.0,
            salinity=35.0,
            sim={
                "thermal": thermal(
                    ua_w_k=UA_W_K,
                    heater_max_w=HEATER_W,
                    chiller_max_w=0.0,
                    dead_time_s=dead_time_s,
                ),
                "initial_temperature_c": 20.0,
            },
        ),
        sim={"room_temperature_c": 20.0},
    )


def test_heat_capacity_matches_teos10_lumped_check() -> None:
    # REFERENCES-style check from gsw 3.6 (TEOS-10): 100 L seawater at 20 °C → 409.51 kJ/K.
    r = _analytic_rack()
    assert r.truth("C1").heat_capacity_j_k == pytest.approx(C_100L_SEAWATER_J_K, rel=2e-5)


def test_heating_follows_analytic_first_order_solution() -> None:
    # Analytic solution of m·cp·dT/dt = P − UA(T − T_room): T(t) = T∞ + (T0 − T∞)e^(−t/τ),
    # T∞ = T_room + P/UA, τ = C/UA (lumped-capacitance model, any heat-transfer textbook).
    r = _analytic_rack()
    r.set_outputs("C1", heater_pct=100.0)
    tau = C_100L_SEAWATER_J_K / UA_W_K
    t_inf = 20.0 + HEATER_W / UA_W_K
    elapsed = 0.0
    # uneven advance calls: the result must not depend on how the caller slices time
    for dt in (0.5, 1.0, 7.3, 60.0, 611.2, 3600.0, 3910.0, 20000.0):
        r.advance(dt)
        elapsed += dt
        expected = t_inf + (20.0 - t_inf) * math.exp(-elapsed / tau)
        assert r.truth("C1").temperature_c == pytest.approx(expected, abs=2e-5)


def test_rise_after_one_time_constant_is_2_528_k() -> None:
    # Lumped-model check value: ΔT(τ = 8190 s) = 2.528 K for 200 W, UA 50 W/K, 100 L seawater.
    r = _analytic_rack()
    r.set_outputs("C1", heater_pct=100.0)
    r.advance(8190.0)
    assert r.truth("C1").temperature_c - 20.0 == pytest.approx(2.528, abs=6e-4)


def test_dead_time_delays_the_heater_then_the_same_curve_follows() -> None:
    r = _analytic_rack(dead_time_s=45.0)
    r.set_outputs("C1", heater_pct=100.0)
    r.advance(44.0)
    assert r.truth("C1").heater_w == 0.0
    assert r.truth("C1").temperature_c == 20.0
    assert r.outputs("C1").heater_pct == 100.0  # the actuator itself is on at once
    r.advance(1.0 + 8190.0)
    assert r.truth("C1").heater_w == HEATER_W
    assert r.truth("C1").temperature_c - 20.0 == pytest.approx(2.528, abs=6e-4)


def test_probe_follows_a_ramp_with_lag_tau() -> None:
    # A first-order sensor driven by a ramp of slope r settles to a constant lag r·τ
    # (first-order system ramp response; control textbooks, from memory).
    r = rack(
        chamber(
            water_volume_l=1000.0,
            salinity=0.0,
            sim={
                "thermal": thermal(ua_w_k=1e-3, heater_max_w=4000.0),
                "sensors": {"temperature_tau_s": 60.0},
            },
        )
    )
    r.set_outputs("C1", heater_pct=100.0)
    r.advance(1200.0)  # 20 time constants of the probe
    truth = r.truth("C1")
    slope = 4000.0 / truth.heat_capacity_j_k
    assert truth.temperature_c - r.read_temperature("C1") == pytest.approx(slope * 60.0, rel=1e-3)


def test_energy_is_conserved_over_a_run_with_every_heat_path() -> None:
    # First law for the node: C·ΔT = heat in − heat out (heater − chiller − room − flushing).
    r = rack(
        chamber(
            salinity=30.0,
            sim={
                "thermal": thermal(
                    ua_w_k=7.0, heater_max_w=250.0, chiller_max_w=180.0, dead_time_s=30.0
                ),
                "pump": {"flush_at_full_drive_l_h": 24.0},
            },
        ),
        sim={"room_temperature_c": 22.0, "inflow_temperature_c": 16.0},
    )
    start = r.truth("C1")
    samples = [start.temperature_c]
    drives = [(80.0, 0.0, 50.0), (0.0, 60.0, 100.0), (35.0, 0.0, 0.0), (0.0, 100.0, 20.0)]
    for k in range(4 * 90):
        heater, chiller, pump = drives[(k // 90) % 4]
        r.set_outputs("C1", heater_pct=heater, chiller_pct=chiller, pump_pct=pump)
        r.advance(60.0)
        samples.append(r.truth("C1").temperature_c)
    end = r.truth("C1")
    stored = end.heat_capacity_j_k * (end.temperature_c - start.temperature_c)
    balance = end.heater_energy_j - end.chiller_energy_j - end.room_loss_j - end.flush_loss_j
    assert stored == pytest.approx(balance, rel=1e-9, abs=1e-6 * end.heater_energy_j)
    # The room loss, re-integrated from the sampled trajectory (trapezoid rule, 60 s steps),
    # agrees with the rack's exact integral.
    loss = 7.0 * np.trapezoid(np.array(samples) - 22.0, dx=60.0)
    assert end.room_loss_j == pytest.approx(loss, rel=2e-3)
    assert end.heater_energy_j > 0 and end.chiller_energy_j > 0 and end.flush_loss_j != 0


def test_flushing_pulls_temperature_toward_the_inflow() -> None:
    # Steady state of C·dT/dt = −UA(T − T_room) − q·ρ·cp·(T − T_in):
    # T∞ = (UA·T_room + G·T_in)/(UA + G), with ρ·cp of the water from TEOS-10 (gsw).
    r = rack(
        chamber(
            salinity=35.0,
            sim={
                "thermal": thermal(ua_w_k=5.0),
                "pump": {"flush_at_full_drive_l_h": 36.0, "dead_band_pct": 0.0},
                "initial_temperature_c": 20.0,
            },
        ),
        sim={"room_temperature_c": 20.0, "inflow_temperature_c": 12.0},
    )
    r.set_outputs("C1", pump_pct=100.0)
    r.advance(30 * 3600.0)
    sr = gsw.SR_from_SP(35.0)
    g = 36.0 / 3600.0 * gsw.rho_t_exact(sr, 20.0, 0.0) * gsw.cp_t_exact(sr, 20.0, 0.0) / 1000.0
    expected = (5.0 * 20.0 + g * 12.0) / (5.0 + g)
    assert r.truth("C1").temperature_c == pytest.approx(expected, abs=1e-3)


def test_chiller_cools_below_room() -> None:
    # Steady state of the lumped model with heat removal P_c: T∞ = T_room − P_c/UA.
    r = rack(chamber(sim={"thermal": thermal(ua_w_k=5.0, chiller_max_w=100.0)}))
    r.set_outputs("C1", chiller_pct=50.0)
    r.advance(48 * 3600.0)
    assert r.truth("C1").temperature_c == pytest.approx(20.0 - 50.0 / 5.0, abs=1e-3)


def test_shared_bath_is_one_thermal_node_driven_by_its_first_chamber() -> None:
    bath = {
        "id": "tank",
        "water_volume_l": 80.0,
        "salinity": 35.0,
        "thermal": thermal(ua_w_k=20.0, heater_max_w=400.0),
    }
    r = rack(
        chamber("C1", bath="tank", salinity=35.0),
        chamber("C2", bath="tank", salinity=35.0),
        chamber("C3", salinity=35.0),
        baths=[bath],
    )
    sr = gsw.SR_from_SP(35.0)
    rho_cp = gsw.rho_t_exact(sr, 20.0, 0.0) * gsw.cp_t_exact(sr, 20.0, 0.0) / 1000.0
    assert r.truth("C2").heat_capacity_j_k == pytest.approx((80.0 + 2 * 10.0) * rho_cp)
    r.set_outputs("C2", heater_pct=100.0)  # not the bath's driving chamber: no effect
    r.advance(600.0)
    assert r.truth("C1").temperature_c == 20.0
    r.set_outputs("C1", heater_pct=100.0)
    r.advance(3600.0)
    c1, c2, c3 = (r.truth(c) for c in ("C1", "C2", "C3"))
    assert c1.temperature_c == c2.temperature_c > 20.0
    assert r.outputs("C2").heater_pct == 100.0  # the bath's heater, seen from C2
    assert c3.temperature_c == pytest.approx(20.0, abs=1e-9)
    tau = c1.heat_capacity_j_k / 20.0
    assert c1.temperature_c == pytest.approx(20.0 + 20.0 * (1 - math.exp(-3600.0 / tau)), abs=1e-9)


def test_advancing_in_one_call_or_many_gives_the_same_state() -> None:
    def run(slices: int) -> tuple[float, float]:
        r = rack(chamber(sim={"thermal": thermal(ua_w_k=4.0, dead_time_s=20.0)}))
        r.set_outputs("C1", heater_pct=70.0, lamp_pct=80.0)
        for _ in range(slices):
            r.advance(7200.0 / slices)
        truth = r.truth("C1")
        return truth.temperature_c, truth.o2_umol_l

    one, many = run(1), run(240)
    assert one[0] == pytest.approx(many[0], abs=1e-9)
    assert one[1] == pytest.approx(many[1], abs=1e-6)


def test_bad_drive_and_time_are_refused() -> None:
    r = rack()
    with pytest.raises(ValueError, match="0–100"):
        r.set_outputs("C1", heater_pct=120.0)
    with pytest.raises(ValueError, match="dt_s"):
        r.advance(-1.0)
    with pytest.raises(KeyError, match="C9"):
        r.set_outputs("C9", lamp_pct=1.0)
