"""Operator tasks: what people must do around a scheduled run, and when.

Rules of this module
--------------------
- Tasks are derived, never stored: from a protocol, a rig file and a start time
  (:func:`tasks_for_run`), or from every live experiment of a rig in a store
  (:func:`schedule_tasks`). The same inputs always give the same tasks with the same ``uid``
  (a hash of the experiment — or the protocol when there is no experiment — the kind, the
  UTC start and the chambers), so a calendar or an MQTT consumer sees an update, not a new
  task, when it reads them again.
- Kinds: the run's start and end; the protocol's sampling times; calibrations (optode, lamp,
  probes) that are stale at the start — one task a day before the start — or that expire
  while the run is on — one task on their last fresh day; cleaning every
  ``maintenance.cleaning_interval_d`` the same way; the daily check at
  ``maintenance.daily_check_at`` local time on every day the run is on.
- Freshness is judged on local dates in ``maintenance.timezone``: a calibration done on day
  D is ``(local date − D)`` days old, and fresh while that age is at most the limit. A limit
  set with no date on record is stale. :func:`calibration_states` is the one rule; serve's
  preflight uses it too.
- Local clock times are turned into UTC with :mod:`zoneinfo`, so daily checks keep their
  local time across daylight-saving changes. A local time that does not exist on a
  spring-forward day is read with the offset before the change (``fold=0``).
- Each upkeep task assumes the procedure is done when planned: later tasks of the same run
  count from it. Tasks of different experiments are derived independently from the rig's
  dates as they stand; update the dates after each procedure and the tasks follow.
"""

from __future__ import annotations

import hashlib
import re
import zoneinfo
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime, time, timedelta
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING

from controller.errors import SquallError

if TYPE_CHECKING:
    from controller.protocol import Protocol
    from controller.rig import Rig
    from controller.schedule import Experiment, ScheduleStore

__all__ = [
    "CALIBRATION_LEAD",
    "CalibrationKind",
    "CalibrationState",
    "OperatorTask",
    "TaskKind",
    "calibration_states",
    "chamber_list",
    "schedule_tasks",
    "tasks_for_run",
]

CALIBRATION_LEAD = timedelta(days=1)
"""How long before a run's start the calibrations and cleaning it needs are planned."""

RUN_START_MINUTES = 30.0
"""Time set aside at a run's start (chambers filled and closed, first readings looked at),
minutes; a planning default, not a rule."""

RUN_END_MINUTES = 30.0
"""Time set aside at a run's end (final samples, chambers emptied), minutes."""

_UPKEEP_TIME = time(9, 0)
"""Local time of calibration and cleaning tasks when the rig sets no daily check time."""

_MINUTES_PER_CHAMBER = {
    "optode": 30.0,
    "lamp": 20.0,
    "probes": 15.0,
    "cleaning": 10.0,
}
"""Time set aside per chamber for each upkeep procedure, minutes (planning defaults)."""

_PROCEDURES = {
    "optode": "two-point optode calibration (hardware-notes/calibration.md, oxygen optodes)",
    "lamp": "lamp PAR calibration against a quantum sensor (hardware-notes/calibration.md, lamps)",
    "probes": "probe check against a reference thermometer (hardware-notes/calibration.md, "
    "temperature probes)",
    "cleaning": "cleaning of the optode spots and probes",
}


class TaskKind(StrEnum):
    """What an operator task is about."""

    SAMPLING = "sampling"
    CALIBRATION = "calibration"
    MAINTENANCE = "maintenance"
    DAILY_CHECK = "daily-check"
    RUN_START = "run-start"
    RUN_END = "run-end"


class CalibrationKind(StrEnum):
    """Calibrations a rig keeps dates and age limits for."""

    OPTODE = "optode"
    LAMP = "lamp"
    PROBES = "probes"


@dataclass(frozen=True)
class OperatorTask:
    """Something a person must do at a time.

    Attributes
    ----------
    uid
        Stable identifier: the same inputs give the same uid (iCalendar UID, MQTT key) (no unit).
    kind
        What the task is about (no unit).
    title
        One line, e.g. ``"Sample C1–C4: water for nutrients"`` (no unit).
    start_utc
        When it starts, aware UTC.
    minutes
        Time set aside, minutes.
    chambers
        Chambers concerned, in rig order (no unit).
    experiment_id
        The experiment it belongs to, or ``None`` for a run not in a schedule (no unit).
    detail
        Longer text: what, why, which procedure (no unit).
    """

    uid: str
    kind: TaskKind
    title: str
    start_utc: datetime
    minutes: float
    chambers: tuple[str, ...]
    experiment_id: str | None
    detail: str

    @property
    def end_utc(self) -> datetime:
        """When the time set aside ends, aware UTC."""
        return self.start_utc + timedelta(minutes=self.minutes)


