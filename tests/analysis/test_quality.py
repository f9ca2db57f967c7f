"""Run quality on a log with known, injected deviations, a data gap and alarms.

Two invented chambers at 10 s ticks through two one-hour phases. Injected: Q1 runs 1.0 °C
warm for 30 min of "pulse" and its flow is 2 cm s⁻¹ high for 10 min of "hold"; Q2 runs
0.2 °C cold throughout, shows 8 µmol m⁻² s⁻¹ of stray light in the dark "pulse", has a
closed window in "hold" (pump off, flow 0: not judged) and loses 5 min of ticks in "pulse".
Alarms: one rig-wide warning in "hold", an alarm and a trip on Q1 in "pulse".
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from controller.analysis import AnalysisSettings, QualityAccumulator, analyze_log, run_quality
from controller.storage import (
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    ChamberRecord,
    ClockKind,
    IncubationState,
    LightState,
    RunLogWriter,
    RunMeta,
    SampleRow,
    WindowEndReason,
    WindowRecord,
)

START_UTC_S = 1_786_000_000.0
TICK_S = 10.0


def _row(chamber: str, t: float) -> SampleRow | None:
    hold = t < 3600.0
    if chamber == "Q2" and 4800.0 <= t < 5100.0:
        return None  # the gap
    temp_sp = 20.0 if hold else 24.0
    temp = temp_sp
    if chamber == "Q1" and 4200.0 <= t < 6000.0:
        temp += 1.0
    if chamber == "Q2":
        temp -= 0.2
    par_sp = 300.0 if hold else 0.0
    par = 315.0 if hold else (8.0 if chamber == "Q2" else 0.0)
    closed = chamber == "Q2" and 1800.0 <= t < 2400.0
    flow = 0.0 if closed else 4.0
    if chamber == "Q1" and 600.0 <= t < 1200.0:
        flow = 6.0
    return SampleRow(
        t_s=t,
        utc_s=START_UTC_S + t,
        elapsed_s=t,
        chamber=chamber,
        phase="hold" if hold else "pulse",
        temperature_c=temp,
        temperature_setpoint_c=temp_sp,
        par=par,
        par_setpoint=par_sp,
        flow_cm_s=flow,
        flow_setpoint_cm_s=4.0,
        o2_umol_l=230.0 - (t - 1800.0) / 360.0 if closed else 230.0,
        o2_sat_pct=100.0,
        heater_pct=10.0,
        chiller_pct=0.0,
        lamp_pct=30.0 if hold else 0.0,
        pump_pct=0.0 if closed else 50.0,
        incubation=IncubationState.CLOSED if closed else IncubationState.OPEN,
    )


def _alarm(t: float, action: AlarmAction, level: AlarmLevel, chamber: str | None) -> AlarmRecord:
    return AlarmRecord(
        t_s=t,
        utc_s=START_UTC_S + t,
        action=action,
        level=level,
        code="over_temperature" if chamber else "room_sensor",
        reason="injected for the test",
        chamber=chamber,
    )


@pytest.fixture(scope="module")
def quality_log(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("quality") / "deviations.sqlite"
    meta = RunMeta(
        run_id="quality",
        protocol_text="# Saltmarrow Lagoon quality test (no groups)\n",
        rig_text='name = "Saltmarrow quality rack"\n',
        start_utc_s=START_UTC_S,
        clock_kind=ClockKind.VIRTUAL,
        chambers=tuple(
            ChamberRecord(chamber=c, water_volume_l=2.5, sediment_area_m2=0.1) for c in ("Q1", "Q2")
        ),
    )
    events = {
        1000.0: _alarm(1000.0, AlarmAction.RAISE, AlarmLevel.WARNING, None),
        4300.0: _alarm(4300.0, AlarmAction.RAISE, AlarmLevel.ALARM, "Q1"),
        4400.0: _alarm(4400.0, AlarmAction.ACK, AlarmLevel.ALARM, "Q1"),
        6000.0: _alarm(6000.0, AlarmAction.CLEAR, AlarmLevel.ALARM, "Q1"),
        6500.0: _alarm(6500.0, AlarmAction.RAISE, AlarmLevel.TRIP, "Q1"),
    }
    with RunLogWriter(path, meta=meta, commit_interval_s=600.0) as writer:
        for t in np.arange(0.0, 7200.0, TICK_S):
            rows = [r for r in (_row("Q1", t), _row("Q2", t)) if r is not None]
            writer.append_samples(rows)
            if t in events:
                writer.record_alarm(events[float(t)])
            if t == 2400.0:
                writer.record_window(
                    WindowRecord(
                        chamber="Q2",
                        light=LightState.DARK,
                        start_t_s=1800.0,
                        start_utc_s=START_UTC_S + 1800.0,
                        end_t_s=2400.0,
                        end_utc_s=START_UTC_S + 2400.0,
                        end_reason=WindowEndReason.MAX_DURATION,
                    )
                )
    return path


@pytest.fixture(scope="module")
def table(quality_log: Path) -> pd.DataFrame:
    return analyze_log(quality_log).quality.set_index(["chamber", "phase"])


def test_rows_are_chambers_by_phase_in_order(quality_log: Path) -> None:
    quality = analyze_log(quality_log).quality
    assert list(zip(quality["chamber"], quality["phase"], strict=True)) == [
        ("Q1", "hold"),
        ("Q2", "hold"),
        ("Q1", "pulse"),
        ("Q2", "pulse"),
    ]


def test_injected_temperature_excursion(table: pd.DataFrame) -> None:
    row = table.loc[("Q1", "pulse")]
    assert row["ticks"] == 360 and row["period_s"] == TICK_S
    assert row["temperature_max_abs_c"] == pytest.approx(1.0)
    assert row["temperature_outside_min"] == pytest.approx(30.0)
    assert row["temperature_outside_pct"] == pytest.approx(50.0)
    assert row["temperature_bias_c"] == pytest.approx(0.5)
    assert row["temperature_rms_c"] == pytest.approx(math.sqrt(0.5))
    assert row["temperature_sd_c"] == pytest.approx(math.sqrt((180 - 360 * 0.25) / 359))
    assert row["temperature_setpoint_mean_c"] == pytest.approx(24.0)
    assert row["temperature_mean_c"] == pytest.approx(24.5)
    assert table.loc[("Q1", "hold"), "temperature_rms_c"] == 0.0


def test_a_steady_offset_inside_the_band_is_bias_not_time_outside(table: pd.DataFrame) -> None:
    row = table.loc[("Q2", "hold")]
    assert row["temperature_bias_c"] == pytest.approx(-0.2)
    assert row["temperature_rms_c"] == pytest.approx(0.2)
    assert row["temperature_sd_c"] == pytest.approx(0.0, abs=1e-6)
    assert row["temperature_outside_min"] == 0.0
    narrow = run_quality(
        pd.DataFrame(
            {
                "run_s": [0.0, 10.0],
                "chamber": "X",
                "phase": "p",
                "temperature_c": [20.2, 20.2],
                "temperature_setpoint_c": 20.0,
                "par": 0.0,
                "par_setpoint": 0.0,
                "flow_cm_s": 4.0,
                "flow_setpoint_cm_s": 4.0,
                "incubation": "open",
            }
        ),
        AnalysisSettings(band_c=0.1),
    )
    assert narrow.iloc[0]["temperature_outside_pct"] == 100.0


def test_par_band_is_relative_with_a_floor_in_the_dark(table: pd.DataFrame) -> None:
    hold = table.loc[("Q1", "hold")]
    assert hold["par_bias"] == pytest.approx(15.0)  # 5 % high: inside the ±10 % band
    assert hold["par_outside_min"] == 0.0
    stray = table.loc[("Q2", "pulse")]
    assert stray["par_max_abs"] == pytest.approx(8.0)  # beyond the 5 µmol floor
    assert stray["par_outside_min"] == pytest.approx(330 * TICK_S / 60.0)
    assert table.loc[("Q1", "pulse"), "par_outside_min"] == 0.0


def test_flow_is_judged_only_while_the_incubation_is_open(table: pd.DataFrame) -> None:
    q1 = table.loc[("Q1", "hold")]
    assert q1["flow_outside_min"] == pytest.approx(10.0)
    assert q1["flow_max_abs_cm_s"] == pytest.approx(2.0)
    q2 = table.loc[("Q2", "hold")]
    assert q2["flow_rms_cm_s"] == 0.0  # the closed window's zero flow is not a deviation
    assert q2["flow_outside_pct"] == 0.0


def test_data_gap_alarms_trips_windows_and_photoperiod(table: pd.DataFrame) -> None:
    assert table.loc[("Q2", "pulse"), "gaps"] == 1
    assert table.loc[("Q2", "pulse"), "gap_min"] == pytest.approx(5.0)
    assert table.loc[("Q2", "pulse"), "ticks"] == 330
    assert table["gaps"].sum() == 1
    assert table.loc[("Q1", "hold"), "alarms"] == 1  # the rig-wide warning
    assert table.loc[("Q2", "hold"), "alarms"] == 1
    assert table.loc[("Q1", "pulse"), ["alarms", "trips"]].tolist() == [2, 1]
    assert table.loc[("Q2", "pulse"), ["alarms", "trips"]].tolist() == [0, 0]
    assert table.loc[("Q2", "hold"), ["windows", "dark_windows"]].tolist() == [1, 1]
    assert table["windows"].sum() == 1
    assert table.loc[("Q1", "hold"), "photoperiod_h"] == pytest.approx(24.0)
    assert table.loc[("Q1", "pulse"), "photoperiod_h"] == 0.0


def test_a_gap_split_across_chunks_is_found_once() -> None:
    frame = pd.DataFrame(
        {
            "run_s": [0.0, 10.0, 20.0, 80.0, 90.0],
            "chamber": "X",
            "phase": "p",
            "temperature_c": 20.0,
            "temperature_setpoint_c": 20.0,
            "par": 0.0,
            "par_setpoint": 0.0,
            "flow_cm_s": 4.0,
            "flow_setpoint_cm_s": 4.0,
            "incubation": "open",
        }
    )
    acc = QualityAccumulator(AnalysisSettings())
    acc.update(frame.iloc[:3])
    acc.update(frame.iloc[3:])
    row = acc.table().iloc[0]
    assert (row["gaps"], row["gap_min"], row["ticks"]) == (1, pytest.approx(50 / 60), 5)
