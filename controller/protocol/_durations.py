"""Durations, clock times and UTC offsets as written in protocol files.

Rules
-----
- A duration is either ISO 8601 (``P3DT6H``, ``PT90M``, ``P2W``, ``PT1.5H``) or the short
  form: numbers with a unit, separated by optional spaces (``3d 6h``, ``90min``, ``45s``,
  ``1.5h``, ``2w``). Units of the short form: ``w`` (week), ``d`` (day), ``h`` (hour),
  ``min`` (minute), ``s`` (second); each at most once.
- Years and months are refused in both forms: they have no fixed length, so an experiment
  written with them would not say how long it runs. A bare ``m`` is refused as ambiguous
  (minute or month); write ``min``.
- Negative durations are refused; whether zero is allowed is up to the field
  (:data:`Duration` must be > 0, :data:`Offset` may be 0).
- A clock time is ``HH:MM`` on the 24 h local clock; a UTC offset is ``+HH:MM``/``-HH:MM``
  (or ``Z``) between -12:00 and +14:00.

pydantic's own timedelta parser is not used because it silently reads ``P1M`` as 30 days and
accepts forms (``1 day``, ``01:30:00``) the file format does not promise.
"""

from __future__ import annotations

import math
import re
from datetime import time, timedelta
from typing import Annotated, Any

from pydantic import AfterValidator, BeforeValidator, PlainSerializer, WithJsonSchema

__all__ = [
    "ClockTime",
    "Duration",
    "Offset",
    "UtcOffset",
    "format_duration",
    "parse_clock_time",
    "parse_duration",
    "parse_utc_offset",
]

_NUMBER = r"(\d+(?:[.,]\d+)?)"
_ISO = re.compile(
    rf"^P(?:{_NUMBER}W)?(?:{_NUMBER}D)?(?:T(?:{_NUMBER}H)?(?:{_NUMBER}M)?(?:{_NUMBER}S)?)?$"
)
_ISO_UNIT_SECONDS = (7 * 86400.0, 86400.0, 3600.0, 60.0, 1.0)
_SHORT_TOKEN = re.compile(r"\s*(\d+(?:\.\d+)?|\.\d+)\s*([a-z]+)\s*")
_SHORT_UNITS: dict[str, float] = {
    "w": 7 * 86400.0,
    "d": 86400.0,
    "h": 3600.0,
    "min": 60.0,
    "s": 1.0,
}
_EXAMPLES = "for example '3d 6h', '90min', '45s', '1.5h', '2w' or ISO 8601 'P3DT6H', 'PT90M'"


def _iso_seconds(text: str) -> float:
    if re.search(r"^P[^T]*\d(?:[.,]\d+)?[YM]", text):
        raise ValueError(
            f"duration {text!r} uses years or months, which have no fixed length; "
            "write days or weeks instead (P30D, P4W)"
        )
    match = _ISO.match(text)
    if match is None or text in ("P", "PT") or text.endswith("T"):
        raise ValueError(f"{text!r} is not a valid ISO 8601 duration; {_EXAMPLES}")
    seconds = 0.0
    for number, unit_s in zip(match.groups(), _ISO_UNIT_SECONDS, strict=True):
        if number is not None:
            seconds += float(number.replace(",", ".")) * unit_s
    return seconds


def _short_seconds(text: str) -> float:
    lowered = text.lower()
    position = 0
    seen: set[str] = set()
    seconds = 0.0
    while position < len(lowered):
        match = _SHORT_TOKEN.match(lowered, position)
        if match is None or match.end() == position:
            break
        number, unit = match.groups()
        if unit == "m":
            raise ValueError(
                f"duration {text!r}: 'm' is ambiguous (minute or month); write 'min' for minutes"
            )
        if unit in ("y", "yr", "mo", "month", "months", "year", "years"):
            raise ValueError(
                f"duration {text!r} uses years or months, which have no fixed length; "
                "write days or weeks instead"
            )
        if unit not in _SHORT_UNITS:
            raise ValueError(
                f"duration {text!r}: unknown unit {unit!r}; use w, d, h, min or s ({_EXAMPLES})"
            )
        if unit in seen:
            raise ValueError(f"duration {text!r} gives the unit {unit!r} twice")
        seen.add(unit)
        seconds += float(number) * _SHORT_UNITS[unit]
        position = match.end()
    if position != len(lowered) or not seen:
        if re.fullmatch(r"\s*\d+(?:\.\d+)?\s*", text):
            raise ValueError(f"duration {text!r} has no unit; {_EXAMPLES}")
        raise ValueError(f"{text!r} is not a duration; {_EXAMPLES}")
    return seconds


def parse_duration(text: str) -> float:
    """Parse a protocol duration into seconds.

    Parameters
    ----------
    text
        ISO 8601 duration (``P3DT6H``) or short form (``3d 6h``, ``90min``), see module rules.

    Returns
    -------
    float
        The duration, s (>= 0).

    Raises
    ------
    ValueError
        With a message meant for the person who wrote the file.
    """
    if not isinstance(text, str):
        raise ValueError(f"a duration must be written as text in quotes, {_EXAMPLES}")
    stripped = text.strip()
    if not stripped:
        raise ValueError(f"the duration is empty; {_EXAMPLES}")
    if stripped.startswith("-"):
        raise ValueError(f"duration {text!r} is negative; durations count forward in time")
    seconds = _iso_seconds(stripped) if stripped.startswith("P") else _short_seconds(stripped)
    if not math.isfinite(seconds):
        raise ValueError(f"duration {text!r} is too large")
    return seconds


