"""Invented run-log content shared by the storage tests and their child processes.

Values depend on the tick and the chamber so that a row landing in the wrong place, or a
column swapped with another, changes what the tests read back.
"""

from __future__ import annotations

from controller.storage import (
    ChamberRecord,
    ClockKind,
    IncubationState,
    RunMeta,
    SampleRow,
)

#: Invented start of the test runs (2026-05-28T20:26:40Z), POSIX s.
START_UTC_S = 1_780_000_000.0
PROTOCOL_TEXT = '# Saltmarrow Lagoon test protocol\n[[phases]]\nname = "baseline"\n'
RIG_TEXT = '# Saltmarrow Lagoon test rack\nname = "test rack"\n'


def make_meta(n_chambers: int = 3, run_id: str = "saltmarrow-test") -> RunMeta:
    """Metadata of an invented run with chambers A1, A2, …"""
    chambers = tuple(
        ChamberRecord(
            chamber=f"A{i + 1}",
            water_volume_l=12.5 + i,
            sediment_area_m2=0.04 * (i + 1),
            bath="bath-1" if i % 2 == 0 else None,
        )
        for i in range(n_chambers)
    )
    return RunMeta(
        run_id=run_id,
        protocol_text=PROTOCOL_TEXT,
        rig_text=RIG_TEXT,
        start_utc_s=START_UTC_S,
        clock_kind=ClockKind.VIRTUAL,
        chambers=chambers,
    )


def tick_rows(
    t_s: float,
    n_chambers: int = 3,
    *,
    utc_offset_s: float = 0.0,
    phase: str = "baseline",
    alarm_chamber: int | None = None,
    closed_chamber: int | None = None,
) -> list[SampleRow]:
    """One tick's rows for chambers A1…An at clock time ``t_s`` (s).

    Chamber index 2 (A3) has no PAR sensor reading (None), to exercise NULLs.
    """
    rows = []
    for i in range(n_chambers):
        rows.append(
            SampleRow(
                t_s=t_s,
                utc_s=START_UTC_S + utc_offset_s + t_s,
                elapsed_s=t_s,
                chamber=f"A{i + 1}",
                phase=phase,
                temperature_c=18.0 + 0.001 * t_s + i,
                temperature_setpoint_c=18.0 + i,
                par=None if i == 2 else 100.0 + t_s,
                par_setpoint=100.0,
                flow_cm_s=5.0 + 0.1 * i,
                flow_setpoint_cm_s=5.0,
                o2_umol_l=250.0 + i - 0.01 * t_s,
                o2_sat_pct=95.0 + i,
                heater_pct=10.0 * i,
                chiller_pct=1.0 + i,
                lamp_pct=40.0,
                pump_pct=0.0 if i == closed_chamber else 60.0,
                incubation=(
                    IncubationState.CLOSED if i == closed_chamber else IncubationState.OPEN
                ),
                alarm="over_temperature" if i == alarm_chamber else None,
            )
        )
    return rows
