"""Lamp calibration, warm-up and ageing; pump dead band, flow and flushing."""

from __future__ import annotations

import math

import pytest
from sim_rigs import chamber, rack


def test_linear_lamp_gives_par_in_proportion_to_drive() -> None:
    r = rack(chamber(sim={"lamp": {"par_at_full_drive": 800.0, "curve_shape": 0.0}}))
    r.set_outputs("C1", lamp_pct=25.0)
    assert r.truth("C1").par == pytest.approx(200.0)
    assert r.read_par("C1") == pytest.approx(200.0)


def test_saturating_lamp_curve() -> None:
    # The rig's documented curve: PAR = P_full·(1 − e^(−k·d/100))/(1 − e^(−k)).
    k, full = 2.0, 1000.0
    r = rack(chamber(sim={"lamp": {"par_at_full_drive": full, "curve_shape": k}}))
    for drive in (0.0, 10.0, 50.0, 100.0):
        r.set_outputs("C1", lamp_pct=drive)
        expected = full * (1 - math.exp(-k * drive / 100)) / (1 - math.exp(-k))
        assert r.truth("C1").par == pytest.approx(expected, rel=1e-12)


def test_par_at_full_defaults_to_the_chamber_limit() -> None:
    r = rack(chamber(limits={"max_par": 640.0}, sim={"lamp": {"curve_shape": 0.0}}))
    r.set_outputs("C1", lamp_pct=100.0)
    assert r.truth("C1").par == pytest.approx(640.0)


def test_lamp_warms_up_with_a_first_order_response() -> None:
    lamp = {
        "par_at_full_drive": 1000.0,
        "curve_shape": 0.0,
        "warmup_tau_s": 120.0,
        "cold_output_fraction": 0.6,
    }
    r = rack(chamber(sim={"lamp": lamp}))
    r.set_outputs("C1", lamp_pct=100.0)
    assert r.truth("C1").par == pytest.approx(600.0)
    r.advance(120.0)
    # one time constant: 1 − 1/e of the way from cold to warm output
    assert r.truth("C1").par == pytest.approx(600.0 + 400.0 * (1 - math.exp(-1.0)), rel=1e-9)
    r.advance(3600.0)
    assert r.truth("C1").par == pytest.approx(1000.0, rel=1e-9)


def test_lamp_loses_output_with_hours_lit() -> None:
    lamp = {
        "par_at_full_drive": 1000.0,
        "curve_shape": 0.0,
        "ageing_pct_per_1000_h": 5.0,
        "lamp_hours_h": 1000.0,
    }
    r = rack(chamber(sim={"lamp": lamp}))
    r.set_outputs("C1", lamp_pct=100.0)
    assert r.truth("C1").par == pytest.approx(950.0)
    r.advance(250.0 * 3600.0)
    truth = r.truth("C1")
    assert truth.lamp_hours_h == pytest.approx(1250.0)
    assert truth.par == pytest.approx(1000.0 * 0.95**1.25)


def test_pump_has_a_dead_band_then_linear_flow() -> None:
    pump = {"dead_band_pct": 10.0, "flow_at_full_drive_cm_s": 18.0}
    r = rack(chamber(sim={"pump": pump}))
    r.set_outputs("C1", pump_pct=9.0)
    assert r.truth("C1").flow_cm_s == 0.0
    assert not r.truth("C1").incubation_open
    r.set_outputs("C1", pump_pct=55.0)
    assert r.truth("C1").flow_cm_s == pytest.approx(18.0 * 45.0 / 90.0)
    assert r.read_flow("C1") == pytest.approx(9.0)
    assert r.truth("C1").incubation_open
