"""iCalendar export (RFC 5545): the ``icalendar`` library reads back the same events at the same
instants, with the rig's zone described by a VTIMEZONE."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path

import icalendar
import pytest

from controller.errors import SquallError
from controller.files import load_model
from controller.protocol import Protocol
from controller.rig import Rig
from controller.schedule._ical import PRODID, to_icalendar
from controller.schedule._tasks import OperatorTask, TaskKind, tasks_for_run

REPO = Path(__file__).resolve().parents[2]
RIG = load_model(REPO / "rigs" / "saltmarrow-rack8.toml", Rig)
COMPOUND = load_model(REPO / "protocols" / "compound-heatwave-storm.toml", Protocol)
STAMP = datetime(2026, 12, 2, 1, 30, tzinfo=UTC)


def _read(data: bytes) -> icalendar.Calendar:
    return icalendar.Calendar.from_ical(data)


def _tasks(zone: str, start: datetime) -> tuple[Rig, list[OperatorTask]]:
    rig = RIG.model_copy(
        update={"maintenance": RIG.maintenance.model_copy(update={"timezone": zone})}
    )
    return rig, tasks_for_run(COMPOUND, rig, start, experiment_id="E0003")


def test_events_read_back_with_the_same_uids_times_and_texts() -> None:
    rig, tasks = _tasks("Etc/GMT-1", datetime(2027, 7, 6, 7, 0, tzinfo=UTC))
    data = to_icalendar(tasks, timezone="Etc/GMT-1", calendar_name=rig.name, stamp_utc=STAMP)
    calendar = _read(data)
    assert str(calendar["VERSION"]) == "2.0" and str(calendar["PRODID"]) == PRODID
    assert str(calendar["X-WR-CALNAME"]) == "Saltmarrow Lagoon rack 8"
    events = calendar.walk("VEVENT")
    assert len(events) == len(tasks) > 30  # 28 days of daily checks alone
    by_uid = {str(e["UID"]): e for e in events}
    assert set(by_uid) == {t.uid for t in tasks}
    for task in tasks:
        event = by_uid[task.uid]
        start = event.decoded("DTSTART")
        assert start.tzinfo is not None
        assert start == task.start_utc  # same instant
        assert start.utcoffset() == timedelta(hours=1)  # written in the rig's zone
        assert event.decoded("DURATION") == timedelta(minutes=task.minutes)
        assert event.decoded("DTSTAMP") == STAMP
        assert str(event["SUMMARY"]) == task.title
        assert task.detail in str(event["DESCRIPTION"])
        assert [str(c) for c in event["CATEGORIES"].cats] == [task.kind.value]
    sampling = [t for t in tasks if t.kind is TaskKind.SAMPLING]
    assert len(sampling) == 3
    assert "Experiment: E0003" in str(by_uid[sampling[0].uid]["DESCRIPTION"])


def test_the_text_follows_the_standard_layout() -> None:
    rig, tasks = _tasks("Etc/GMT-1", datetime(2027, 7, 6, 7, 0, tzinfo=UTC))
    data = to_icalendar(tasks, timezone="Etc/GMT-1", calendar_name=rig.name, stamp_utc=STAMP)
    text = data.decode("utf-8")
    # RFC 5545 section 3.1: lines end in CRLF and fold at 75 octets
    assert text.startswith("BEGIN:VCALENDAR\r\n") and text.endswith("END:VCALENDAR\r\n")
    assert all(len(line.encode("utf-8")) <= 75 for line in text.split("\r\n"))
    # section 3.2.19: a local time names its zone, which a VTIMEZONE defines
    assert "DTSTART;TZID=Etc/GMT-1:20270706T080000" in text  # 07:00 UTC at UTC+1
    assert "BEGIN:VTIMEZONE\r\nTZID:Etc/GMT-1\r\n" in text
    assert "DTSTAMP:20261202T013000Z" in text


def test_a_vtimezone_alone_gives_the_right_instants_across_a_dst_change() -> None:
    # Daily checks across the EU change to summer time on 2027-03-28 (from memory: last
    # Sunday of March), in the zone 'CET'.
    rig, tasks = _tasks("CET", datetime(2027, 3, 20, 12, 0, tzinfo=UTC))
    checks = [t for t in tasks if t.kind is TaskKind.DAILY_CHECK][:14]
    data = to_icalendar(checks, timezone="CET", calendar_name=rig.name, stamp_utc=STAMP)
    calendar = _read(data)
    (vtimezone,) = calendar.timezones
    assert vtimezone.tz_name == "CET"
    # Build the zone from the VTIMEZONE component only (not from the zone database), as a
    # calendar program without that database would.
    own = vtimezone.to_tz(lookup_tzid=False)
    for task, event in zip(checks, calendar.walk("VEVENT"), strict=True):
        written = event.decoded("DTSTART").replace(tzinfo=None)
        assert written.hour == 9 and written.minute == 0  # the local time stays 09:00
        assert written.replace(tzinfo=own).astimezone(UTC) == task.start_utc
    utc_hours = [t.start_utc.hour for t in checks]
    assert utc_hours == [8] * 7 + [7] * 7  # 21st–27th CET (UTC+1), from the 28th CEST


def test_utc_rig_needs_no_vtimezone() -> None:
    rig, tasks = _tasks("UTC", datetime(2027, 7, 6, 7, 0, tzinfo=UTC))
    data = to_icalendar(tasks[:5], timezone="UTC", calendar_name=rig.name, stamp_utc=STAMP)
    text = data.decode("utf-8")
    assert "BEGIN:VTIMEZONE" not in text
    assert "DTSTART:20270706T070000Z" in text
    assert [e.decoded("DTSTART") for e in _read(data).walk("VEVENT")] == [
        t.start_utc for t in tasks[:5]
    ]


def test_same_tasks_give_the_same_file_and_no_tasks_an_empty_calendar() -> None:
    _, tasks = _tasks("Etc/GMT-1", datetime(2027, 7, 6, 7, 0, tzinfo=UTC))
    one = to_icalendar(tasks, timezone="Etc/GMT-1", calendar_name="x", stamp_utc=STAMP)
    two = to_icalendar(tasks[::-1], timezone="Etc/GMT-1", calendar_name="x", stamp_utc=STAMP)
    assert one == two
    empty = _read(to_icalendar([], timezone="Etc/GMT-1", calendar_name="x", stamp_utc=STAMP))
    assert empty.walk("VEVENT") == [] and empty.timezones == []


def test_bad_zone_and_zone_less_stamp_are_refused() -> None:
    _, tasks = _tasks("UTC", datetime(2027, 7, 6, 7, 0, tzinfo=UTC))
    with pytest.raises(SquallError, match="not an IANA time zone"):
        to_icalendar(tasks, timezone="Mars/Olympus", calendar_name="x")
    with pytest.raises(SquallError, match="needs a zone"):
        to_icalendar(tasks, timezone="UTC", calendar_name="x", stamp_utc=datetime(2027, 1, 1))
