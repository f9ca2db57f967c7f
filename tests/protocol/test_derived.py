"""Derived metrics (DLI, degree heating days, extremes) and rig checks."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

from controller.protocol import (
    Category,
    Protocol,
    Severity,
    check_against_rig,
    compile_protocol,
    daily_light_integral,
    degree_heating_days,
    peak_temperature,
    summarize,
)
from controller.rig import Rig
from controller.science.heatwave import CATEGORY_MULTIPLES
from controller.science.light import dli_from_constant, dli_of_half_sine

from ._build import START, compile_doc, document, two_groups

D = 86400.0


def test_dli_of_500_for_12_hours_is_21_6() -> None:
    data = document(
        [{"kind": "hold", "value": 18.0}],
        light=[
            {
                "kind": "repeat",
                "times": 3,
                "blocks": [
                    {"kind": "hold", "value": 500.0, "duration": "12h"},
                    {"kind": "hold", "value": 0.0, "duration": "12h"},
                ],
            }
        ],
        duration="3d",
    )
    dli = daily_light_integral(compile_doc(data))["C1"]
    # DLI = PPFD · h · 0.0036 (reference notes §6, arithmetic): 500 x 12 x 0.0036 = 21.6
    assert dli == pytest.approx([21.6, 21.6, 21.6], rel=1e-12)
    assert dli_from_constant(500.0, 12.0) == pytest.approx(21.6)


def test_half_sine_dli_by_peak_and_by_target() -> None:
    light = {"kind": "daylight", "sunrise": "06:00", "sunset": "18:00", "peak": 1000.0}
    by_peak = daily_light_integral(
        compile_doc(document([{"kind": "hold", "value": 18.0}], light=[light], duration="2d"))
    )["C1"]
    # (2/π)·1000·43200/10⁶ = 27.502 mol m-2 d-1 (reference notes §6); tessellation <= 0.2 % low
    assert dli_of_half_sine(1000.0, 12.0) == pytest.approx(27.502, abs=1e-3)
    assert by_peak == pytest.approx([27.502, 27.502], rel=2e-3)
    target = {"kind": "daylight", "sunrise": "05:00", "sunset": "20:30", "dli_mol_m2_d": 30.0}
    by_dli = daily_light_integral(
        compile_doc(document([{"kind": "hold", "value": 18.0}], light=[target], duration="2d"))
    )["C1"]
    assert by_dli == pytest.approx([30.0, 30.0], rel=1e-9)


def test_partial_last_day_is_left_out_and_unlit_chambers_have_none() -> None:
    data = document(
        [{"kind": "hold", "value": 18.0}],
        light=[{"kind": "hold", "value": 100.0}],
        duration="1d 12h",
    )
    assert daily_light_integral(compile_doc(data))["C1"].tolist() == pytest.approx([8.64])
    assert (
        daily_light_integral(compile_doc(document([{"kind": "hold", "value": 18.0}])))["C1"].size
        == 0
    )


def hw(**fields: Any) -> dict[str, Any]:
    event = {
        "kind": "heatwave",
        "groups": ["warmed"],
        "starts": "2d",
        "baseline_c": 18.0,
        "peak_anomaly_c": 2.0,
        "onset_rate_c_per_day": 1.0,
        "peak_duration": "3d",
        "decline_rate_c_per_day": 1.0,
    }
    event.update(fields)
    return event


def test_degree_heating_days_against_the_control() -> None:
    compiled = compile_doc(two_groups(events=[hw()]))
    dhd = degree_heating_days(compiled)
    # trapezoid: 0.5·2 d·2 °C + 3 d·2 °C + 0.5·2 d·2 °C = 10 °C·d above the control (18 °C)
    assert dhd["C1"] == pytest.approx(10.0)
    assert dhd["C2"] == pytest.approx(10.0)
    assert dhd["C3"] == 0.0


def test_degree_heating_days_without_control_use_the_event_baseline() -> None:
    data = two_groups(events=[hw()])
    data["groups"]["ambient"]["role"] = "treatment"
    data["phases"][0]["groups"] = {"warmed": {"temperature": [{"kind": "hold", "value": 19.0}]}}
    dhd = degree_heating_days(compile_doc(data))
    # above baseline_c = 18: 1 °C for 20 d plus the 10 °C·d of the event
    assert dhd["C1"] == pytest.approx(30.0)
    assert dhd["C3"] == 0.0  # no event: own program is its reference


def test_cold_spell_gives_no_heating() -> None:
    data = two_groups(events=[hw(kind="cold-spell")])
    assert degree_heating_days(compile_doc(data))["C1"] == 0.0


def test_summary_collects_the_numbers() -> None:
    compiled = compile_doc(two_groups(events=[hw()]))
    summary = summarize(compiled)["C1"]
    assert summary.group == "warmed"
    assert summary.peak_temperature_c == pytest.approx(20.0)
    assert peak_temperature(compiled)["C3"] == 18.0
    assert summary.min_temperature_c == 18.0
    assert summary.dli_min == summary.dli_max == pytest.approx(400 * 0.0864)
    assert len(summary.dli_mol_m2_d) == 20
    assert summary.degree_heating_days == pytest.approx(10.0)


def test_protocol_categories_are_the_science_categories() -> None:
    assert {c.value for c in Category} == set(CATEGORY_MULTIPLES)


def rig(**limits: Any) -> Rig:
    chambers = [
        {"id": c, "water_volume_l": 5.0, "sediment_area_m2": 0.05, "limits": limits}
        for c in ("C1", "C2", "C3", "C4")
    ]
    return Rig.model_validate({"name": "bench rack", "chambers": chambers})


def _fields(findings, severity):  # type: ignore[no-untyped-def]
    return {(f.chamber, f.field) for f in findings if f.severity is severity}


def test_rig_check_passes_a_gentle_protocol_and_lists_unused_chambers() -> None:
    findings = check_against_rig(compile_doc(two_groups(events=[hw()])), rig())
    assert [f.severity for f in findings] == [Severity.INFO]
    assert "C4" in findings[0].message


def test_rig_check_finds_fast_ramps_at_the_block() -> None:
    data = two_groups()
    data["phases"][0]["groups"] = {
        "warmed": {
            "temperature": [
                {"kind": "hold", "value": 18.0, "duration": "1d"},
                {"kind": "ramp", "to": 24.0, "rate_per_h": 3.0},
            ]
        }
    }
    findings = check_against_rig(compile_doc(data), rig(max_ramp_c_per_h=2.0))
    errors = [f for f in findings if f.severity is Severity.ERROR]
    assert {(f.chamber, f.field) for f in errors} == {
        ("C1", "phases.0.groups.warmed.temperature.1"),
        ("C2", "phases.0.groups.warmed.temperature.1"),
    }
    assert "3 °C/h" in errors[0].message


def test_rig_check_warns_about_steps_and_refuses_limits() -> None:
    data = two_groups()
    data["phases"][0]["programs"] = {
        "temperature": [
            {"kind": "hold", "value": 18.0, "duration": "1d"},
            {"kind": "step", "to": 33.0},
        ],
        "light": [{"kind": "hold", "value": 1800.0}],
        "flow": [{"kind": "hold", "value": 40.0}],
    }
    findings = check_against_rig(compile_doc(data), rig(max_temperature_c=30.0))
    warnings = _fields(findings, Severity.WARNING)
    assert ("C1", "phases.0.programs.temperature.1") in warnings
    messages = " ".join(f.message for f in findings if f.chamber == "C3")
    assert "33 °C is above the chamber's highest (30 °C)" in messages
    assert "PAR setpoint reaches 1800" in messages
    assert "flow setpoint reaches 40" in messages
    assert ("C3", "phases.0.programs.light.0") in _fields(findings, Severity.ERROR)


def test_rig_check_finds_missing_chambers_and_shared_baths() -> None:
    data = two_groups()
    data["groups"]["ambient"]["chambers"] = ["C3", "C9"]
    data["phases"][0]["groups"] = {"warmed": {"temperature": [{"kind": "hold", "value": 20.0}]}}
    chambers = [
        {"id": c, "water_volume_l": 5.0, "sediment_area_m2": 0.05, "bath": "tank"}
        for c in ("C1", "C2", "C3")
    ]
    findings = check_against_rig(
        compile_doc(data), Rig.model_validate({"name": "r", "chambers": chambers})
    )
    errors = _fields(findings, Severity.ERROR)
    assert ("C9", "groups.ambient.chambers.1") in errors
    assert ("C3", "groups.ambient.chambers.0") in errors  # differs from C1 in bath 'tank'
    bath = next(f for f in findings if "bath" in f.message)
    assert "share bath 'tank'" in bath.message


def test_compile_with_rig_attaches_findings() -> None:
    protocol = Protocol.model_validate(two_groups())
    compiled = compile_protocol(protocol, start_utc=START, rig=rig(max_par=100.0))
    assert any(f.severity is Severity.ERROR and "PAR" in f.message for f in compiled.findings)
    assert math.isfinite(compiled.duration_s)
    assert np.all(compile_doc(two_groups()).findings == ())
