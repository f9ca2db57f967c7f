"""Telemetry payloads: JSON objects, versioned, with schemas taken from the run-log records.

Rules of this module
--------------------
- Every payload is one UTF-8 JSON object carrying ``"v": 1`` (:data:`PAYLOAD_VERSION`).
  Fields are only ever added under the same version, never renamed or retyped; readers
  ignore keys they do not know. A payload of another version is refused with a reason.
- Sample, alarm and event payloads have exactly the fields of the run log's
  :class:`~controller.storage.SampleRow`, :class:`~controller.storage.AlarmRecord` and
  :class:`~controller.storage.EventRecord`, derived from those dataclasses by
  :func:`controller.storage.columns_of` (the run log's own source of truth), plus ``"v"`` and
  ``"time"`` (the ``utc_s`` field as ISO 8601 UTC, for people reading raw traffic). Enums
  travel as their text values; a missing or non-finite measurement is ``null``.
- Status, remote commands and command results are pydantic models defined here. Incoming
  commands are validated strictly (unknown keys refused); status payloads from newer
  controllers may carry keys this version does not know.
- Anything wrong with a payload becomes a :class:`PayloadError` (a
  :class:`~controller.errors.SquallError` naming the field), never another exception.
"""

from __future__ import annotations

import dataclasses
import json
import math
from collections.abc import Sequence
from datetime import UTC, datetime
from enum import StrEnum
from typing import Annotated, Any, Literal, TypeVar

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    ValidationError,
    model_validator,
)

from controller.errors import SquallError
from controller.storage import (
    AlarmRecord,
    EventRecord,
    SampleRow,
    ValueKind,
    columns_of,
)
from controller.telemetry._topics import ID_PATTERN

__all__ = [
    "MAX_COMMAND_BYTES",
    "MAX_PAYLOAD_BYTES",
    "PAYLOAD_VERSION",
    "CommandName",
    "CommandResult",
    "ControllerState",
    "ControllerStatus",
    "PayloadError",
    "RemoteCommand",
    "TaskInfo",
    "TaskList",
    "decode_model",
    "decode_record",
    "encode_model",
    "encode_record",
    "task_list",
]

#: Version of every payload schema, dimensionless.
PAYLOAD_VERSION = 1
#: Largest payload a reader accepts, bytes.
MAX_PAYLOAD_BYTES = 65536
#: Largest remote command a controller accepts, bytes.
MAX_COMMAND_BYTES = 4096

Record = SampleRow | AlarmRecord | EventRecord
R = TypeVar("R", SampleRow, AlarmRecord, EventRecord)
M = TypeVar("M", bound=BaseModel)

_USER_PATTERN = r"^[A-Za-z0-9_][A-Za-z0-9_.@-]{0,63}$"


class PayloadError(SquallError):
    """A telemetry payload that cannot be read (bad JSON, version, field or size)."""


class ControllerState(StrEnum):
    """What a controller is doing, as its retained status tells."""

    IDLE = "idle"
    """Connected, no run started yet."""
    RUNNING = "running"
    HELD = "held"
    """Protocol clock frozen by an operator, setpoints kept."""
    FINISHED = "finished"
    """The run ended (completed or stopped cleanly)."""
    ABORTED = "aborted"
    OFFLINE = "offline"
    """Gone without a known run end (the last will after a lost connection, or a stop
    before the run ended)."""


class CommandName(StrEnum):
    """Remote commands a controller may accept (only when remote commands are enabled)."""

    HOLD = "hold"
    """Freeze the protocol clock, keeping setpoints."""
    RESUME = "resume"
    """Run the protocol clock again after a hold."""
    ABORT = "abort"
    """End the run now with every output safe."""
    ACKNOWLEDGE = "acknowledge"
    """Acknowledge an alarm (``code``, optionally ``chamber``)."""
    NOTE = "note"
    """Write ``text`` to the run's audit trail."""


