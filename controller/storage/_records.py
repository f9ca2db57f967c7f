"""Row shapes of the run log: the one source of truth for table columns and frame dtypes.

Rules of this module
--------------------
- Every table of the run log is described by one frozen, keyword-only dataclass below. The
  SQL columns (``_schema``), the insert statements (``_writer``) and the pandas column names
  and dtypes (``_reader``) are all derived from these classes by :mod:`._columns`; nothing
  else lists columns.
- Field types are restricted to ``float``, ``int``, ``bool``, ``str``, a ``StrEnum``, or one
  of these ``| None`` (nullable column). Units live in the field names.
- A field whose name ends in ``utc_s`` holds UTC wall time as POSIX seconds (seconds since
  1970-01-01T00:00:00Z, leap seconds not counted). Frames show it as a tz-aware UTC column
  named with ``time`` in place of ``utc_s`` (``utc_s`` → ``time``, ``start_utc_s`` →
  ``start_time``).
- A field named ``t_s`` (or ending in ``_t_s``) is *clock* time: seconds on the run's clock
  (monotonic real time, or simulated time), which restarts when a run is resumed.
- Sample rows are dataclasses rather than pydantic models on purpose: the control loop builds
  one per chamber per tick, and validation would cost as much as the insert itself. Rows come
  from the program, not from people; a wrong value there is a bug, not user input. The loop
  goes further and hands the run log each row as the plain tuple of its values in field order
  (:meth:`SampleRow.values`, :meth:`SampleRow.from_values`), building no object at all.
- Enums may gain members but never rename them: their values are stored as text.
"""

from __future__ import annotations

import hashlib
import math
import operator
from collections.abc import Sequence
from dataclasses import dataclass, field, fields
from datetime import UTC, datetime
from enum import StrEnum
from typing import Any

from controller import __version__

__all__ = [
    "SAMPLE_FIELDS",
    "AlarmAction",
    "AlarmLevel",
    "AlarmRecord",
    "AuditRecord",
    "ChamberRecord",
    "ClockKind",
    "EventKind",
    "EventRecord",
    "IncubationState",
    "LightState",
    "ResumePoint",
    "RunEnd",
    "RunEndReason",
    "RunLogInfo",
    "RunMeta",
    "SampleRow",
    "SessionRecord",
    "WindowEndReason",
    "WindowRecord",
]


def _doc(doc: str, *, category: bool = False) -> dict[str, Any]:
    """Field metadata: the column's description (unit included) for derived docs.

    Parameters
    ----------
    doc
        What the column holds, with its unit.
    category
        Whether frames hold this text column as a pandas category (few distinct values).
    """
    return {"doc": doc, "category": category}


class ClockKind(StrEnum):
    """Which clock drove the run."""

    REAL = "real"
    """Monotonic real time."""
    VIRTUAL = "virtual"
    """Simulated time that jumps ahead when every task waits."""


class IncubationState(StrEnum):
    """Whether a chamber is being flushed (open) or sealed for an oxygen flux measurement."""

    OPEN = "open"
    CLOSED = "closed"


class AlarmLevel(StrEnum):
    """Severity of an alarm or interlock."""

    WARNING = "warning"
    ALARM = "alarm"
    TRIP = "trip"
    """An interlock drove outputs to their safe state."""


class AlarmAction(StrEnum):
    """What happened to an alarm."""

    RAISE = "raise"
    CLEAR = "clear"
    ACK = "ack"


class EventKind(StrEnum):
    """Kinds of run events."""

    RUN_START = "run_start"
    RUN_STOP = "run_stop"
    GAP = "gap"
    """No data between ``utc_s - duration_s`` and ``utc_s``; the run was resumed at ``utc_s``."""
    PHASE_CHANGE = "phase_change"
    HOLD = "hold"
    """Protocol clock frozen, setpoints kept."""
    HOLD_END = "hold_end"
    """Protocol clock running again after a hold."""
    SKIP = "skip"
    """Operator skipped to another phase."""
    ABORT = "abort"


class LightState(StrEnum):
    """Whether the lamps were on during a closed incubation window."""

    LIGHT = "light"
    DARK = "dark"


