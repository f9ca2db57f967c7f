"""Fold the run log's rare tables into what the views show: alarms and hold state.

Rules of this module
--------------------
- Pure functions over rows already read (:class:`~._logfile.LogFile` reads them; the broker
  source makes them from telemetry): no file, no clock, no textual. The live, replay and
  broker sources all use them; replay passes only the rows up to its position.
- An alarm is keyed by (code, chamber). A raise starts it (again), a clear ends it, an
  acknowledgement after the latest raise marks it acknowledged. An acknowledgement or clear
  with no raise before it is ignored (the log may start mid-way after a resume).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace

from controller.storage import AlarmAction, AlarmLevel, EventKind

from ._snapshot import AlarmEntry, ChamberState

__all__ = [
    "AlarmRow",
    "EventRow",
    "apply_alarms",
    "fold_alarms",
    "held_at",
]

_SEVERITY = {AlarmLevel.WARNING: 1, AlarmLevel.ALARM: 2, AlarmLevel.TRIP: 3}


@dataclass(frozen=True, slots=True)
class AlarmRow:
    """One record of the ``alarms`` table, reduced to what folding needs.

    Attributes
    ----------
    utc_s
        UTC wall time, POSIX s.
    action
        raise, clear or ack.
    level
        warning, alarm or trip.
    code
        Alarm code.
    reason
        Why, in words.
    chamber
        Chamber concerned; None for the whole rig.
    user
        Who acknowledged (ack only).
    """

    utc_s: float
    action: AlarmAction
    level: AlarmLevel
    code: str
    reason: str
    chamber: str | None
    user: str | None


@dataclass(frozen=True, slots=True)
class EventRow:
    """One record of the ``events`` table, reduced to what folding needs.

    Attributes
    ----------
    utc_s
        UTC wall time, POSIX s.
    kind
        Kind of event.
    phase
        Phase entered or in force, if recorded.
    detail
        Free text.
    """

    utc_s: float
    kind: EventKind
    phase: str | None
    detail: str


def fold_alarms(rows: Iterable[AlarmRow]) -> tuple[AlarmEntry, ...]:
    """Fold alarm records into one entry per (code, chamber).

    Parameters
    ----------
    rows
        Alarm records in write order.

    Returns
    -------
    tuple of AlarmEntry
        Active alarms first (unacknowledged before acknowledged), then cleared ones; newest
        raise first within each group.
    """
    entries: dict[tuple[str, str | None], AlarmEntry] = {}
    for row in rows:
        key = (row.code, row.chamber)
        entry = entries.get(key)
        if row.action is AlarmAction.RAISE:
            count = 1 if entry is None else entry.times_raised + 1
            entries[key] = AlarmEntry(
                code=row.code,
                chamber=row.chamber,
                level=row.level,
                reason=row.reason,
                raised_utc_s=row.utc_s,
                times_raised=count,
            )
        elif entry is None:
            continue
        elif row.action is AlarmAction.CLEAR:
            if entry.cleared_utc_s is None:
                entries[key] = replace(entry, cleared_utc_s=row.utc_s)
        elif entry.acked_utc_s is None:
            entries[key] = replace(entry, acked_utc_s=row.utc_s, acked_by=row.user or "?")

    def order(entry: AlarmEntry) -> tuple[int, float]:
        group = 0 if entry.needs_attention else (1 if entry.active else 2)
        return group, -entry.raised_utc_s

    return tuple(sorted(entries.values(), key=order))


def apply_alarms(state: ChamberState, alarms: Sequence[AlarmEntry]) -> ChamberState:
    """Set a chamber's alarm level and acknowledgement from the folded alarms.

    The chamber's active alarm code comes from its sample row (the control loop's view); the
    level is the worst active alarm of the chamber in the alarm records, and an alarm code
    in the samples without any record counts as an unacknowledged alarm.

    Parameters
    ----------
    state
        The chamber's state with ``alarm_code`` from its newest sample.
    alarms
        Folded alarms of the run.

    Returns
    -------
    ChamberState
        The state with ``alarm_level`` and ``alarm_acked`` set.
    """
    mine = [a for a in alarms if a.chamber == state.chamber and a.active]
    if not mine and state.alarm_code is None:
        if state.alarm_level is None and state.alarm_acked:
            return state
        return replace(state, alarm_level=None, alarm_acked=True)
    level: AlarmLevel | None = None
    acked = True
    for alarm in mine:
        if level is None or _SEVERITY[alarm.level] > _SEVERITY[level]:
            level = alarm.level
        acked = acked and alarm.acked
    if state.alarm_code is not None and not any(a.code == state.alarm_code for a in mine):
        level = level or AlarmLevel.ALARM
        acked = False
    code = state.alarm_code
    if code is None and mine:
        worst = max(mine, key=lambda a: _SEVERITY[a.level])
        code = worst.code
    return replace(state, alarm_code=code, alarm_level=level, alarm_acked=acked)


def held_at(events: Iterable[EventRow]) -> bool:
    """Whether the protocol clock is held after these events (the last hold-type event).

    Parameters
    ----------
    events
        Run events in write order.

    Returns
    -------
    bool
        True when the newest hold or hold-end event is a hold.
    """
    held = False
    for event in events:
        if event.kind is EventKind.HOLD:
            held = True
        elif event.kind in (EventKind.HOLD_END, EventKind.ABORT, EventKind.RUN_STOP):
            held = False
    return held