class ControllerStatus(BaseModel):
    """Retained status of one controller (topic ``<prefix>/<controller>/status``)."""

    model_config = ConfigDict(frozen=True, extra="ignore")

    v: Literal[1] = Field(PAYLOAD_VERSION, description="Payload version, dimensionless.")
    controller: str = Field(pattern=ID_PATTERN, description="Controller id.")
    online: bool = Field(True, description="Whether the controller is connected and publishing.")
    state: ControllerState = Field(
        description="What the controller is doing; after it went offline, how its run ended "
        "(finished, aborted) where that is known, else offline."
    )
    software_version: str | None = Field(None, description="squall version of the controller.")
    run_id: str | None = Field(None, description="Run identifier (the run log's name).")
    protocol: str | None = Field(None, description="Protocol being run (its title or file).")
    phase: str | None = Field(None, description="Protocol phase in force.")
    elapsed_s: float | None = Field(None, ge=0, description="Protocol time, s.")
    duration_s: float | None = Field(None, ge=0, description="Protocol length, s.")
    period_s: float | None = Field(None, gt=0, description="Control tick period, s.")
    utc_s: float | None = Field(None, description="UTC wall time of this status, POSIX s.")
    chambers: tuple[Annotated[str, StringConstraints(pattern=ID_PATTERN)], ...] = Field(
        (), description="Chamber ids of the run."
    )
    dropped_samples: int = Field(
        0, ge=0, description="Sample rows dropped by the publisher's buffer, dimensionless."
    )
    dropped_records: int = Field(
        0,
        ge=0,
        description="Alarm and event records dropped by the buffer's memory guard, "
        "dimensionless (0 unless an outage outlasted the record limit).",
    )
    remote_commands: bool = Field(False, description="Whether remote commands are accepted.")


class RemoteCommand(BaseModel):
    """A remote command (topic ``<prefix>/<controller>/cmd``), validated strictly."""

    model_config = ConfigDict(frozen=True, extra="forbid", str_strip_whitespace=True)

    v: Literal[1] = Field(PAYLOAD_VERSION, description="Payload version, dimensionless.")
    id: str = Field(
        pattern=r"^[A-Za-z0-9_.:-]{1,64}$", description="Request id, echoed in the result."
    )
    user: str = Field(pattern=_USER_PATTERN, description="Who sends the command.")
    command: CommandName = Field(description="What to do.")
    chamber: str | None = Field(None, pattern=ID_PATTERN, description="Chamber concerned.")
    code: str | None = Field(
        None, min_length=1, max_length=64, description="Alarm code (acknowledge)."
    )
    text: str = Field("", max_length=2000, description="Note text, or a reason.")
    utc_s: float | None = Field(None, description="When it was sent, UTC POSIX s.")

    @model_validator(mode="after")
    def _arguments(self) -> RemoteCommand:
        if self.command is CommandName.NOTE and not self.text:
            raise ValueError("a note needs its text")
        if self.command is CommandName.ACKNOWLEDGE and self.code is None:
            raise ValueError("acknowledge needs the alarm code")
        return self


class CommandResult(BaseModel):
    """A controller's answer to a command (topic ``<prefix>/<controller>/cmd/result``)."""

    model_config = ConfigDict(frozen=True, extra="ignore")

    v: Literal[1] = Field(PAYLOAD_VERSION, description="Payload version, dimensionless.")
    id: str | None = Field(None, description="Request id of the command, if it could be read.")
    user: str | None = Field(None, description="User named by the command, if it could be read.")
    command: str | None = Field(None, description="Command name as sent, if it could be read.")
    accepted: bool = Field(description="Whether the command was carried out.")
    reason: str = Field("", description="Why it was refused; empty when accepted.")
    utc_s: float | None = Field(None, description="When the controller answered, UTC POSIX s.")


class TaskInfo(BaseModel):
    """One operator task of a run (an entry of :class:`TaskList`)."""

    model_config = ConfigDict(frozen=True, extra="ignore")

    uid: str = Field(min_length=1, max_length=128, description="Stable id: the same task keeps it.")
    kind: str = Field(
        min_length=1,
        max_length=32,
        description="sampling, calibration, maintenance, daily-check, run-start or run-end.",
    )
    title: str = Field(max_length=500, description="What to do, in one line.")
    start_utc_s: float = Field(description="When it starts, UTC POSIX s.")
    start: str = Field("", description="The same as ISO 8601 UTC, for people.")
    minutes: float = Field(ge=0, description="Time set aside, minutes.")
    chambers: tuple[str, ...] = Field((), description="Chambers concerned.")
    experiment_id: str | None = Field(None, description="Scheduled experiment, if any.")
    detail: str = Field("", max_length=2000, description="What, why and which procedure.")


