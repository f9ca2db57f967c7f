"""Operator tasks as an iCalendar file (RFC 5545), written with the ``icalendar`` library.

Rules of this module
--------------------
- One VEVENT per task: ``UID`` is the task's stable uid (a calendar that imports the file
  again updates its events instead of doubling them), ``DTSTAMP`` when the file was made
  (UTC), ``DTSTART`` in the rig's local zone with its ``TZID``, ``DURATION`` the time set
  aside, ``SUMMARY`` the task's title, ``DESCRIPTION`` its detail with chambers and
  experiment, ``CATEGORIES`` its kind, ``LOCATION`` its chambers.
- Every ``TZID`` used has its VTIMEZONE, built by ``icalendar`` from the zone database for
  the calendar years the tasks fall in (DST rules included); UTC needs none (times are
  written with ``Z``, RFC 5545 section 3.3.5).
- The calendar names itself with ``NAME`` (RFC 7986) and the widely read ``X-WR-CALNAME``.
- Output is bytes with CRLF line ends and folded lines, as the standard asks.
"""

from __future__ import annotations

import zoneinfo
from collections.abc import Sequence
from datetime import UTC, date, datetime, timedelta

from controller.errors import SquallError
from controller.schedule._tasks import OperatorTask, chamber_list

__all__ = ["PRODID", "to_icalendar"]

PRODID = "-//squall//operator tasks//EN"
"""Product identifier of the calendars squall writes (RFC 5545 section 3.7.3)."""


def _zone(timezone: str) -> zoneinfo.ZoneInfo:
    try:
        return zoneinfo.ZoneInfo(timezone)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise SquallError(
            f"{timezone!r} is not an IANA time zone name", field="maintenance.timezone"
        ) from None


def _description(task: OperatorTask) -> str:
    lines = [task.detail]
    if task.chambers:
        lines.append(f"Chambers: {chamber_list(task.chambers)}")
    if task.experiment_id is not None:
        lines.append(f"Experiment: {task.experiment_id}")
    lines.append(f"Time set aside: {task.minutes:g} min")
    return "\n".join(lines)


def to_icalendar(
    tasks: Sequence[OperatorTask],
    *,
    timezone: str,
    calendar_name: str,
    stamp_utc: datetime | None = None,
) -> bytes:
    """Write operator tasks as an iCalendar file.

    Parameters
    ----------
    tasks
        The tasks (any order; written in time order) (no unit).
    timezone
        IANA zone the start times are written in (the rig's ``maintenance.timezone``).
    calendar_name
        Name of the calendar (e.g. the rig's name).
    stamp_utc
        ``DTSTAMP`` of every event (when the file was made), aware; default now.

    Returns
    -------
    bytes
        The calendar, UTF-8 with CRLF line ends (RFC 5545) (no unit).

    Raises
    ------
    SquallError
        An unknown zone name, or a zone-less ``stamp_utc``.
    """
    import icalendar

    zone = _zone(timezone)
    if stamp_utc is None:
        stamp_utc = datetime.now(UTC)
    elif stamp_utc.tzinfo is None or stamp_utc.utcoffset() is None:
        raise SquallError("the calendar's time stamp needs a zone", field="stamp_utc")
    stamp = stamp_utc.astimezone(UTC).replace(microsecond=0)
    calendar = icalendar.Calendar()
    calendar.add("prodid", PRODID)
    calendar.add("version", "2.0")
    calendar.add("calscale", "GREGORIAN")
    calendar.add("name", calendar_name)
    calendar.add("x-wr-calname", calendar_name)
    ordered = sorted(tasks, key=lambda t: (t.start_utc, t.uid))
    for task in ordered:
        event = icalendar.Event()
        event.add("uid", task.uid)
        event.add("dtstamp", stamp)
        event.add("dtstart", task.start_utc.astimezone(zone))
        event.add("duration", timedelta(minutes=task.minutes))
        event.add("summary", task.title)
        event.add("description", _description(task))
        event.add("categories", [task.kind.value])
        if task.chambers:
            event.add("location", f"chambers {chamber_list(task.chambers)}")
        calendar.add_component(event)
    if ordered:
        first = ordered[0].start_utc.astimezone(zone).date()
        last = max(t.end_utc for t in ordered).astimezone(zone).date()
        calendar.add_missing_timezones(
            first_date=date(first.year, 1, 1), last_date=date(last.year + 1, 1, 1)
        )
    return bytes(calendar.to_ical())
