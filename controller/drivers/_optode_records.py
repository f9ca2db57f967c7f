"""Optode line protocol, records: typed requests and replies and the grammar of their fields.

Rule: every field has one exact textual form (a regular expression), a parser, a formatter and
a range check, kept together in :data:`REPLY_FIELDS`; both the encoder and the decoder
(:mod:`._codec_optode`) read that table, and the records check themselves against it when
built, so an out-of-range record cannot exist and cannot be sent.
"""

from __future__ import annotations

import datetime as dt
import enum
import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeAlias

from controller.errors import SquallError

__all__ = [
    "REPLY_FIELDS",
    "TAG_REQUEST",
    "CalibrationRecord",
    "DeviceInfo",
    "ErrorReply",
    "FieldSpec",
    "Measurement",
    "OptodeCommand",
    "OptodeErrorCode",
    "OptodeLineError",
    "OptodeReply",
    "OptodeRequest",
    "OptodeStatus",
]


class OptodeErrorCode(enum.IntEnum):
    """Why the optode refused a request (the ``code`` of an ``ERR`` reply)."""

    UNKNOWN_COMMAND = 1
    BAD_CHECKSUM = 2
    BAD_ARGUMENT = 3
    LINE_TOO_LONG = 4
    MEASUREMENT_FAILED = 5


class OptodeLineError(SquallError):
    """A line that does not decode; ``code`` is what an optode answers to such a request.

    Parameters
    ----------
    message
        What is wrong.
    code
        The matching ERR code (no unit).
    tag
        The request tag when it could still be read, else 0 (no unit).
    field
        Dotted path of the offending field.
    file
        The line's source (a serial port path), if known.
    """

    def __init__(
        self,
        message: str,
        *,
        code: OptodeErrorCode,
        tag: int = 0,
        field: str | None = None,
        file: str | None = None,
    ) -> None:
        super().__init__(message, field=field, file=file)
        self.code = code
        self.tag = tag


class OptodeCommand(enum.Enum):
    """Request keywords (controller -> optode)."""

    SAMPLE = "SAMPLE"
    """Measure now; answered by ``DATA``."""
    IDENT = "IDENT"
    """Who are you; answered by ``INFO``."""
    CALGET = "CALGET"
    """Read the stored calibration; answered by ``CAL``."""


class OptodeStatus(enum.IntFlag):
    """Status bits of a ``DATA`` reply; bits 0x10..0x80 are reserved and must be 0."""

    OK = 0x00
    """No condition to report."""
    LOW_SIGNAL = 0x01
    """Luminescence amplitude low: foil worn, fouled or out of the water."""
    TEMPERATURE_RANGE = 0x02
    """Temperature outside the calibrated range; value clamped to the range."""
    O2_RANGE = 0x04
    """Oxygen outside the measuring range; values clamped to the range."""
    CALIBRATION_DUE = 0x08
    """The stored calibration is older than the device's recalibration interval."""


_STATUS_ALL = int(sum(OptodeStatus))


# --------------------------------------------------------------------------- field grammar


@dataclass(frozen=True)
class FieldSpec:
    """One ``key=value`` field: its exact text form, parser, formatter and range."""

    key: str
    pattern: re.Pattern[str]
    parse: Callable[[str], Any]
    format: Callable[[Any], str]
    check: Callable[[Any], str | None]


def _decimal(key: str, decimals: int, low: float, high: float, unit: str) -> FieldSpec:
    def check(value: Any) -> str | None:
        if isinstance(value, bool) or not isinstance(value, int | float):
            return f"{value!r} is not a number"
        if not math.isfinite(value) or not low <= value <= high:
            return f"{value!r} {unit} outside {low:g}..{high:g} {unit}"
        return None

    return FieldSpec(
        key,
        re.compile(rf"-?(0|[1-9]\d{{0,3}})\.\d{{{decimals}}}"),
        float,
        lambda v: f"{v:.{decimals}f}",
        check,
    )


def _integer(key: str, low: int, high: int) -> FieldSpec:
    def check(value: Any) -> str | None:
        if isinstance(value, bool) or not isinstance(value, int):
            return f"{value!r} is not an integer"
        return None if low <= value <= high else f"{value} outside {low}..{high}"

    return FieldSpec(key, re.compile(r"0|[1-9]\d{0,4}"), int, str, check)


def _status_field() -> FieldSpec:
    def check(value: Any) -> str | None:
        if not isinstance(value, OptodeStatus):
            return f"{value!r} is not an OptodeStatus"
        return None if int(value) & ~_STATUS_ALL == 0 else f"reserved bits in 0x{int(value):02X}"

    def parse(text: str) -> OptodeStatus:
        value = int(text, 16)
        if value & ~_STATUS_ALL:
            raise ValueError(f"reserved status bits set in {text}")
        return OptodeStatus(value)

    return FieldSpec("status", re.compile(r"[0-9A-F]{2}"), parse, lambda v: f"{int(v):02X}", check)


def _token(key: str) -> FieldSpec:
    pattern = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,23}")

    def check(value: Any) -> str | None:
        if not isinstance(value, str) or not pattern.fullmatch(value):
            return f"{value!r} is not 1..24 of letters, digits, '.', '_', '-'"
        return None

    return FieldSpec(key, pattern, str, str, check)


