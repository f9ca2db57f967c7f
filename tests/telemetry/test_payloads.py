"""Payload schemas: records survive the trip through JSON, bad payloads are refused by field."""

from __future__ import annotations

import dataclasses
import json
import math
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from controller.storage import (
    AlarmRecord,
    EventKind,
    EventRecord,
    IncubationState,
    SampleRow,
    columns_of,
)
from controller.telemetry import (
    MAX_COMMAND_BYTES,
    CommandName,
    CommandResult,
    ControllerState,
    ControllerStatus,
    PayloadError,
    RemoteCommand,
    decode_model,
    decode_record,
    encode_model,
    encode_record,
)

from ._helpers import START, alarm, event, sample

measurement = st.one_of(st.none(), st.floats(allow_nan=False, allow_infinity=False, width=64))
ids = st.from_regex(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,10}", fullmatch=True)


@given(
    temperature=measurement,
    o2=measurement,
    phase=st.text(min_size=1, max_size=30),
    chamber=ids,
    incubation=st.sampled_from(IncubationState),
    code=st.one_of(st.none(), st.text(max_size=20)),
)
def test_a_sample_row_comes_back_equal(
    temperature: float | None,
    o2: float | None,
    phase: str,
    chamber: str,
    incubation: IncubationState,
    code: str | None,
) -> None:
    row = dataclasses.replace(
        sample(chamber, 3),
        temperature_c=temperature,
        o2_umol_l=o2,
        phase=phase,
        incubation=incubation,
        alarm=code,
    )
    assert decode_record(encode_record(row), SampleRow) == row


def test_a_sample_payload_has_every_run_log_column_plus_version_and_time() -> None:
    data = json.loads(encode_record(sample("A1", 0)))
    assert list(data) == ["v", *(c.name for c in columns_of(SampleRow)), "time"]
    assert data["v"] == 1
    assert data["time"] == "2027-07-01T06:00:00Z"
    assert data["incubation"] == "open"


def test_alarms_and_events_come_back_equal() -> None:
    for record in (
        alarm("B", 12.5),
        dataclasses.replace(alarm("B", 3.0), chamber=None, user="mira"),
        event(EventKind.PHASE_CHANGE, 7200.0, phase="heatwave"),
        EventRecord(t_s=1.0, utc_s=START.timestamp(), kind=EventKind.GAP, duration_s=60.0),
    ):
        assert decode_record(encode_record(record), type(record)) == record


def test_a_lost_measurement_travels_as_null() -> None:
    row = dataclasses.replace(sample("A1", 0), temperature_c=math.nan, par=math.inf)
    data = json.loads(encode_record(row))
    assert data["temperature_c"] is None and data["par"] is None


def test_a_non_finite_required_field_is_a_bug_not_a_payload() -> None:
    row = dataclasses.replace(sample("A1", 0), t_s=math.nan)
    with pytest.raises(ValueError, match="not JSON compliant"):
        encode_record(row)


def _sample_payload(**changes: Any) -> bytes:
    data = json.loads(encode_record(sample("A1", 0)))
    data.update(changes)
    return json.dumps({k: v for k, v in data.items() if v is not ...}).encode()


@pytest.mark.parametrize(
    ("payload", "field", "words"),
    [
        (b"\xff\xfe", None, "not UTF-8 JSON"),
        (b"[1, 2]", None, "must be a JSON object"),
        (_sample_payload(v=2), "v", "version 2 is not supported"),
        (_sample_payload(v=...), "v", "version None is not supported"),
        (_sample_payload(chamber=...), "chamber", "is missing"),
        (_sample_payload(t_s=None), "t_s", "must not be null"),
        (_sample_payload(temperature_c="20.1"), "temperature_c", "must be a number"),
        (_sample_payload(temperature_c=True), "temperature_c", "must be a number"),
        (_sample_payload(phase=3), "phase", "must be text"),
        (_sample_payload(incubation="ajar"), "incubation", "'ajar' is not one of open, closed"),
        (b" " * 70000, None, "over the 65536-byte limit"),
    ],
)
def test_a_bad_sample_payload_is_refused_naming_the_field(
    payload: bytes, field: str | None, words: str
) -> None:
    with pytest.raises(PayloadError) as caught:
        decode_record(payload, SampleRow)
    assert caught.value.field == field
    assert words in str(caught.value)


def test_keys_of_newer_versions_are_ignored_and_optional_fields_may_be_missing() -> None:
    newer = _sample_payload(salinity=30.1, alarm=...)
    assert decode_record(newer, SampleRow) == sample("A1", 0)
    bare = json.dumps(
        {"v": 1, "t_s": 1.0, "utc_s": 2.0, "kind": "hold"}
    ).encode()  # elapsed, chamber, phase, duration, detail have defaults
    assert decode_record(bare, EventRecord) == EventRecord(t_s=1.0, utc_s=2.0, kind=EventKind.HOLD)


def test_status_and_results_round_trip_and_a_newer_status_still_reads() -> None:
    status = ControllerStatus(
        controller="rack-a",
        state=ControllerState.HELD,
        run_id="run-7",
        phase="heatwave",
        elapsed_s=3600.0,
        chambers=("A1", "B"),
        dropped_samples=4,
    )
    assert decode_model(encode_model(status), ControllerStatus) == status
    result = CommandResult(id="r1", user="mira", command="hold", accepted=True)
    assert decode_model(encode_model(result), CommandResult) == result
    newer = json.loads(encode_model(status))
    newer["battery_pct"] = 80
    assert decode_model(json.dumps(newer), ControllerStatus) == status


def command(**changes: Any) -> bytes:
    data = {"v": 1, "id": "r1", "user": "mira", "command": "hold", **changes}
    return json.dumps({k: v for k, v in data.items() if v is not ...}).encode()


def test_a_valid_command_reads() -> None:
    got = decode_model(command(command="acknowledge", code="over_temperature"), RemoteCommand)
    assert got.command is CommandName.ACKNOWLEDGE and got.code == "over_temperature"


@pytest.mark.parametrize(
    ("payload", "field", "words"),
    [
        (command(command="reboot"), "command", "Input should be"),
        (command(user="mira; drop"), "user", "should match pattern"),
        (command(id=...), "id", "Field required"),
        (command(sudo=True), "sudo", "unknown key"),
        (command(command="note"), None, "a note needs its text"),
        (command(command="acknowledge"), None, "acknowledge needs the alarm code"),
        (command(chamber="A/1"), "chamber", "should match pattern"),
        (command(text="x" * MAX_COMMAND_BYTES), None, "over the 4096-byte limit"),
    ],
)
def test_a_bad_command_is_refused_with_its_reason(
    payload: bytes, field: str | None, words: str
) -> None:
    with pytest.raises(PayloadError) as caught:
        decode_model(payload, RemoteCommand, limit=MAX_COMMAND_BYTES)
    assert caught.value.field == field
    assert words in str(caught.value)


def test_alarm_records_keep_their_enums() -> None:
    back = decode_record(encode_record(alarm("B", 1.0)), AlarmRecord)
    assert back.action.value == "raise" and back.level.value == "trip"
