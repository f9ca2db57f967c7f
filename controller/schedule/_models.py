"""What the schedule stores and how a refusal is told: experiments, their states and history,
and the conflicts that keep an experiment out.

Rules
-----
- An experiment's life is a small state machine. Every allowed change is one row of
  :data:`TRANSITIONS`; anything else is refused and changes nothing (the h11 idea: the rules
  live in one table that code and documentation both read).
- Live states (:data:`LIVE_STATES`) hold chambers: planned, preflight, running, held. The
  others are final: done, aborted, cancelled, refused (a refused experiment may be planned
  again with ``squall schedule move``).
- Times are aware UTC inside. Messages show each instant twice: in UTC (``…Z``) and in the
  rig's local zone (``rig.maintenance.timezone``), see :func:`format_when`.
"""

from __future__ import annotations

import re
import zoneinfo
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING

from controller.errors import SquallError

if TYPE_CHECKING:
    from controller.protocol import CompiledProtocol

__all__ = [
    "EARLIEST_START",
    "LATEST_START",
    "LIVE_STATES",
    "TRANSITIONS",
    "Booking",
    "Conflict",
    "ConflictKind",
    "Experiment",
    "ExperimentState",
    "HistoryEntry",
    "ResourcePeak",
    "ScheduleConflict",
    "booking_of",
    "chamber_span",
    "check_start",
    "check_text_field",
    "format_span",
    "format_when",
    "normalize_id",
]


class ExperimentState(StrEnum):
    """Where an experiment is in its life."""

    PLANNED = "planned"
    """Accepted into the schedule; waits for its start."""
    PREFLIGHT = "preflight"
    """``squall serve`` is checking sensors, calibrations and alarms before starting it."""
    RUNNING = "running"
    """Its run is on."""
    HELD = "held"
    """Its run is on hold (the protocol clock stands still)."""
    DONE = "done"
    """Its run finished."""
    ABORTED = "aborted"
    """Its run was stopped before the end."""
    CANCELLED = "cancelled"
    """Taken out of the schedule before it started."""
    REFUSED = "refused"
    """Preflight (or serve) refused to start it."""


LIVE_STATES: frozenset[ExperimentState] = frozenset(
    {
        ExperimentState.PLANNED,
        ExperimentState.PREFLIGHT,
        ExperimentState.RUNNING,
        ExperimentState.HELD,
    }
)
"""States that hold the experiment's chambers (and, in v1, its whole rig)."""

_S = ExperimentState
TRANSITIONS: dict[ExperimentState, frozenset[ExperimentState]] = {
    _S.PLANNED: frozenset({_S.PREFLIGHT, _S.CANCELLED, _S.REFUSED}),
    _S.PREFLIGHT: frozenset({_S.RUNNING, _S.REFUSED, _S.PLANNED, _S.CANCELLED}),
    _S.RUNNING: frozenset({_S.HELD, _S.DONE, _S.ABORTED}),
    _S.HELD: frozenset({_S.RUNNING, _S.DONE, _S.ABORTED}),
    _S.DONE: frozenset(),
    _S.ABORTED: frozenset(),
    _S.CANCELLED: frozenset(),
    _S.REFUSED: frozenset({_S.PLANNED}),
}
"""Allowed state changes: ``from -> {to, ...}``. Preflight may go back to planned (serve
stopped before deciding); a refused experiment may be planned again (``move``)."""


@dataclass(frozen=True)
class Experiment:
    """One scheduled experiment, as stored.

    Attributes
    ----------
    id
        ``E0001``…, assigned by the store and never reused (no unit).
    rig_path
        Rig file, absolute and resolved (no unit).
    rig_name
        The rig's ``name`` when the experiment was added.
    protocol_path
        Protocol file as added, absolute and resolved (no unit).
    protocol_text
        Snapshot of the protocol file taken at add; serve runs this text, not the file (no unit).
    protocol_sha256
        SHA-256 of ``protocol_text`` (UTF-8), hex (no unit).
    title
        The protocol's title.
    chambers
        Chamber ids the protocol uses, in file order (no unit).
    start_utc
        Planned start, aware UTC.
    end_utc
        ``start_utc`` plus the protocol's duration, aware UTC.
    owner
        Who is responsible for it (no unit).
    state
        Where it is in its life (no unit).
    log_path
        Its run log once started, else ``None`` (no unit).
    note
        Free text given at add (no unit).
    """

    id: str
    rig_path: Path
    rig_name: str
    protocol_path: Path
    protocol_text: str
    protocol_sha256: str
    title: str
    chambers: tuple[str, ...]
    start_utc: datetime
    end_utc: datetime
    owner: str
    state: ExperimentState
    log_path: Path | None
    note: str

    @property
    def live(self) -> bool:
        """Whether the experiment holds its chambers (planned, preflight, running, held)."""
        return self.state in LIVE_STATES