class WindowEndReason(StrEnum):
    """Why a closed incubation window ended."""

    O2_HIGH = "o2_high"
    """Oxygen rose above the band."""
    O2_LOW = "o2_low"
    """Oxygen fell below the band."""
    MAX_DURATION = "max_duration"
    LIGHT_CHANGE = "light_change"
    """The light period the window was pinned to ended."""
    PHASE_CHANGE = "phase_change"
    OPERATOR = "operator"
    ALARM = "alarm"
    RUN_END = "run_end"
    INTERRUPTED = "interrupted"
    """The controller stopped (crash, power cut) while the chamber was closed."""


class RunEndReason(StrEnum):
    """How a finished run ended."""

    COMPLETED = "completed"
    ABORTED = "aborted"
    STOPPED = "stopped"
    """Stopped cleanly before the protocol's end, not resumable."""


@dataclass(frozen=True, slots=True, kw_only=True)
class SampleRow:
    """One chamber at one logged tick (table ``samples``); field order is the export order."""

    t_s: float = field(metadata=_doc("Clock time of the tick, s."))
    utc_s: float = field(metadata=_doc("UTC wall time of the tick, POSIX s."))
    elapsed_s: float = field(
        metadata=_doc("Protocol time since the protocol's start (frozen while held), s.")
    )
    chamber: str = field(metadata=_doc("Chamber identifier.", category=True))
    phase: str = field(metadata=_doc("Name of the protocol phase in force.", category=True))
    temperature_c: float | None = field(metadata=_doc("Measured water temperature, °C."))
    temperature_setpoint_c: float | None = field(metadata=_doc("Temperature setpoint, °C."))
    par: float | None = field(metadata=_doc("Measured PAR, µmol photons m⁻² s⁻¹."))
    par_setpoint: float | None = field(metadata=_doc("PAR setpoint, µmol photons m⁻² s⁻¹."))
    flow_cm_s: float | None = field(metadata=_doc("Measured flow over the community, cm s⁻¹."))
    flow_setpoint_cm_s: float | None = field(metadata=_doc("Flow setpoint, cm s⁻¹."))
    o2_umol_l: float | None = field(metadata=_doc("Dissolved oxygen, µmol L⁻¹."))
    o2_sat_pct: float | None = field(metadata=_doc("Dissolved oxygen, % air saturation."))
    heater_pct: float | None = field(metadata=_doc("Heater output, % of full power."))
    chiller_pct: float | None = field(metadata=_doc("Chiller output, % of full power."))
    lamp_pct: float | None = field(metadata=_doc("Lamp output, % of full power."))
    pump_pct: float | None = field(metadata=_doc("Flushing/flow pump output, % of full power."))
    incubation: IncubationState = field(
        metadata=_doc("Incubation state: open (flushed) or closed.")
    )
    alarm: str | None = field(
        default=None, metadata=_doc("Code of the active alarm, None when none.")
    )

    def values(self) -> tuple[Any, ...]:
        """The row's values in field order (the order :meth:`from_values` takes).

        Returns
        -------
        tuple
            ``t_s`` (s), ``utc_s`` (POSIX s), ``elapsed_s`` (s), ``chamber``, ``phase``, …,
            ``incubation``, ``alarm``: every field in declaration order, each in its unit.
        """
        return _sample_values(self)

    @classmethod
    def from_values(cls, values: Sequence[Any]) -> SampleRow:
        """The row whose values, in field order, are ``values``.

        Parameters
        ----------
        values
            One value per field in declaration order (as :meth:`values` gives them), each
            in the unit its field names; ``incubation`` may be the state's text value.

        Returns
        -------
        SampleRow
            The row.
        """
        named = dict(zip(SAMPLE_FIELDS, values, strict=True))
        named["incubation"] = IncubationState(named["incubation"])
        return cls(**named)


SAMPLE_FIELDS: tuple[str, ...] = tuple(f.name for f in fields(SampleRow))
"""Field names of :class:`SampleRow` in declaration order: the order of its values tuple."""
_sample_values = operator.attrgetter(*SAMPLE_FIELDS)