class TaskList(BaseModel):
    """A run's operator tasks (topic ``<prefix>/<controller>/tasks``, retained)."""

    model_config = ConfigDict(frozen=True, extra="ignore")

    v: Literal[1] = Field(PAYLOAD_VERSION, description="Payload version, dimensionless.")
    controller: str = Field(pattern=ID_PATTERN, description="Controller id.")
    run_id: str | None = Field(None, description="Run the tasks belong to.")
    utc_s: float | None = Field(None, description="When the list was published, UTC POSIX s.")
    tasks: tuple[TaskInfo, ...] = Field(
        (), description="Tasks still to come, by start time; empty once the run has ended."
    )
    more: int = Field(
        0, ge=0, description="Later tasks left out to keep the payload small, dimensionless."
    )


def task_list(
    controller: str,
    run_id: str | None,
    tasks: Sequence[TaskInfo],
    utc_s: float,
    *,
    limit: int = MAX_PAYLOAD_BYTES,
) -> TaskList:
    """The task list to publish: the tasks not yet over at ``utc_s``, as many as fit.

    Parameters
    ----------
    controller
        Controller id.
    run_id
        The run's id.
    tasks
        Every task of the run, by start time.
    utc_s
        Now, UTC POSIX s (tasks that ended before are left out).
    limit
        Largest payload, bytes; the latest tasks are left out (and counted) beyond it.

    Returns
    -------
    TaskList
        The list, its size within ``limit``.
    """
    coming = [t for t in tasks if t.start_utc_s + 60.0 * t.minutes > utc_s]
    keep = len(coming)
    while True:
        listed = TaskList(
            controller=controller,
            run_id=run_id,
            utc_s=utc_s,
            tasks=tuple(coming[:keep]),
            more=len(coming) - keep,
        )
        if keep == 0 or len(encode_model(listed)) <= limit:
            return listed
        keep = keep * 3 // 4


# ---------------------------------------------------------------------------- helpers
def _iso(utc_s: float) -> str:
    return datetime.fromtimestamp(utc_s, tz=UTC).isoformat().replace("+00:00", "Z")


