"""Sensor models: optode response, phase, offsets, drift, noise and seeded reproducibility."""

from __future__ import annotations

import math
import statistics

import pytest
from sim_rigs import chamber, rack, thermal

from controller.science.optode import (
    OptodeCalibration,
    SignalKind,
    concentration_from_phase,
)


def _optode_rack(**optode: float):  # type: ignore[no-untyped-def]
    """A closed chamber whose O2 climbs steadily in the light at constant temperature."""
    return rack(
        chamber(
            sim={
                "thermal": thermal(ua_w_k=1.0),
                "lamp": {"par_at_full_drive": 1000.0, "curve_shape": 0.0},
                "sensors": {"optode": {"t90_s": 40.0, "noise_umol_l": 0.0, **optode}},
            }
        )
    )


def test_optode_step_response_reaches_90_percent_at_t90() -> None:
    # First-order sensor: 90 % of a step after t90 (τ = t90/ln 10). The step is made by a
    # flush so fast that O2 jumps to saturation within the first 0.1 s sub-step.
    r = rack(
        chamber(
            sim={
                "biology": {"gpp_max_umol_m2_h": 0.0, "resp_umol_m2_h": 0.0},
                "thermal": thermal(ua_w_k=1.0),
                "pump": {"flush_at_full_drive_l_h": 100000.0, "dead_band_pct": 0.0},
                "initial_o2_sat_pct": 50.0,
                "sensors": {"optode": {"t90_s": 30.0, "noise_umol_l": 0.0}},
            }
        ),
        sim={"physics_step_s": 0.1},
    )
    start = r.read_optode("C1").o2_umol_l
    r.set_outputs("C1", pump_pct=100.0)
    r.advance(29.0)
    target = r.truth("C1").o2_umol_l
    assert target == pytest.approx(2 * start, rel=1e-9)
    assert (r.read_optode("C1").o2_umol_l - start) / (target - start) < 0.9
    r.advance(2.0)
    assert (r.read_optode("C1").o2_umol_l - start) / (target - start) > 0.9


def test_optode_lags_a_ramp_by_t90_over_ln10() -> None:
    # Ramp response of a first-order sensor: steady lag = slope·τ, τ = t90/ln 10.
    r = _optode_rack()
    r.set_outputs("C1", lamp_pct=60.0)
    net = r.truth("C1").net_umol_m2_h
    r.advance(600.0)
    slope_per_s = net * 0.05 / 10.0 / 3600.0
    lag = r.truth("C1").o2_umol_l - r.read_optode("C1").o2_umol_l
    assert lag == pytest.approx(slope_per_s * 40.0 / math.log(10.0), rel=1e-4)


def test_optode_phase_is_stern_volmer_consistent() -> None:
    # Check (computed, Stern–Volmer with phase detection): φ0 = 60°, φ100 = 30° at
    # C100 = 282.015 µmol/L ⇒ KSV = (tan 60°/tan 30° − 1)/C100; then 150.057 µmol/L ↔ 40°.
    ksv = (math.tan(math.radians(60)) / math.tan(math.radians(30)) - 1) / 282.015
    probe = _optode_rack(phase0_deg=60.0, ksv_l_umol=ksv, t90_s=0.0)
    pct = 100.0 * 150.057 / probe.truth("C1").o2_saturation_umol_l
    r = rack(
        chamber(
            sim={
                "thermal": thermal(ua_w_k=1.0),
                "initial_o2_sat_pct": pct,
                "sensors": {
                    "optode": {
                        "t90_s": 0.0,
                        "noise_umol_l": 0.0,
                        "phase0_deg": 60.0,
                        "ksv_l_umol": ksv,
                    }
                },
            }
        )
    )
    reading = r.read_optode("C1")
    assert reading.o2_umol_l == pytest.approx(150.057, abs=1e-9)
    assert reading.phase_deg == pytest.approx(40.0, abs=2e-4)
    # and the science package's inverse recovers the oxygen from the phase
    cal = OptodeCalibration(
        kind=SignalKind.PHASE_DEG,
        zero_reading=60.0,
        ksv_l_per_umol=ksv,
        temp_c=reading.temperature_c,
    )
    back = concentration_from_phase(cal, reading.phase_deg, reading.temperature_c)
    assert back == pytest.approx(reading.o2_umol_l, rel=1e-9)
    assert reading.o2_sat_pct == pytest.approx(pct, rel=1e-9)


def test_optode_offset_and_drift_add_to_the_reading() -> None:
    r = _optode_rack(t90_s=0.0, offset_umol_l=2.0, drift_umol_l_per_day=-1.5)
    r.advance(2 * 86400.0)
    reading = r.read_optode("C1").o2_umol_l
    assert reading - r.truth("C1").o2_umol_l == pytest.approx(2.0 - 3.0, abs=1e-9)


def test_temperature_probe_offset_and_noise() -> None:
    r = rack(chamber(sim={"sensors": {"temperature_noise_c": 0.05, "temperature_offset_c": 0.3}}))
    readings = [r.read_temperature("C1") for _ in range(4000)]
    assert statistics.fmean(readings) == pytest.approx(20.3, abs=0.005)
    assert statistics.stdev(readings) == pytest.approx(0.05, rel=0.06)


def test_same_seed_same_readings_other_seed_other_readings() -> None:
    def readings(seed: int) -> list[float]:
        r = rack(
            chamber(
                sim={"sensors": {"temperature_noise_c": 0.02, "optode": {"noise_umol_l": 0.4}}}
            ),
            seed=seed,
        )
        out: list[float] = []
        for _ in range(20):
            r.set_outputs("C1", heater_pct=30.0, lamp_pct=50.0)
            r.advance(60.0)
            out += [r.read_temperature("C1"), r.read_optode("C1").o2_umol_l]
        return out

    assert readings(5) == readings(5)
    assert readings(5) != readings(6)


def test_rig_seed_is_used_when_none_is_given() -> None:
    noisy = chamber(sim={"sensors": {"temperature_noise_c": 0.1}})
    a = rack(noisy, sim={"seed": 11})
    b = rack(noisy, seed=11)
    assert [a.read_temperature("C1") for _ in range(5)] == [
        b.read_temperature("C1") for _ in range(5)
    ]