@dataclass(frozen=True)
class HistoryEntry:
    """One change of an experiment's state.

    Attributes
    ----------
    time_utc
        When it happened, aware UTC.
    from_state
        State before, or ``None`` for the add (no unit).
    to_state
        State after (no unit).
    by
        Who or what made the change (a user name, ``serve``) (no unit).
    reason
        Why, in words (no unit).
    """

    time_utc: datetime
    from_state: ExperimentState | None
    to_state: ExperimentState
    by: str
    reason: str


class ConflictKind(StrEnum):
    """What keeps an experiment out of the schedule."""

    CHAMBER_BOOKED = "chamber-booked"
    """A chamber it needs is booked by another live experiment at the same time."""
    RIG_BUSY = "rig-busy"
    """Its rig runs another experiment at the same time (one experiment per rig, v1)."""
    UNKNOWN_CHAMBER = "unknown-chamber"
    """The protocol names a chamber the rig does not have."""
    BATH_PROGRAM = "bath-program"
    """Chambers of one bath would get different temperature programs."""
    PLANT_CAPACITY = "plant-capacity"
    """A shared chiller or heater would have to move more heat than it can."""
    NODE_CAPACITY = "node-capacity"
    """A bath's or chamber's own heater or chiller would have to give more than it can."""
    LAMP_BUDGET = "lamp-budget"
    """The lamps together would draw more than the lamp circuit's budget."""
    CHAMBER_LIMITS = "chamber-limits"
    """The protocol asks a chamber for more than its limits (temperature, ramp, PAR, flow)."""
    STATE = "state"
    """The experiment's state does not allow the change asked for."""


@dataclass(frozen=True)
class Conflict:
    """One reason an experiment cannot go where it was asked to.

    Attributes
    ----------
    kind
        What collides (no unit).
    message
        What collides and when, for the person planning (one line) (no unit).
    at_utc
        First instant of the collision, aware UTC, or ``None`` when it does not depend on time.
    field
        Dotted path in the protocol file to blame (``groups.warm.chambers.1``), or ``None``
        (no unit).
    experiments
        Ids of the stored experiments involved (no unit).
    """

    kind: ConflictKind
    message: str
    at_utc: datetime | None = None
    field: str | None = None
    experiments: tuple[str, ...] = ()

    @property
    def time_independent(self) -> bool:
        """Whether no other start time could avoid this conflict (it is the protocol's own)."""
        return self.kind in (
            ConflictKind.UNKNOWN_CHAMBER,
            ConflictKind.CHAMBER_LIMITS,
        ) or (self.kind is ConflictKind.BATH_PROGRAM and not self.experiments)


@dataclass(frozen=True)
class Booking:
    """An experiment as the conflict checks see it.

    Attributes
    ----------
    label
        How messages name it: ``E0002 'title' (owner)``, or ``this experiment`` (no unit).
    experiment_id
        Stored id, or ``None`` for the experiment being placed (no unit).
    chambers
        Chamber ids it uses (no unit).
    start_utc, end_utc
        Its span [start, end), aware UTC.
    compiled
        Its compiled protocol (elapsed 0 = ``start_utc``); ``None`` when not needed (no unit).
    """

    label: str
    experiment_id: str | None
    chambers: tuple[str, ...]
    start_utc: datetime
    end_utc: datetime
    compiled: CompiledProtocol | None = None

    def overlaps(self, other: Booking) -> bool:
        """Whether the spans [start, end) of two bookings share any instant."""
        return self.start_utc < other.end_utc and other.start_utc < self.end_utc


@dataclass(frozen=True)
class ResourcePeak:
    """Largest load on one shared resource while an experiment runs.

    Attributes
    ----------
    name
        ``chiller 'glycol-chiller'``, ``lamp circuit`` (no unit).
    peak_w
        Largest load, W.
    capacity_w
        What the resource gives, W.
    at_utc
        When the peak happens, aware UTC.
    """

    name: str
    peak_w: float
    capacity_w: float
    at_utc: datetime


class ScheduleConflict(SquallError):
    """The schedule refuses a change; nothing was written.

    Parameters
    ----------
    conflicts
        Every reason found, most important first (at least one) (no unit).
    file
        The protocol file the refusal is about, if any (no unit).
    line
        1-based line of the first conflict's field in ``file``, if known.
    lead
        Words before the first conflict's message.
    """

    def __init__(
        self,
        conflicts: tuple[Conflict, ...] | list[Conflict],
        *,
        file: str | Path | None = None,
        line: int | None = None,
        lead: str = "refused",
    ) -> None:
        conflicts = tuple(conflicts)
        if not conflicts:
            raise ValueError("a ScheduleConflict needs at least one conflict")
        first = conflicts[0]
        more = len(conflicts) - 1
        message = f"{lead}: {first.message}"
        if more:
            message += f" (and {more} more; 'squall schedule check' lists them all)"
        super().__init__(message, file=file, line=line, field=first.field)
        self.conflicts = conflicts


def _zone(timezone: str) -> zoneinfo.ZoneInfo:
    try:
        return zoneinfo.ZoneInfo(timezone)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        return zoneinfo.ZoneInfo("UTC")