def _dumps(data: dict[str, Any]) -> bytes:
    return json.dumps(data, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode()


def _load_object(payload: bytes | bytearray | str, what: str, limit: int) -> dict[str, Any]:
    """Parse a payload into a JSON object of the supported version, or raise PayloadError."""
    if isinstance(payload, str):
        payload = payload.encode()
    if len(payload) > limit:
        raise PayloadError(f"{what} payload of {len(payload)} bytes is over the {limit}-byte limit")
    try:
        data = json.loads(payload)
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise PayloadError(f"{what} payload is not UTF-8 JSON: {exc}") from None
    if not isinstance(data, dict):
        raise PayloadError(f"{what} payload must be a JSON object, got {type(data).__name__}")
    version = data.get("v")
    if version != PAYLOAD_VERSION:
        raise PayloadError(
            f"{what} payload version {version!r} is not supported "
            f"(this squall reads version {PAYLOAD_VERSION})",
            field="v",
        )
    return data


# ---------------------------------------------------------------------------- records
_WHAT = {SampleRow: "sample", AlarmRecord: "alarm", EventRecord: "event"}


def encode_record(record: Record) -> bytes:
    """JSON payload of a sample row, alarm record or event record.

    Parameters
    ----------
    record
        The record, as the control loop built it for the run log.

    Returns
    -------
    bytes
        UTF-8 JSON object with ``v``, every record field, and ``time`` (ISO 8601 UTC).

    Raises
    ------
    ValueError
        When a field that cannot be null holds a non-finite number (a bug upstream).
    """
    data: dict[str, Any] = {"v": PAYLOAD_VERSION}
    for column in columns_of(type(record)):
        value = getattr(record, column.name)
        if isinstance(value, StrEnum):
            value = value.value
        elif isinstance(value, float) and not math.isfinite(value) and column.nullable:
            value = None
        data[column.name] = value
    data["time"] = _iso(record.utc_s)
    return _dumps(data)


def _field_value(column: Any, value: Any, what: str) -> Any:
    """Check and convert one JSON value for ``column``; raise PayloadError when it is wrong."""
    name = column.name
    if value is None:
        if column.nullable:
            return None
        raise PayloadError(f"must not be null ({what} payload)", field=name)
    kind = column.kind
    if kind in (ValueKind.FLOAT, ValueKind.UTC):
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise PayloadError(f"must be a number ({what} payload)", field=name)
        return float(value)
    if kind is ValueKind.INT:
        if isinstance(value, bool) or not isinstance(value, int):
            raise PayloadError(f"must be an integer ({what} payload)", field=name)
        return value
    if kind is ValueKind.BOOL:
        if not isinstance(value, bool):
            raise PayloadError(f"must be true or false ({what} payload)", field=name)
        return value
    if not isinstance(value, str):
        raise PayloadError(f"must be text ({what} payload)", field=name)
    if kind is ValueKind.ENUM:
        try:
            return column.enum(value)
        except ValueError:
            allowed = ", ".join(m.value for m in column.enum)
            raise PayloadError(
                f"{value!r} is not one of {allowed} ({what} payload)", field=name
            ) from None
    return value


def decode_record(payload: bytes | bytearray | str, record_type: type[R]) -> R:
    """Read a sample, alarm or event payload back into its record dataclass.

    Parameters
    ----------
    payload
        The message payload (UTF-8 JSON).
    record_type
        :class:`SampleRow`, :class:`AlarmRecord` or :class:`EventRecord`.

    Returns
    -------
    SampleRow or AlarmRecord or EventRecord
        The record; keys the record does not have (``v``, ``time``, fields of newer
        versions) are ignored.

    Raises
    ------
    PayloadError
        Bad JSON, another version, a missing required field or a value of the wrong type.
    """
    what = _WHAT[record_type]
    data = _load_object(payload, what, MAX_PAYLOAD_BYTES)
    optional = {
        f.name
        for f in dataclasses.fields(record_type)
        if f.default is not dataclasses.MISSING or f.default_factory is not dataclasses.MISSING
    }
    values: dict[str, Any] = {}
    for column in columns_of(record_type):
        if column.name not in data:
            if column.name in optional:
                continue
            raise PayloadError(f"is missing ({what} payload)", field=column.name)
        values[column.name] = _field_value(column, data[column.name], what)
    return record_type(**values)


# ---------------------------------------------------------------------------- models
def encode_model(model: BaseModel) -> bytes:
    """JSON payload of a status, command or command result.

    Parameters
    ----------
    model
        The payload model.

    Returns
    -------
    bytes
        UTF-8 JSON object.
    """
    return model.model_dump_json().encode()


def decode_model(
    payload: bytes | bytearray | str, model: type[M], *, limit: int = MAX_PAYLOAD_BYTES
) -> M:
    """Read a status, command or command result payload.

    Parameters
    ----------
    payload
        The message payload (UTF-8 JSON).
    model
        :class:`ControllerStatus`, :class:`RemoteCommand` or :class:`CommandResult`.
    limit
        Largest payload accepted, bytes.

    Returns
    -------
    M
        The validated model.

    Raises
    ------
    PayloadError
        Bad JSON, another version, or a field that does not validate (the first one named).
    """
    what = {ControllerStatus: "status", RemoteCommand: "command", TaskList: "task list"}.get(
        model, "command result"
    )
    data = _load_object(payload, what, limit)
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        first = exc.errors()[0]
        field = ".".join(str(p) for p in first["loc"]) or None
        message = first["msg"]
        if first["type"] == "extra_forbidden":
            message = "unknown key"
        raise PayloadError(f"{message} ({what} payload)", field=field) from None