@dataclass(frozen=True)
class CalibrationState:
    """How old one calibration of one chamber is at an instant.

    Attributes
    ----------
    chamber
        Chamber id (no unit).
    kind
        Which calibration (no unit).
    last_on
        Local date of the last one, or ``None`` when the rig records none (no unit).
    max_age_d
        The rig's limit, days.
    age_d
        Whole local days since ``last_on`` at the instant asked about, or ``None``.
    """

    chamber: str
    kind: CalibrationKind
    last_on: date | None
    max_age_d: float
    age_d: int | None

    @property
    def fresh(self) -> bool:
        """Whether a run may start on it: on record and no older than the limit."""
        return self.age_d is not None and self.age_d <= self.max_age_d

    def describe(self) -> str:
        """The state in words, e.g. ``optode calibration of C3 is 41 d old (limit 30 d)``."""
        if self.last_on is None:
            return (
                f"{self.kind.value} calibration of {self.chamber} has no date on record "
                f"(limit {self.max_age_d:g} d)"
            )
        return (
            f"{self.kind.value} calibration of {self.chamber} is {self.age_d} d old "
            f"(done {self.last_on.isoformat()}, limit {self.max_age_d:g} d)"
        )


def _zone(rig: Rig) -> zoneinfo.ZoneInfo:
    return zoneinfo.ZoneInfo(rig.maintenance.timezone)


def _aware_utc(moment: datetime, name: str) -> datetime:
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise SquallError(f"{moment.isoformat()} has no zone; give times with a zone", field=name)
    return moment.astimezone(UTC)


def _limits(rig: Rig) -> dict[CalibrationKind, float]:
    m = rig.maintenance
    found = {
        CalibrationKind.OPTODE: m.optode_max_age_d,
        CalibrationKind.LAMP: m.lamp_max_age_d,
        CalibrationKind.PROBES: m.probes_max_age_d,
    }
    return {kind: limit for kind, limit in found.items() if limit is not None}


def _last_on(rig: Rig, chamber: str, kind: str) -> date | None:
    calibration = rig.chamber(chamber).calibration
    return {
        "optode": calibration.optode_on,
        "lamp": calibration.lamp_on,
        "probes": calibration.probes_on,
        "cleaning": calibration.cleaned_on,
    }[kind]


def calibration_states(
    rig: Rig, chambers: Iterable[str], at_utc: datetime
) -> list[CalibrationState]:
    """Age of every limited calibration of some chambers at an instant.

    Parameters
    ----------
    rig
        The rig (its calibration dates, limits and zone) (no unit).
    chambers
        Chamber ids of the rig (no unit).
    at_utc
        The instant, aware.

    Returns
    -------
    list of CalibrationState
        One per chamber and calibration kind the rig sets a limit for (chamber order, then
        optode, lamp, probes); ages in whole local days.
    """
    today = _aware_utc(at_utc, "at_utc").astimezone(_zone(rig)).date()
    states: list[CalibrationState] = []
    limits = _limits(rig)
    for chamber in chambers:
        for kind, limit in limits.items():
            last = _last_on(rig, chamber, kind.value)
            age = None if last is None else (today - last).days
            states.append(CalibrationState(chamber, kind, last, limit, age))
    return states


def chamber_list(ids: Sequence[str]) -> str:
    """``C1–C4`` for consecutive numbered ids sharing a prefix, else ``C1, C3``.

    Parameters
    ----------
    ids
        Chamber ids in order (no unit).

    Returns
    -------
    str
        Compact text (no unit).
    """
    parts = [re.fullmatch(r"(.*?)(\d+)", chamber) for chamber in ids]
    if len(ids) > 2 and all(parts):
        prefixes = {m.group(1) for m in parts if m}
        numbers = [int(m.group(2)) for m in parts if m]
        if len(prefixes) == 1 and numbers == list(range(numbers[0], numbers[0] + len(ids))):
            return f"{ids[0]}–{ids[-1]}"
    return ", ".join(ids)


