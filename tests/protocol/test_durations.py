"""Durations (ISO 8601 and short form), clock times and UTC offsets."""

from __future__ import annotations

from datetime import time, timedelta

import pytest

from controller.protocol import (
    format_duration,
    parse_clock_time,
    parse_duration,
    parse_utc_offset,
)

H = 3600.0
D = 86400.0


@pytest.mark.parametrize(
    ("text", "seconds"),
    [
        ("P3DT6H", 3 * D + 6 * H),
        ("PT90M", 90 * 60.0),
        ("P2W", 14 * D),
        ("PT1.5H", 1.5 * H),
        ("PT0,5H", 0.5 * H),
        ("P1DT1H1M1S", D + H + 61.0),
        ("PT45S", 45.0),
        ("P0D", 0.0),
        ("3d 6h", 3 * D + 6 * H),
        ("3d6h", 3 * D + 6 * H),
        ("90min", 90 * 60.0),
        ("45s", 45.0),
        ("1.5h", 1.5 * H),
        ("2w", 14 * D),
        ("0d", 0.0),
        ("1d 30min 15s", D + 1800.0 + 15.0),
        ("  6H ", 6 * H),
        (".5h", 0.5 * H),
    ],
)
def test_durations_parse_to_seconds(text: str, seconds: float) -> None:
    assert parse_duration(text) == pytest.approx(seconds, abs=1e-9)


@pytest.mark.parametrize(
    ("text", "hint"),
    [
        ("P1M", "months"),
        ("P1Y", "years or months"),
        ("3m", "ambiguous"),
        ("2 months", "no fixed length"),
        ("90", "no unit"),
        ("3 parsecs", "unknown unit"),
        ("3d 4d", "twice"),
        ("-2h", "negative"),
        ("P", "ISO 8601"),
        ("PT", "ISO 8601"),
        ("P1DT", "ISO 8601"),
        ("", "empty"),
        ("soon", "not a duration"),
        ("3d and 2h", "not a duration"),
    ],
)
def test_bad_durations_say_what_is_wrong(text: str, hint: str) -> None:
    with pytest.raises(ValueError, match=hint):
        parse_duration(text)


@pytest.mark.parametrize("seconds", [0.0, 45.0, 5400.0, 86400.0, 3 * D + 6 * H + 61.5])
def test_format_duration_reads_back(seconds: float) -> None:
    assert parse_duration(format_duration(seconds)) == pytest.approx(seconds, abs=1e-3)


def test_format_duration_short_form() -> None:
    assert format_duration(3 * D + 6 * H) == "3d 6h"
    assert format_duration(5400.0) == "1h 30min"


@pytest.mark.parametrize(
    ("text", "expected"),
    [("06:00", time(6, 0)), ("21:30", time(21, 30)), ("0:05", time(0, 5))],
)
def test_clock_times(text: str, expected: time) -> None:
    assert parse_clock_time(text) == expected


@pytest.mark.parametrize("text", ["24:00", "12:60", "noon", "6", "06:00:00"])
def test_bad_clock_times(text: str) -> None:
    with pytest.raises(ValueError, match="clock time"):
        parse_clock_time(text)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("+02:00", timedelta(hours=2)),
        ("-03:30", timedelta(hours=-3, minutes=-30)),
        ("+00:00", timedelta(0)),
        ("Z", timedelta(0)),
        ("+14:00", timedelta(hours=14)),
    ],
)
def test_utc_offsets(text: str, expected: timedelta) -> None:
    assert parse_utc_offset(text) == expected


@pytest.mark.parametrize("text", ["2", "+2:00", "+15:00", "-13:00", "UTC+2"])
def test_bad_utc_offsets(text: str) -> None:
    with pytest.raises(ValueError, match="UTC offset"):
        parse_utc_offset(text)
