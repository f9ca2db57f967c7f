"""``squall tasks``: the live experiments' tasks in a window, an iCalendar export that reads
back, and one clear line (exit 2) for bad input."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path

import icalendar
import pytest

from controller.cli import main
from controller.files import load_model
from controller.rig import Rig
from controller.schedule import ScheduleStore
from controller.schedule._tasks import TaskKind, schedule_tasks

REPO = Path(__file__).resolve().parents[2]
START = datetime(2026, 12, 3, 6, 0, tzinfo=UTC)

PROTOCOL = """
format = "squall-protocol/1"
title = "Two-day hold"

[groups.only]
role = "control"
chambers = ["C1", "C2", "C3", "C4"]

[[phases]]
name = "hold"
duration = "2d"
  [phases.programs]
  temperature = [ { kind = "hold", value = 18.0 } ]

[[sampling]]
at = "1d 12h"
what = "water for nutrients"
chambers = ["C2"]
minutes = 20
"""


@pytest.fixture
def planned(tmp_path: Path) -> tuple[Path, Path, list[str]]:
    rig = tmp_path / "rack8.toml"
    rig.write_bytes((REPO / "rigs" / "saltmarrow-rack8.toml").read_bytes())
    protocol = tmp_path / "hold.toml"
    protocol.write_text(PROTOCOL, encoding="utf-8")
    schedule = tmp_path / "runs" / "schedule.sqlite"
    with ScheduleStore(schedule) as store:
        ids = [
            store.add(rig_path=rig, protocol_path=protocol, start_utc=start, owner="ana").id
            for start in (START, START + timedelta(days=2), START + timedelta(days=5))
        ]
        store.cancel(ids[2], reason="no seagrass this week", by="ana")
    return rig, schedule, ids


def test_schedule_tasks_cover_live_experiments_inside_the_window(
    planned: tuple[Path, Path, list[str]],
) -> None:
    rig_path, schedule, ids = planned
    rig = load_model(rig_path, Rig)
    with ScheduleStore(schedule) as store:
        tasks = schedule_tasks(
            store, rig, rig_path, start_utc=START, end_utc=START + timedelta(days=10)
        )
        inside = schedule_tasks(
            store,
            rig,
            rig_path,
            start_utc=START + timedelta(days=1),
            end_utc=START + timedelta(days=2),
        )
    assert {t.experiment_id for t in tasks} == {ids[0], ids[1]}  # the cancelled one is gone
    starts = [t for t in tasks if t.kind is TaskKind.RUN_START]
    assert [t.start_utc for t in starts] == [START, START + timedelta(days=2)]
    assert all(START + timedelta(days=1) <= t.start_utc < START + timedelta(days=2) for t in inside)
    sampling = [t for t in inside if t.kind is TaskKind.SAMPLING]
    assert [(t.start_utc, t.chambers) for t in sampling] == [(START + timedelta(hours=36), ("C2",))]


def test_tasks_table_and_calendar(
    planned: tuple[Path, Path, list[str]], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rig, schedule, ids = planned
    ics = tmp_path / "tasks.ics"
    code = main(
        [
            "tasks", "--rig", str(rig), "--schedule", str(schedule),
            "--from", "2026-12-03T07:00+01:00", "--days", "4", "--ics", str(ics),
        ]
    )  # fmt: skip
    out = capsys.readouterr().out
    assert code == 0
    assert "Operator tasks from 2026-12-03 06:00 to 2026-12-07 06:00 UTC" in out
    assert f"Start {ids[0]} 'Two-day hold' on C1–C4" in out
    assert "Sample C2: water for nutrients" in out
    assert "2026-12-03 08:00  09:00+0100  15   daily-check" in out  # 09:00 local at UTC+1
    assert ids[2] not in out
    events = icalendar.Calendar.from_ical(ics.read_bytes()).walk("VEVENT")
    assert f"calendar: {ics} ({len(events)} events)" in out
    rows = [line for line in out.splitlines() if line.strip().startswith("2026-12-")]
    assert len(rows) == len(events) > 5
    assert sorted(e.decoded("DTSTART") for e in events)[0] == START


def test_an_empty_window_says_so(
    planned: tuple[Path, Path, list[str]], capsys: pytest.CaptureFixture[str]
) -> None:
    _, schedule, _ = planned
    args = ["tasks", "--schedule", str(schedule), "--from", "2027-06-01T00:00Z", "--days", "1"]
    assert main(args) == 0
    assert "No operator tasks from 2027-06-01 00:00 to 2027-06-02 00:00 UTC." in (
        capsys.readouterr().out
    )


@pytest.mark.parametrize(
    ("extra", "expected"),
    [
        (["--from", "2026-12-03 08:00"], "--from: '2026-12-03 08:00' has no zone"),
        (["--from", "tomorrow"], "--from: 'tomorrow' is not an ISO 8601 date-time"),
        (["--days", "0"], "--days: must be a number of days above 0"),
        (["--days", "nan"], "--days: must be a number of days above 0"),
        (["--rig", "no-such-rig.toml"], "no-such-rig.toml: file not found"),
    ],
)
def test_bad_input_is_one_line_and_exit_2(
    planned: tuple[Path, Path, list[str]],
    capsys: pytest.CaptureFixture[str],
    extra: list[str],
    expected: str,
) -> None:
    _, schedule, _ = planned
    assert main(["tasks", "--schedule", str(schedule), *extra]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and expected in err


def test_a_missing_schedule_is_refused_and_not_created(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    missing = tmp_path / "runs" / "schedule.sqlite"
    assert main(["tasks", "--schedule", str(missing)]) == 2
    assert "no schedule here" in capsys.readouterr().err
    assert not missing.exists()


def test_without_rig_every_rig_is_covered_and_the_calendar_is_in_utc(
    planned: tuple[Path, Path, list[str]], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rig, schedule, _ = planned
    other = tmp_path / "rack8-east.toml"
    other.write_text(
        rig.read_text(encoding="utf-8")
        .replace('name = "Saltmarrow Lagoon rack 8"', 'name = "Saltmarrow Lagoon rack 8, east"')
        .replace('timezone = "Etc/GMT-1"', 'timezone = "Etc/GMT-3"'),
        encoding="utf-8",
    )
    protocol = tmp_path / "hold.toml"
    with ScheduleStore(schedule) as store:
        east = store.add(rig_path=other, protocol_path=protocol, start_utc=START, owner="ben").id
    ics = tmp_path / "all.ics"
    args = ["tasks", "--schedule", str(schedule), "--from", "2026-12-03T06:00Z", "--days", "1"]
    assert main([*args, "--ics", str(ics)]) == 0
    out = capsys.readouterr().out
    assert f"Start {east} 'Two-day hold'" in out and "09:00+0300" in out  # east's own zone
    assert "daily-check" in out and "09:00+0100" in out
    text = ics.read_text(encoding="utf-8")
    assert "BEGIN:VTIMEZONE" not in text and "DTSTART:20261203T060000Z" in text
    events = icalendar.Calendar.from_ical(ics.read_bytes()).walk("VEVENT")
    described = [str(e["DESCRIPTION"]) for e in events]
    experiments = {d.split("Experiment: ")[1].split("\n")[0] for d in described}
    assert east in experiments and len(experiments) == 2
