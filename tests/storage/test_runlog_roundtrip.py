"""Every record kind written by RunLogWriter comes back unchanged from RunLogReader."""

from __future__ import annotations

import hashlib
import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from runlog_helpers import PROTOCOL_TEXT, RIG_TEXT, START_UTC_S, make_meta, tick_rows

from controller import __version__
from controller.storage import (
    SCHEMA_VERSION,
    TABLES,
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    AuditRecord,
    EventKind,
    EventRecord,
    LightState,
    RunEnd,
    RunEndReason,
    RunLogReader,
    RunLogWriter,
    SampleRow,
    WindowEndReason,
    WindowRecord,
    columns_of,
    frame_columns,
    frame_dtypes,
)


@pytest.fixture
def log_path(tmp_path: Path) -> Path:
    return tmp_path / "run.sqlite"


def test_meta_and_chambers_round_trip(log_path: Path) -> None:
    meta = make_meta(4)
    RunLogWriter(log_path, meta=meta).close()
    with RunLogReader(log_path) as reader:
        back = reader.meta()
        info = reader.info()
        chambers = reader.chambers()
    assert back == meta
    assert back.protocol_text == PROTOCOL_TEXT and back.rig_text == RIG_TEXT
    assert back.protocol_sha256 == hashlib.sha256(PROTOCOL_TEXT.encode()).hexdigest()
    assert back.software_version == __version__
    assert back.start_time == pd.Timestamp(START_UTC_S, unit="s", tz="UTC")
    assert [c.chamber for c in chambers] == ["A1", "A2", "A3", "A4"]
    assert chambers[1].bath is None and chambers[0].bath == "bath-1"
    assert info.schema_version == SCHEMA_VERSION
    assert info.sessions == 1 and info.samples == 0
    assert not info.finished


def test_samples_round_trip_with_dtypes_and_nulls(log_path: Path) -> None:
    written = []
    with RunLogWriter(log_path, meta=make_meta(3)) as writer:
        for k in range(6):
            rows = tick_rows(0.5 * k, alarm_chamber=1 if k == 3 else None, closed_chamber=0)
            writer.append_samples(rows)
            written += rows
    with RunLogReader(log_path) as reader:
        frame = reader.samples()
    assert list(frame.columns) == frame_columns(SampleRow)
    assert frame.index.name == "seq" and list(frame.index) == list(range(1, 19))
    for name, dtype in frame_dtypes(SampleRow).items():
        if isinstance(dtype, pd.CategoricalDtype) and dtype.categories is None:
            assert isinstance(frame[name].dtype, pd.CategoricalDtype), name
        else:
            assert frame[name].dtype == dtype, name
    assert frame["time"].dt.tz is not None and str(frame["time"].dt.tz) == "UTC"
    expected_time = pd.to_datetime([r.utc_s for r in written], unit="s", utc=True)
    assert (frame["time"].to_numpy() == expected_time.to_numpy()).all()
    for name in ("t_s", "elapsed_s", "temperature_c", "o2_umol_l", "heater_pct", "pump_pct"):
        np.testing.assert_array_equal(frame[name].to_numpy(), [getattr(r, name) for r in written])
    # A3 has no PAR reading: NULL in the file, NaN in the frame
    par = frame["par"].to_numpy()
    assert np.isnan(par[frame["chamber"] == "A3"]).all()
    assert not np.isnan(par[frame["chamber"] != "A3"]).any()
    assert frame["chamber"].astype(str).tolist() == [r.chamber for r in written]
    assert set(frame.loc[frame["chamber"] == "A1", "incubation"]) == {"closed"}
    assert set(frame.loc[frame["chamber"] != "A1", "incubation"]) == {"open"}
    alarms = frame["alarm"]
    assert alarms.isna().sum() == 17
    assert alarms.dropna().tolist() == ["over_temperature"]


def test_sample_filters_by_chamber_columns_and_time(log_path: Path) -> None:
    with RunLogWriter(log_path, meta=make_meta(3)) as writer:
        for k in range(10):
            writer.append_samples(tick_rows(float(k)))
    with RunLogReader(log_path) as reader:
        one = reader.samples(chamber="A2", columns=["t_s", "temperature_c"], t_from=2, t_to=5)
        two = reader.samples(chamber=["A1", "A3"], columns=["time"])
    assert list(one.columns) == ["t_s", "temperature_c"]
    assert one["t_s"].tolist() == [2.0, 3.0, 4.0]  # t_to is exclusive
    np.testing.assert_allclose(one["temperature_c"], [19.002, 19.003, 19.004])
    assert len(two) == 20 and list(two.columns) == ["time"]


def test_unknown_sample_column_is_a_user_error(log_path: Path) -> None:
    from controller.errors import SquallError

    RunLogWriter(log_path, meta=make_meta()).close()
    with RunLogReader(log_path) as reader, pytest.raises(SquallError, match="did you mean"):
        reader.samples(columns=["temperature"])