@dataclass(frozen=True, slots=True, kw_only=True)
class AlarmRecord:
    """An alarm or interlock raised, cleared or acknowledged (table ``alarms``)."""

    t_s: float = field(metadata=_doc("Clock time, s."))
    utc_s: float = field(metadata=_doc("UTC wall time, POSIX s."))
    action: AlarmAction = field(metadata=_doc("raise, clear or ack."))
    level: AlarmLevel = field(metadata=_doc("warning, alarm or trip."))
    code: str = field(metadata=_doc("Alarm code, stable across runs (e.g. 'over_temperature')."))
    reason: str = field(metadata=_doc("Why, in words, with the values that triggered it."))
    chamber: str | None = field(
        default=None, metadata=_doc("Chamber concerned; None for the whole rig.")
    )
    user: str | None = field(default=None, metadata=_doc("Who acknowledged (ack only)."))


@dataclass(frozen=True, slots=True, kw_only=True)
class EventRecord:
    """A run event (table ``events``)."""

    t_s: float = field(metadata=_doc("Clock time, s."))
    utc_s: float = field(metadata=_doc("UTC wall time, POSIX s."))
    kind: EventKind = field(metadata=_doc("Kind of event."))
    elapsed_s: float | None = field(default=None, metadata=_doc("Protocol time at the event, s."))
    chamber: str | None = field(
        default=None, metadata=_doc("Chamber concerned; None for the whole run.")
    )
    phase: str | None = field(
        default=None, metadata=_doc("Phase entered (phase_change, skip) or in force.")
    )
    duration_s: float | None = field(
        default=None, metadata=_doc("Length of a gap, s; None otherwise.")
    )
    detail: str = field(default="", metadata=_doc("Free text."))


@dataclass(frozen=True, slots=True, kw_only=True)
class WindowRecord:
    """One closed incubation window of one chamber, written when it ends (table ``windows``)."""

    chamber: str = field(metadata=_doc("Chamber identifier."))
    light: LightState = field(metadata=_doc("light or dark."))
    start_t_s: float = field(metadata=_doc("Clock time the chamber closed, s."))
    start_utc_s: float = field(metadata=_doc("UTC wall time the chamber closed, POSIX s."))
    end_t_s: float = field(metadata=_doc("Clock time the chamber opened again, s."))
    end_utc_s: float = field(metadata=_doc("UTC wall time the chamber opened again, POSIX s."))
    end_reason: WindowEndReason = field(metadata=_doc("Why the window ended."))
    detail: str = field(default="", metadata=_doc("Free text (e.g. the O2 value that ended it)."))


@dataclass(frozen=True, slots=True, kw_only=True)
class AuditRecord:
    """An operator command or note (table ``audit``)."""

    t_s: float = field(metadata=_doc("Clock time, s."))
    utc_s: float = field(metadata=_doc("UTC wall time, POSIX s."))
    user: str = field(metadata=_doc("Operating-system user who sent the command."))
    command: str = field(metadata=_doc("Command name (e.g. 'hold', 'note')."))
    text: str = field(default="", metadata=_doc("Arguments or note text."))
    result: str = field(default="ok", metadata=_doc("'ok', or why the command was refused."))


@dataclass(frozen=True, slots=True, kw_only=True)
class ChamberRecord:
    """A chamber of the rig as it was when the run started (table ``chambers``)."""

    chamber: str = field(metadata=_doc("Chamber identifier."))
    water_volume_l: float = field(metadata=_doc("Water volume, L."))
    sediment_area_m2: float = field(metadata=_doc("Planar area of the enclosed community, m²."))
    bath: str | None = field(default=None, metadata=_doc("Shared water bath, if any."))


@dataclass(frozen=True, slots=True, kw_only=True)
class SessionRecord:
    """One writer session: the start of the run or a resume (table ``sessions``)."""

    software_version: str = field(metadata=_doc("squall version that wrote this session."))
    first_sample_seq: int = field(metadata=_doc("Row id the session's first sample gets."))
    resumed: bool = field(metadata=_doc("Whether this session resumed an interrupted run."))


