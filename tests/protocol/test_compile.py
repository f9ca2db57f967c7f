"""Compiler: golden breakpoint tables of small protocols, continuation, tessellation bounds."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from controller.errors import SquallError
from controller.protocol import (
    CYCLE_TOL,
    LIGHT_TOL_FRACTION,
    Protocol,
    compile_protocol,
    sample,
    setpoints_at,
)
from controller.science.light import half_sine_daylight

from ._build import START, compile_doc, document

H = 3600.0
D = 86400.0


def table(compiled, variable: str = "temperature_c", chamber: str = "C1"):  # type: ignore[no-untyped-def]
    channel = compiled.channels[chamber][variable]
    return channel.t_s.tolist(), channel.v.tolist()


def test_golden_hold_step_ramp() -> None:
    compiled = compile_doc(
        document(
            [
                {"kind": "hold", "value": 18.0, "duration": "6h"},
                {"kind": "step", "to": 20.0},
                {"kind": "ramp", "to": 22.0, "rate_per_h": 1.0},
                {"kind": "hold", "value": 22.0},
            ],
            duration="1d",
        )
    )
    assert table(compiled) == (
        [0.0, 6 * H, 6 * H, 8 * H, D],
        [18.0, 18.0, 20.0, 22.0, 22.0],
    )


def test_golden_ramp_by_rate_per_day_and_by_duration() -> None:
    compiled = compile_doc(
        document(
            [
                {"kind": "hold", "value": 10.0, "duration": "1d"},
                {"kind": "ramp", "to": 12.0, "rate_per_day": 4.0},
                {"kind": "ramp", "to": 11.0, "duration": "2h"},
            ],
            duration="2d",
        )
    )
    # the last ramp ends before the phase does: its final value holds to the end
    assert table(compiled) == (
        [0.0, D, D + 12 * H, D + 14 * H, 2 * D],
        [10.0, 10.0, 12.0, 11.0, 11.0],
    )


def test_golden_repeat_then_hold_of_last_value() -> None:
    compiled = compile_doc(
        document(
            [{"kind": "hold", "value": 1.0}],
            flow=[
                {"kind": "hold", "value": 4.0, "duration": "1h"},
                {
                    "kind": "repeat",
                    "times": 3,
                    "blocks": [
                        {"kind": "step", "to": 8.0, "duration": "30min"},
                        {"kind": "ramp", "to": 2.0, "duration": "30min"},
                    ],
                },
            ],
            duration="8h",
        )
    )
    t, v = table(compiled, "flow_cm_s")
    assert t == [0, H, H, 1.5 * H, 2 * H, 2 * H, 2.5 * H, 3 * H, 3 * H, 3.5 * H, 4 * H, 8 * H]
    assert v == [4.0, 4.0, 8.0, 8.0, 2.0, 8.0, 8.0, 2.0, 8.0, 8.0, 2.0, 2.0]


def test_golden_daily_cycle_breakpoints_sit_on_the_daily_maximum() -> None:
    compiled = compile_doc(
        document(
            [{"kind": "daily-cycle", "mean_c": 18.0, "amplitude_c": 2.0, "warmest_at": "12:00"}],
            duration="1d",
        )
    )
    t, v = table(compiled)
    # n = ceil(2π / sqrt(8·0.01/2)) = 32 chords per day, 2700 s apart, one on 12:00
    assert t == pytest.approx(np.arange(0.0, D + 1, 2700.0).tolist())
    expected = 18.0 + 2.0 * np.cos(2 * np.pi * (np.array(t) - 12 * H) / D)
    assert v == pytest.approx(expected.tolist(), abs=1e-12)
    assert max(v) == 20.0


def test_golden_half_sine_daylight() -> None:
    compiled = compile_doc(
        document(
            [{"kind": "hold", "value": 18.0}],
            light=[{"kind": "daylight", "sunrise": "06:00", "sunset": "18:00", "peak": 1000.0}],
            duration="1d",
        )
    )
    t, v = table(compiled, "par")
    # 22 chords from sunrise to sunset (n even, >= π/sqrt(8·0.003)), dark otherwise
    assert t == pytest.approx([0.0, *np.linspace(6 * H, 18 * H, 23).tolist(), D])
    assert v[0] == v[1] == v[-2] == v[-1] == 0.0
    assert max(v) == pytest.approx(1000.0, rel=1e-12)


@pytest.mark.parametrize("amplitude", [0.3, 2.0, 6.0])
@pytest.mark.parametrize("warmest", ["00:00", "15:00", "07:23"])
@pytest.mark.parametrize("offset", ["+00:00", "+05:30"])
def test_daily_cycle_tessellation_error_is_within_bound(
    amplitude: float, warmest: str, offset: str
) -> None:
    compiled = compile_doc(
        document(
            [
                {
                    "kind": "daily-cycle",
                    "mean_c": 15.0,
                    "amplitude_c": amplitude,
                    "warmest_at": warmest,
                }
            ],
            duration="2d",
            utc_offset=offset,
        ),
        start=START + timedelta(minutes=37),
    )
    t = np.linspace(0.0, 2 * D, 200_001)
    got = sample(compiled, t)["C1"]["temperature_c"]
    hours, minutes = (int(x) for x in warmest.split(":"))
    sign = 1 if offset[0] == "+" else -1
    local_minutes = 37 + sign * (int(offset[1:3]) * 60 + int(offset[4:6]))
    tod = (t + local_minutes * 60.0) % D
    truth = 15.0 + amplitude * np.cos(2 * np.pi * (tod - (hours * H + minutes * 60.0)) / D)
    assert np.max(np.abs(got - truth)) <= CYCLE_TOL


@pytest.mark.parametrize(("sunrise", "sunset"), [("06:00", "18:00"), ("04:10", "22:45")])
def test_half_sine_tessellation_error_is_within_bound(sunrise: str, sunset: str) -> None:
    compiled = compile_doc(
        document(
            [{"kind": "hold", "value": 18.0}],
            light=[{"kind": "daylight", "sunrise": sunrise, "sunset": sunset, "peak": 800.0}],
            duration="2d",
        )
    )
    t = np.linspace(0.0, 2 * D, 100_001)
    got = sample(compiled, t)["C1"]["par"]
    to_h = [int(x) / 60**i for i, x in enumerate(sunrise.split(":"))]
    rise = sum(to_h)
    to_h = [int(x) / 60**i for i, x in enumerate(sunset.split(":"))]
    sets = sum(to_h)
    # reference curve: the science package's half-sine day
    truth = half_sine_daylight((t / H) % 24.0, rise, sets, 800.0)
    assert np.max(np.abs(got - truth)) <= LIGHT_TOL_FRACTION * 800.0
    assert np.all(got >= 0.0)


def test_missing_variable_continues_the_running_shape_of_the_previous_phase() -> None:
    data = document(
        [{"kind": "hold", "value": 18.0}],
        light=[{"kind": "daylight", "sunrise": "06:00", "sunset": "18:00", "peak": 500.0}],
        duration="1d",
    )
    data["phases"].append(
        {
            "name": "second",
            "duration": "1d",
            "programs": {"temperature": [{"kind": "ramp", "to": 20.0, "duration": "12h"}]},
        }
    )
    compiled = compile_doc(data)
    noon_two = setpoints_at(compiled, D + 12 * H)["C1"]
    assert noon_two.par == pytest.approx(500.0)  # the daylight curve keeps running
    assert noon_two.temperature_c == pytest.approx(20.0)
    assert setpoints_at(compiled, D + 22 * H)["C1"].par == 0.0
    assert noon_two.phase == "second"


def test_group_override_replaces_only_its_variables() -> None:
    data = document(
        [{"kind": "hold", "value": 18.0}],
        flow=[{"kind": "hold", "value": 3.0}],
        duration="1d",
    )
    data["groups"]["b"] = {"role": "control", "chambers": ["C9"]}
    data["phases"][0]["groups"] = {"b": {"temperature": [{"kind": "hold", "value": 12.0}]}}
    compiled = compile_doc(data)
    points = setpoints_at(compiled, 100.0)
    assert (points["C1"].temperature_c, points["C9"].temperature_c) == (18.0, 12.0)
    assert points["C9"].flow_cm_s == 3.0


def test_uncontrolled_variable_is_none_and_nan() -> None:
    compiled = compile_doc(document([{"kind": "hold", "value": 18.0}], duration="1d"))
    assert setpoints_at(compiled, 10.0)["C1"].par is None
    assert np.all(np.isnan(sample(compiled, np.array([0.0, 5.0]))["C2"]["flow_cm_s"]))


def test_blocks_longer_than_their_phase_fail_at_the_block() -> None:
    data = document(
        [
            {"kind": "hold", "value": 18.0, "duration": "20h"},
            {"kind": "ramp", "to": 26.0, "rate_per_h": 1.0},
        ],
        duration="1d",
    )
    with pytest.raises(SquallError) as info:
        compile_doc(data)
    assert info.value.field == "phases.0.programs.temperature.1"
    assert "past the end of phase 'only'" in info.value.message


def test_start_defaults_to_begins_and_local_clock_follows_utc_offset() -> None:
    data = document(
        [{"kind": "daily-cycle", "mean_c": 18.0, "amplitude_c": 1.0, "warmest_at": "14:00"}],
        duration="1d",
        begins="2027-06-01T08:00:00+02:00",
        utc_offset="+02:00",
    )
    compiled = compile_protocol(Protocol.model_validate(data))
    assert compiled.start_utc == datetime(2027, 6, 1, 6, 0, tzinfo=UTC)
    # 14:00 local is 6 h after the 08:00 local start
    assert setpoints_at(compiled, 6 * H)["C1"].temperature_c == pytest.approx(19.0)


def test_on_launch_without_start_is_a_programming_error() -> None:
    protocol = Protocol.model_validate(document([{"kind": "hold", "value": 18.0}]))
    with pytest.raises(ValueError, match="start_utc"):
        compile_protocol(protocol)
    with pytest.raises(ValueError, match="zone-aware"):
        compile_protocol(protocol, start_utc=datetime(2027, 1, 1))


def test_spans_sampling_and_groups_are_reported() -> None:
    data = document([{"kind": "hold", "value": 18.0}], duration="1d")
    data["phases"].append(
        {
            "name": "later",
            "duration": "2d",
            "programs": {"temperature": [{"kind": "hold", "value": 19.0}]},
        }
    )
    data["sampling"] = [{"at": "later+12h", "what": "cores"}, {"at": "6h", "what": "water"}]
    compiled = compile_doc(data)
    assert [(p.name, p.t0_s, p.t1_s) for p in compiled.phases] == [
        ("only", 0.0, D),
        ("later", D, 3 * D),
    ]
    assert [(s.t_s, s.what, s.field) for s in compiled.sampling] == [
        (D + 12 * H, "cores", "sampling.0"),
        (6 * H, "water", "sampling.1"),
    ]
    assert dict(compiled.group_of) == {"C1": "a", "C2": "a"}
    assert compiled.duration_s == 3 * D
    assert compiled.channels["C1"]["temperature_c"] is compiled.channels["C2"]["temperature_c"]