def test_alarms_events_windows_audit_round_trip(log_path: Path) -> None:
    alarm = AlarmRecord(
        t_s=5.0,
        utc_s=START_UTC_S + 5,
        action=AlarmAction.RAISE,
        level=AlarmLevel.TRIP,
        code="over_temperature",
        reason="A2 at 31.2 °C above its 30.0 °C limit",
        chamber="A2",
    )
    ack = AlarmRecord(
        t_s=9.0,
        utc_s=START_UTC_S + 9,
        action=AlarmAction.ACK,
        level=AlarmLevel.TRIP,
        code="over_temperature",
        reason="acknowledged",
        chamber="A2",
        user="operator1",
    )
    event = EventRecord(
        t_s=1.0,
        utc_s=START_UTC_S + 1,
        kind=EventKind.PHASE_CHANGE,
        elapsed_s=1.0,
        phase="heatwave",
        detail="ramp starts",
    )
    window = WindowRecord(
        chamber="A1",
        light=LightState.DARK,
        start_t_s=2.0,
        start_utc_s=START_UTC_S + 2,
        end_t_s=8.5,
        end_utc_s=START_UTC_S + 8.5,
        end_reason=WindowEndReason.O2_LOW,
        detail="O2 79.5 % sat",
    )
    note = AuditRecord(
        t_s=7.0,
        utc_s=START_UTC_S + 7,
        user="operator1",
        command="note",
        text="sampled A1-A4 for nutrients",
    )
    with RunLogWriter(log_path, meta=make_meta()) as writer:
        writer.record_event(event)
        writer.record_alarm(alarm)
        writer.record_audit(note)
        writer.record_window(window)
        writer.record_alarm(ack)
    with RunLogReader(log_path) as reader:
        alarms, events = reader.alarms(), reader.events()
        windows, audit = reader.windows(), reader.audit()
    assert alarms["action"].tolist() == ["raise", "ack"]
    assert alarms["level"].tolist() == ["trip", "trip"]
    assert alarms["reason"].iloc[0] == alarm.reason
    assert alarms["user"].isna().tolist() == [True, False]
    assert alarms["time"].iloc[1] == pd.Timestamp(START_UTC_S + 9, unit="s", tz="UTC")
    assert events[["kind", "phase", "detail"]].iloc[0].tolist() == [
        "phase_change",
        "heatwave",
        "ramp starts",
    ]
    assert events["chamber"].isna().all() and events["duration_s"].isna().all()
    assert windows.columns.tolist() == frame_columns(WindowRecord)
    row = windows.iloc[0]
    assert row["light"] == "dark" and row["end_reason"] == "o2_low"
    assert row["end_time"] - row["start_time"] == pd.Timedelta(seconds=6.5)
    assert row["end_t_s"] == 8.5
    assert audit[["user", "command", "text", "result"]].iloc[0].tolist() == [
        "operator1",
        "note",
        "sampled A1-A4 for nutrients",
        "ok",
    ]


def test_finish_marks_the_run_and_records_how(log_path: Path) -> None:
    writer = RunLogWriter(log_path, meta=make_meta())
    writer.append_samples(tick_rows(0.0))
    writer.finish(RunEnd(end_t_s=0.5, end_utc_s=START_UTC_S + 0.5, end_reason=RunEndReason.ABORTED))
    assert writer.closed
    with RunLogReader(log_path) as reader:
        info = reader.info()
    assert info.finished and info.end is not None
    assert info.end.end_reason is RunEndReason.ABORTED and info.end.end_t_s == 0.5
    assert info.samples == 3


def test_file_schema_matches_the_record_classes(log_path: Path) -> None:
    RunLogWriter(log_path, meta=make_meta()).close()
    conn = sqlite3.connect(log_path)
    try:
        for table, record in TABLES.items():
            info = conn.execute(f"PRAGMA table_info({table})").fetchall()
            names = [row[1] for row in info]
            assert names == ["seq", *(c.name for c in columns_of(record))], table
            not_null = {row[1] for row in info if row[3]}
            required = {c.name for c in columns_of(record) if not c.nullable}
            assert not_null == required, table
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    finally:
        conn.close()


def test_sample_column_names_carry_units() -> None:
    # DESIGN.md (contract): units live in names where a number leaves the program; PAR is
    # µmol photons m⁻² s⁻¹ throughout and keeps its bare contract names.
    unit_suffixes = ("_c", "_pct", "_umol_l", "_cm_s", "_s")
    for column in columns_of(SampleRow):
        if column.kind.value in ("float", "utc") and column.name not in ("par", "par_setpoint"):
            assert column.name.endswith(unit_suffixes), column.name