def format_duration(seconds: float) -> str:
    """Write seconds back in the short form (``3d 6h``, ``90min`` style; ``1d 30min``).

    Parameters
    ----------
    seconds
        Duration, s (>= 0).

    Returns
    -------
    str
        Short-form duration that :func:`parse_duration` reads back to the same seconds
        (to 1 ms).
    """
    if seconds < 0 or not math.isfinite(seconds):
        raise ValueError(f"cannot format a duration of {seconds!r} s")
    remaining = round(seconds * 1000.0) / 1000.0
    if remaining == 0:
        return "0s"
    parts: list[str] = []
    for unit, unit_s in (("d", 86400.0), ("h", 3600.0), ("min", 60.0)):
        count = math.floor(remaining / unit_s + 1e-9)
        if count:
            parts.append(f"{count}{unit}")
            remaining = round((remaining - count * unit_s) * 1000.0) / 1000.0
    if remaining:
        parts.append(f"{remaining:g}s")
    return " ".join(parts)


def parse_clock_time(text: str) -> time:
    """Parse a local clock time ``HH:MM`` (24 h).

    Parameters
    ----------
    text
        Clock time such as ``"06:00"`` or ``"21:30"``.

    Returns
    -------
    datetime.time
        The time of day (local clock of the experiment).
    """
    if isinstance(text, time):
        return text
    match = re.fullmatch(r"\s*(\d{1,2}):(\d{2})\s*", str(text))
    if match is None:
        raise ValueError(
            f"{text!r} is not a clock time; write HH:MM on the 24 h clock, e.g. '06:30'"
        )
    hour, minute = int(match.group(1)), int(match.group(2))
    if hour > 23 or minute > 59:
        raise ValueError(f"{text!r} is not a clock time; hours run 00-23 and minutes 00-59")
    return time(hour, minute)


def parse_utc_offset(text: str) -> timedelta:
    """Parse a UTC offset ``+HH:MM``, ``-HH:MM`` or ``Z``.

    Parameters
    ----------
    text
        Offset of the experiment's local clock from UTC, e.g. ``"+02:00"``.

    Returns
    -------
    datetime.timedelta
        Local time minus UTC, between -12 h and +14 h.
    """
    if isinstance(text, timedelta):
        offset = text
    else:
        stripped = str(text).strip()
        if stripped == "Z":
            return timedelta(0)
        match = re.fullmatch(r"([+-])(\d{2}):(\d{2})", stripped)
        if match is None:
            raise ValueError(f"{text!r} is not a UTC offset; write +HH:MM or -HH:MM, e.g. '+02:00'")
        sign = 1 if match.group(1) == "+" else -1
        hours, minutes = int(match.group(2)), int(match.group(3))
        if minutes > 59:
            raise ValueError(f"UTC offset {text!r}: minutes run 00-59")
        offset = sign * timedelta(hours=hours, minutes=minutes)
    if not timedelta(hours=-12) <= offset <= timedelta(hours=14):
        raise ValueError(f"UTC offset {text!r} is outside -12:00..+14:00")
    return offset


def _as_seconds(value: Any) -> float:
    if isinstance(value, timedelta):
        return value.total_seconds()
    if isinstance(value, bool) or isinstance(value, int | float):
        raise ValueError(f"a duration needs a unit; write it as text, {_EXAMPLES}")
    return parse_duration(value)


def _positive(seconds: float) -> float:
    if seconds <= 0:
        raise ValueError("this duration must be longer than zero")
    return seconds


def _format_offset(offset: timedelta) -> str:
    minutes = round(offset.total_seconds() / 60)
    sign = "+" if minutes >= 0 else "-"
    return f"{sign}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d}"


_DURATION_SCHEMA = {
    "type": "string",
    "description": f"Duration: short form or ISO 8601, {_EXAMPLES}.",
    "examples": ["3d 6h", "90min", "P3DT6H"],
}

Duration = Annotated[
    float,
    BeforeValidator(_as_seconds),
    AfterValidator(_positive),
    PlainSerializer(format_duration, return_type=str),
    WithJsonSchema(_DURATION_SCHEMA),
]
"""A duration > 0, held in seconds; written as ``3d 6h`` or ``P3DT6H``."""

Offset = Annotated[
    float,
    BeforeValidator(_as_seconds),
    PlainSerializer(format_duration, return_type=str),
    WithJsonSchema(_DURATION_SCHEMA),
]
"""A duration >= 0 (an offset, may be ``0d``), held in seconds."""

ClockTime = Annotated[
    time,
    BeforeValidator(parse_clock_time),
    PlainSerializer(lambda t: t.strftime("%H:%M"), return_type=str),
    WithJsonSchema(
        {
            "type": "string",
            "pattern": r"^\d{1,2}:\d{2}$",
            "description": "Local clock time HH:MM (24 h).",
        }
    ),
]
"""A local clock time, written ``HH:MM``."""

UtcOffset = Annotated[
    timedelta,
    BeforeValidator(parse_utc_offset),
    PlainSerializer(_format_offset, return_type=str),
    WithJsonSchema(
        {
            "type": "string",
            "pattern": r"^([+-]\d{2}:\d{2}|Z)$",
            "description": "Offset of local time from UTC, +HH:MM or -HH:MM.",
        }
    ),
]
"""Offset of the experiment's local clock from UTC, written ``+02:00``."""