class _Builder:
    """Collects the tasks of one run and gives them stable uids."""

    def __init__(self, key: str, experiment_id: str | None, order: Sequence[str]) -> None:
        self.key = key
        self.experiment_id = experiment_id
        self.order = {c: i for i, c in enumerate(order)}
        self.tasks: list[OperatorTask] = []
        self._uids: set[str] = set()

    def add(
        self,
        kind: TaskKind,
        title: str,
        start_utc: datetime,
        minutes: float,
        chambers: Iterable[str],
        detail: str,
    ) -> None:
        ordered = tuple(sorted(set(chambers), key=lambda c: self.order.get(c, len(self.order))))
        stamp = start_utc.astimezone(UTC).strftime("%Y%m%dT%H%M%SZ")
        seed = f"{self.key}|{kind.value}|{stamp}|{','.join(ordered)}"
        uid = hashlib.sha256(seed.encode("utf-8")).hexdigest()[:24]
        suffix = 2
        base = uid
        while uid in self._uids:  # two tasks of one kind at one time for the same chambers
            uid = f"{base}-{suffix}"
            suffix += 1
        self._uids.add(uid)
        self.tasks.append(
            OperatorTask(
                uid=f"{uid}@squall",
                kind=kind,
                title=title,
                start_utc=start_utc.astimezone(UTC),
                minutes=float(minutes),
                chambers=ordered,
                experiment_id=self.experiment_id,
                detail=detail,
            )
        )


def _local_utc(day: date, at: time, zone: zoneinfo.ZoneInfo) -> datetime:
    """UTC instant of a local date and clock time (DST-correct; fold=0 in gaps)."""
    return datetime.combine(day, at, tzinfo=zone).astimezone(UTC)


def _upkeep_due(
    last_on: date | None,
    limit_d: float,
    start_utc: datetime,
    end_utc: datetime,
    zone: zoneinfo.ZoneInfo,
    at: time,
) -> list[datetime]:
    """When one chamber's calibration or cleaning is due for a run: before the start if it
    is stale then, and on the last fresh day of each one that expires while the run is on."""
    start_day = start_utc.astimezone(zone).date()
    due: list[datetime] = []
    if last_on is None or (start_day - last_on).days > limit_d:
        planned = start_utc - CALIBRATION_LEAD
        due.append(planned)
        last_on = planned.astimezone(zone).date()
    whole_days = int(limit_d)  # the last fresh day is the last with (day - last_on) <= limit
    while True:
        last_fresh = last_on + timedelta(days=whole_days)
        when = max(_local_utc(last_fresh, at, zone), start_utc)
        if when >= end_utc:
            return due
        due.append(when)
        # done that day; a limit under one day needs it again the next day
        last_on = last_fresh if whole_days >= 1 else last_fresh + timedelta(days=1)


def _chamber_order(protocol: Protocol, rig: Rig) -> list[str]:
    mine = set(protocol.chambers())
    known = {c.id for c in rig.chambers}
    unknown = [c for c in protocol.chambers() if c not in known]
    if unknown:
        raise SquallError(
            f"the protocol names chambers the rig {rig.name!r} does not have: {', '.join(unknown)}"
        )
    return [c.id for c in rig.chambers if c.id in mine]


def _protocol_key(protocol: Protocol) -> str:
    text = protocol.model_dump_json(by_alias=True)
    return "protocol:" + hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def tasks_for_run(
    protocol: Protocol,
    rig: Rig,
    start_utc: datetime,
    *,
    experiment_id: str | None = None,
) -> list[OperatorTask]:
    """Every operator task of one run of a protocol on a rig.

    Parameters
    ----------
    protocol
        The validated protocol (its sampling times, chambers and duration) (no unit).
    rig
        The rig (calibration dates, ``[maintenance]`` limits, zone and daily check time) (no unit).
    start_utc
        The run's start, aware.
    experiment_id
        The scheduled experiment, if any (part of every uid and shown in every task) (no unit).

    Returns
    -------
    list of OperatorTask
        Run start and end, sampling, calibrations, cleaning and daily checks, sorted by
        start time (then kind and title) (no unit).

    Raises
    ------
    SquallError
        ``start_utc`` has no zone, or the protocol names a chamber the rig lacks.
    """
    start = _aware_utc(start_utc, "start_utc")
    end = start + timedelta(seconds=protocol.duration_s)
    order = _chamber_order(protocol, rig)
    zone = _zone(rig)
    label = f"{experiment_id} " if experiment_id else ""
    build = _Builder(experiment_id or _protocol_key(protocol), experiment_id, order)
    everything = chamber_list(order)
    build.add(
        TaskKind.RUN_START,
        f"Start {label}'{protocol.title}' on {everything}",
        start,
        RUN_START_MINUTES,
        order,
        f"The run starts: chambers {everything} filled and closed, first readings checked.",
    )
    build.add(
        TaskKind.RUN_END,
        f"End of {label}'{protocol.title}' on {everything}",
        end,
        RUN_END_MINUTES,
        order,
        "The protocol ends; final samples, then the chambers may be emptied.",
    )
    for index, sample in enumerate(protocol.sampling):
        t_s = protocol.resolve_time(sample.at)
        chambers = [c for c in order if sample.chambers is None or c in sample.chambers]
        build.add(
            TaskKind.SAMPLING,
            f"Sample {chamber_list(chambers)}: {sample.what}",
            start + timedelta(seconds=t_s),
            sample.minutes,
            chambers,
            f"{sample.what} (protocol sampling.{index}, at {sample.at!r}).",
        )
    at = rig.maintenance.daily_check_at or _UPKEEP_TIME
    limits: dict[str, float] = {k.value: v for k, v in _limits(rig).items()}
    if rig.maintenance.cleaning_interval_d is not None:
        limits["cleaning"] = rig.maintenance.cleaning_interval_d
    for what, limit in limits.items():
        due: dict[datetime, list[str]] = {}
        for chamber in order:
            last = _last_on(rig, chamber, what)
            for when in _upkeep_due(last, limit, start, end, zone, at):
                due.setdefault(when, []).append(chamber)
        for when, chambers in sorted(due.items()):
            _add_upkeep(build, what, when, chambers, start, limit)
    check = rig.maintenance.daily_check_at
    if check is not None:
        day = start.astimezone(zone).date()
        last_day = end.astimezone(zone).date()
        while day <= last_day:
            when = _local_utc(day, check, zone)
            if start <= when < end:
                build.add(
                    TaskKind.DAILY_CHECK,
                    f"Daily check {everything}: water level, leaks, fouling",
                    when,
                    rig.maintenance.daily_check_minutes,
                    order,
                    "Walk round the rack: water level, leaks, fouling of spots and probes, "
                    "alarms on the display.",
                )
            day += timedelta(days=1)
    return sorted(build.tasks, key=lambda t: (t.start_utc, t.kind.value, t.title))