def _iso(moment: datetime) -> str:
    """ISO 8601 to the minute, or to the second when the seconds are not zero."""
    spec = "minutes" if moment.second == 0 and moment.microsecond == 0 else "seconds"
    return moment.replace(microsecond=0).isoformat(timespec=spec)


def format_when(moment: datetime, timezone: str) -> str:
    """An instant in UTC and in a local zone: ``2027-07-12T14:00Z (local 2027-07-12T15:00+01:00)``.

    Parameters
    ----------
    moment
        Aware instant (any zone).
    timezone
        IANA zone of the local clock (unknown names fall back to UTC).

    Returns
    -------
    str
        The instant to the minute (to the second when its seconds are not zero) (no unit).
    """
    utc = moment.astimezone(UTC)
    local = moment.astimezone(_zone(timezone))
    text = _iso(utc).replace("+00:00", "Z")
    return f"{text} (local {_iso(local)})"


def format_span(start: datetime, end: datetime, timezone: str) -> str:
    """``from <when> to <when>`` for a span of time (see :func:`format_when`).

    Parameters
    ----------
    start, end
        Aware instants bounding the span.
    timezone
        IANA zone of the local clock (no unit).

    Returns
    -------
    str
        The span in words (no unit).
    """
    return f"from {format_when(start, timezone)} to {format_when(end, timezone)}"


def chamber_span(ids: Sequence[str]) -> str:
    """``C1–C4`` for three or more consecutive numbered ids sharing a prefix, else a list.

    Parameters
    ----------
    ids
        Chamber ids in order (no unit).

    Returns
    -------
    str
        The ids in words (no unit).
    """
    parts = [re.fullmatch(r"(.*?)(\d+)", chamber) for chamber in ids]
    if len(ids) > 2 and all(parts):
        prefixes = {m.group(1) for m in parts if m}
        numbers = [int(m.group(2)) for m in parts if m]
        if len(prefixes) == 1 and numbers == list(range(numbers[0], numbers[0] + len(ids))):
            return f"{ids[0]}–{ids[-1]}"
    return ", ".join(ids)


EARLIEST_START = datetime(2000, 1, 1, tzinfo=UTC)
"""Earliest start the schedule accepts (catches slips in the year)."""
LATEST_START = datetime(2200, 1, 1, tzinfo=UTC)
"""Starts must lie before this instant."""


def check_text_field(value: str, field: str, *, max_len: int, allow_empty: bool = False) -> str:
    """A one-line free-text field (owner, note, reason), trimmed; refuse control characters.

    Parameters
    ----------
    value
        As given (no unit).
    field
        Its name for messages (``--owner``) (no unit).
    max_len
        Longest accepted length, characters.
    allow_empty
        Whether an empty value is fine (no unit).

    Returns
    -------
    str
        The trimmed value (no unit).
    """
    text = value.strip()
    if not text and not allow_empty:
        raise SquallError("must not be empty", field=field)
    if len(text) > max_len:
        raise SquallError(f"is {len(text)} characters long; at most {max_len}", field=field)
    bad = next((c for c in text if not c.isprintable()), None)
    if bad is not None:
        raise SquallError(
            f"contains the control or unprintable character {bad!r}; write one plain line",
            field=field,
        )
    return text


def check_start(start_utc: datetime, field: str) -> datetime:
    """A start the store accepts: aware, within the accepted years; returned in UTC.

    Parameters
    ----------
    start_utc
        The start (any zone) (no unit).
    field
        Its name for messages (``--start``) (no unit).

    Returns
    -------
    datetime
        The same instant in UTC.
    """
    if start_utc.tzinfo is None or start_utc.utcoffset() is None:
        raise SquallError("a start time needs a zone (e.g. +02:00 or Z)", field=field)
    start = start_utc.astimezone(UTC)
    if not EARLIEST_START <= start < LATEST_START:
        raise SquallError(
            f"{start.isoformat()} is outside the years the schedule accepts "
            f"({EARLIEST_START.year}–{LATEST_START.year - 1})",
            field=field,
        )
    return start


def normalize_id(text: str) -> str:
    """``E0007`` from ``E0007``, ``e7`` or ``7``; other text is returned trimmed, as typed.

    Parameters
    ----------
    text
        An experiment id as typed (no unit).

    Returns
    -------
    str
        The id as stored, when the text can be one (no unit).
    """
    match = re.fullmatch(r"[Ee]?0*(\d{1,12})", text.strip())
    return f"E{int(match.group(1)):04d}" if match else text.strip()


def booking_of(experiment: Experiment, compiled: CompiledProtocol | None = None) -> Booking:
    """The conflict checks' view of a stored experiment.

    Parameters
    ----------
    experiment
        A stored experiment (no unit).
    compiled
        Its compiled protocol when resource checks need it (no unit).

    Returns
    -------
    Booking
        Labelled ``E0002 'title' (owner)`` (no unit).
    """
    return Booking(
        label=f"{experiment.id} {experiment.title!r} ({experiment.owner})",
        experiment_id=experiment.id,
        chambers=experiment.chambers,
        start_utc=experiment.start_utc,
        end_utc=experiment.end_utc,
        compiled=compiled,
    )