@dataclass(frozen=True, slots=True, kw_only=True)
class RunEnd:
    """How and when a finished run ended (the ``end_*`` columns of table ``run``)."""

    end_t_s: float = field(metadata=_doc("Clock time the run ended, s."))
    end_utc_s: float = field(metadata=_doc("UTC wall time the run ended, POSIX s."))
    end_reason: RunEndReason = field(metadata=_doc("completed, aborted or stopped."))


@dataclass(frozen=True, slots=True, kw_only=True)
class RunMeta:
    """What a run log records about the run once, at its start (table ``run`` and ``chambers``).

    ``protocol_sha256`` is computed from ``protocol_text`` (UTF-8) and stored beside it, so
    a reader can tell whether the protocol text was edited afterwards.
    """

    run_id: str = field(metadata=_doc("Run identifier."))
    protocol_text: str = field(metadata=_doc("The protocol file's text as run."))
    rig_text: str = field(metadata=_doc("The rig file's text as run (snapshot)."))
    start_utc_s: float = field(metadata=_doc("UTC wall time the run started, POSIX s."))
    clock_kind: ClockKind = field(metadata=_doc("real or virtual."))
    chambers: tuple[ChamberRecord, ...] = field(default=(), metadata={"table": "chambers"})
    software_version: str = field(
        default=__version__, metadata=_doc("squall version that started the run.")
    )
    protocol_sha256: str = field(
        init=False, metadata=_doc("SHA-256 of protocol_text (UTF-8), hex.")
    )

    def __post_init__(self) -> None:
        if not self.run_id:
            raise ValueError("run_id must not be empty")
        if not math.isfinite(self.start_utc_s):
            raise ValueError(f"start_utc_s must be finite, got {self.start_utc_s!r}")
        ids = [c.chamber for c in self.chambers]
        if len(set(ids)) != len(ids):
            raise ValueError(f"chamber ids must be unique, got {ids}")
        digest = hashlib.sha256(self.protocol_text.encode("utf-8")).hexdigest()
        object.__setattr__(self, "protocol_sha256", digest)

    @property
    def start_time(self) -> datetime:
        """UTC wall time the run started, tz-aware."""
        return datetime.fromtimestamp(self.start_utc_s, tz=UTC)


@dataclass(frozen=True, slots=True, kw_only=True)
class RunLogInfo:
    """Everything a reader knows about a log besides its tables.

    Attributes
    ----------
    meta
        The run's metadata as recorded at its start.
    end
        How the run ended, or None: a log without an end is either being written now or was
        interrupted (crash, power cut) and can be resumed.
    schema_version
        Log schema version of the file, dimensionless.
    sessions
        Number of writer sessions (1 + number of resumes), dimensionless.
    samples
        Number of sample rows, dimensionless.
    """

    meta: RunMeta
    end: RunEnd | None
    schema_version: int
    sessions: int
    samples: int

    @property
    def finished(self) -> bool:
        """Whether the run was marked finished by its writer."""
        return self.end is not None


@dataclass(frozen=True, slots=True, kw_only=True)
class ResumePoint:
    """Where an interrupted run stopped, as the last committed rows tell it.

    Attributes
    ----------
    session
        Number of the new writer session (2 for the first resume), dimensionless.
    last_seq
        Row id of the last sample, which is also the number of samples in the log (rows are
        never deleted); 0 when there is none.
    last_t_s
        Clock time of the last sample, s (on the old session's clock); None without samples.
    last_utc_s
        UTC wall time of the last sample, POSIX s; None without samples.
    last_elapsed_s
        Protocol time of the last sample, s; None without samples.
    phases
        Phase in force per chamber at its last sample.
    closed
        Chambers whose incubation was closed at their last sample (a window left open).
    held
        Whether the protocol clock was held when the run stopped (last hold event is a hold).
    """

    session: int
    last_seq: int
    last_t_s: float | None
    last_utc_s: float | None
    last_elapsed_s: float | None
    phases: dict[str, str]
    closed: tuple[str, ...]
    held: bool