def _add_upkeep(
    build: _Builder,
    what: str,
    when: datetime,
    chambers: list[str],
    start: datetime,
    limit_d: float,
) -> None:
    before = when < start
    kind = TaskKind.MAINTENANCE if what == "cleaning" else TaskKind.CALIBRATION
    name = "Clean" if what == "cleaning" else f"Calibrate {what}"
    if what == "probes":
        name = "Check probes"
    why = (
        "stale at the run's start (preflight refuses stale calibrations)"
        if before
        else "due while the run is on"
    )
    if what == "cleaning":
        why = "due before the run starts" if before else "due while the run is on"
    build.add(
        kind,
        f"{name} {chamber_list(chambers)}",
        when,
        _MINUTES_PER_CHAMBER[what] * len(chambers),
        chambers,
        f"{_PROCEDURES[what].capitalize()}: {why}; every {limit_d:g} d at most. Update the "
        "rig file's [chambers.calibration] dates afterwards.",
    )


def schedule_tasks(
    store: ScheduleStore,
    rig: Rig,
    rig_path: Path,
    *,
    start_utc: datetime,
    end_utc: datetime,
) -> list[OperatorTask]:
    """Tasks of every live experiment of a rig that start in ``[start_utc, end_utc)``.

    Parameters
    ----------
    store
        The schedule store (no unit).
    rig
        The rig, validated (its dates and limits as they stand now) (no unit).
    rig_path
        The rig file (experiments are stored under its resolved path) (no unit).
    start_utc, end_utc
        The window, aware.

    Returns
    -------
    list of OperatorTask
        Sorted by start time (no unit).
    """
    from controller.schedule import LIVE_STATES

    start = _aware_utc(start_utc, "--from")
    end = _aware_utc(end_utc, "end_utc")
    found: list[OperatorTask] = []
    for experiment in store.experiments(rig_path=Path(rig_path).resolve(), states=LIVE_STATES):
        protocol = experiment_protocol(experiment)
        for task in tasks_for_run(protocol, rig, experiment.start_utc, experiment_id=experiment.id):
            if start <= task.start_utc < end:
                found.append(task)
    return sorted(found, key=lambda t: (t.start_utc, t.kind.value, t.title))


def experiment_protocol(experiment: Experiment) -> Protocol:
    """The protocol of a stored experiment, validated from its snapshot text.

    Parameters
    ----------
    experiment
        The stored experiment (no unit).

    Returns
    -------
    Protocol
        The snapshot's protocol (errors located as ``PROTOCOL`` of the snapshot).
    """
    from controller.files import parse_toml, validate_data
    from controller.protocol import Protocol

    where = Path(f"{experiment.protocol_path} ({experiment.id} snapshot)")
    return validate_data(
        parse_toml(experiment.protocol_text, file=where),
        Protocol,
        text=experiment.protocol_text,
        file=where,
    )