def _date_field(key: str) -> FieldSpec:
    def check(value: Any) -> str | None:
        ok = isinstance(value, dt.date) and not isinstance(value, dt.datetime)
        return None if ok else f"{value!r} is not a date"

    return FieldSpec(
        key, re.compile(r"\d{4}-\d{2}-\d{2}"), dt.date.fromisoformat, dt.date.isoformat, check
    )


TAG_REQUEST = _integer("tag", 1, 65535)
_TAG_REPLY = _integer("tag", 0, 65535)

REPLY_FIELDS: dict[str, tuple[FieldSpec, ...]] = {
    "DATA": (
        _TAG_REPLY,
        _decimal("o2_umol_l", 2, -100.0, 3000.0, "µmol/L"),
        _decimal("o2_sat_pct", 2, -10.0, 500.0, "%"),
        _decimal("temperature_c", 3, -10.0, 60.0, "°C"),
        _decimal("phase_deg", 3, 0.0, 90.0, "deg"),
        _status_field(),
    ),
    "INFO": (_TAG_REPLY, _token("serial"), _token("firmware"), _integer("protocol", 1, 99)),
    "CAL": (
        _TAG_REPLY,
        _decimal("phase0_deg", 3, 0.0, 90.0, "deg"),
        _decimal("phase100_deg", 3, 0.0, 90.0, "deg"),
        _decimal("temperature_c", 3, -10.0, 60.0, "°C"),
        _decimal("pressure_hpa", 1, 500.0, 1100.0, "hPa"),
        _date_field("date"),
    ),
    "ERR": (_TAG_REPLY, _integer("code", 1, 99)),
}


def _validate(record: object, keyword: str, prefix: str) -> None:
    """Check every field of a record against its spec; raise SquallError naming the field."""
    for spec in REPLY_FIELDS[keyword]:
        problem = spec.check(getattr(record, spec.key))
        if problem is not None:
            raise SquallError(problem, field=f"{prefix}.{spec.key}")


# --------------------------------------------------------------------------- records


@dataclass(frozen=True, kw_only=True)
class OptodeRequest:
    """A request from the controller; ``tag`` (1..65535) is echoed by the reply."""

    command: OptodeCommand
    tag: int

    def __post_init__(self) -> None:
        if not isinstance(self.command, OptodeCommand):
            raise SquallError(f"{self.command!r} is not an OptodeCommand", field="request.command")
        problem = TAG_REQUEST.check(self.tag)
        if problem is not None:
            raise SquallError(problem, field="request.tag")


@dataclass(frozen=True, kw_only=True)
class Measurement:
    """``DATA`` reply: one oxygen measurement.

    Resolution on the wire: 0.01 µmol/L, 0.01 %, 0.001 °C, 0.001 deg.
    """

    tag: int
    o2_umol_l: float
    """Dissolved oxygen, µmol/L, -100..3000."""
    o2_sat_pct: float
    """Air saturation, %, -10..500."""
    temperature_c: float
    """Optode temperature, °C, -10..60."""
    phase_deg: float
    """Luminescence phase angle, deg, 0..90."""
    status: OptodeStatus = OptodeStatus.OK

    def __post_init__(self) -> None:
        _validate(self, "DATA", "reply")


@dataclass(frozen=True, kw_only=True)
class DeviceInfo:
    """``INFO`` reply: identity of the optode."""

    tag: int
    serial: str
    firmware: str
    protocol: int = 1
    """Line-protocol version the device speaks, 1..99."""

    def __post_init__(self) -> None:
        _validate(self, "INFO", "reply")


@dataclass(frozen=True, kw_only=True)
class CalibrationRecord:
    """``CAL`` reply: the stored two-point calibration (zero and 100 % air saturation)."""

    tag: int
    phase0_deg: float
    """Phase angle in oxygen-free water, deg."""
    phase100_deg: float
    """Phase angle in air-saturated water, deg; below ``phase0_deg`` (oxygen quenches)."""
    temperature_c: float
    """Temperature during calibration, °C."""
    pressure_hpa: float
    """Air pressure during calibration, hPa."""
    date: dt.date
    """Calendar date of the calibration."""

    def __post_init__(self) -> None:
        _validate(self, "CAL", "reply")
        if not self.phase100_deg < self.phase0_deg:
            raise SquallError(
                f"phase100_deg {self.phase100_deg} must be below phase0_deg {self.phase0_deg}",
                field="reply.phase100_deg",
            )


@dataclass(frozen=True, kw_only=True)
class ErrorReply:
    """``ERR`` reply: the request was refused; ``tag`` 0 means it could not be read."""

    tag: int
    code: OptodeErrorCode

    def __post_init__(self) -> None:
        if not isinstance(self.code, OptodeErrorCode):
            raise SquallError(f"{self.code!r} is not an OptodeErrorCode", field="reply.code")
        _validate(self, "ERR", "reply")


OptodeReply: TypeAlias = Measurement | DeviceInfo | CalibrationRecord | ErrorReply
