"""Operator tasks of a run: sampling, calibrations before and during it, cleaning, daily checks
at local time across daylight-saving changes, stable uids."""

from __future__ import annotations

import datetime as dt
import itertools
import tomllib
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest

from controller.errors import SquallError
from controller.files import load_model
from controller.protocol import Protocol
from controller.rig import Rig
from controller.schedule._tasks import (
    CalibrationKind,
    TaskKind,
    calibration_states,
    chamber_list,
    tasks_for_run,
)

REPO = Path(__file__).resolve().parents[2]
RIG_PATH = REPO / "rigs" / "saltmarrow-rack8.toml"

PROTOCOL = """
format = "squall-protocol/1"
title = "Short warm hold"

[groups.bath]
role = "control"
chambers = ["C1", "C2", "C3", "C4"]

[groups.own]
role = "treatment"
chambers = ["C5", "C6"]

[[phases]]
name = "hold"
duration = "{days}d"
  [phases.programs]
  temperature = [ {{ kind = "hold", value = 18.0 }} ]

[[sampling]]
at = "1d 2h"
what = "water for nutrients"
chambers = ["C6", "C1"]
minutes = 40

[[sampling]]
at = "hold+2d"
what = "sediment cores"
"""


def _protocol(days: int = 3) -> Protocol:
    return Protocol.model_validate(tomllib.loads(PROTOCOL.format(days=days)))


def _rig(**maintenance: Any) -> Rig:
    rig = load_model(RIG_PATH, Rig)
    if maintenance:
        rig = rig.model_copy(update={"maintenance": rig.maintenance.model_copy(update=maintenance)})
    return rig


def _of(tasks: list[Any], kind: TaskKind) -> list[Any]:
    return [t for t in tasks if t.kind is kind]


def test_run_start_end_and_sampling_times() -> None:
    start = datetime(2026, 12, 10, 10, 0, tzinfo=UTC)
    tasks = tasks_for_run(_protocol(), _rig(), start, experiment_id="E0007")
    assert [t.start_utc for t in tasks] == sorted(t.start_utc for t in tasks)
    (begin,) = _of(tasks, TaskKind.RUN_START)
    (end,) = _of(tasks, TaskKind.RUN_END)
    assert begin.start_utc == start and end.start_utc == start + timedelta(days=3)
    assert begin.chambers == ("C1", "C2", "C3", "C4", "C5", "C6")
    water, cores = _of(tasks, TaskKind.SAMPLING)
    assert water.start_utc == start + timedelta(hours=26)
    assert water.chambers == ("C1", "C6")  # rig order, whatever the file's order
    assert water.minutes == 40.0
    assert water.title == "Sample C1, C6: water for nutrients"
    assert cores.start_utc == start + timedelta(days=2)
    assert cores.chambers == begin.chambers and cores.minutes == 15.0
    assert cores.title == "Sample C1–C6: sediment cores"
    assert all(t.experiment_id == "E0007" for t in tasks)
    assert all(t.start_utc.tzinfo is UTC for t in tasks)


def test_fresh_calibrations_give_no_task_and_stale_cleaning_comes_a_day_before() -> None:
    # rack 8: optodes calibrated 2026-11-24 (limit 30 d), lamps 2026-10-05 (180 d), probes
    # 2026-11-02 (90 d), cleaned 2026-11-24 (every 7 d); zone Etc/GMT-1, daily check 09:00.
    start = datetime(2026, 12, 10, 10, 0, tzinfo=UTC)
    tasks = tasks_for_run(_protocol(), _rig(), start)
    assert _of(tasks, TaskKind.CALIBRATION) == []
    (clean,) = _of(tasks, TaskKind.MAINTENANCE)
    assert clean.start_utc == start - timedelta(days=1)
    assert clean.title == "Clean C1–C6"
    assert clean.minutes == 10.0 * 6
    assert "due before the run starts" in clean.detail


def test_stale_optodes_are_calibrated_before_the_start_and_again_when_they_expire() -> None:
    start = datetime(2026, 12, 30, 10, 0, tzinfo=UTC)  # optodes 36 d old: stale
    tasks = tasks_for_run(_protocol(days=40), _rig(), start)
    calibrations = _of(tasks, TaskKind.CALIBRATION)
    optode = [t for t in calibrations if t.title.startswith("Calibrate optode")]
    assert [t.start_utc for t in optode] == [
        start - timedelta(days=1),  # 2026-12-29, the planned calibration
        # fresh through 2026-12-29 + 30 d = 2027-01-28; 09:00 at UTC+1 is 08:00 UTC
        datetime(2027, 1, 28, 8, 0, tzinfo=UTC),
    ]
    assert optode[0].chambers == ("C1", "C2", "C3", "C4", "C5", "C6")
    assert optode[0].minutes == 30.0 * 6
    assert "stale at the run's start" in optode[0].detail
    assert "while the run is on" in optode[1].detail
    probes = [t for t in calibrations if t.title.startswith("Check probes")]
    # probes checked 2026-11-02, limit 90 d: last fresh day 2027-01-31
    assert [t.start_utc for t in probes] == [datetime(2027, 1, 31, 8, 0, tzinfo=UTC)]
    assert not [t for t in calibrations if "lamp" in t.title]  # lamps fresh to 2027-04-03
    cleaning = _of(tasks, TaskKind.MAINTENANCE)
    gaps = {b.start_utc - a.start_utc for a, b in itertools.pairwise(cleaning[1:])}
    assert gaps == {timedelta(days=7)}


def test_one_chamber_with_an_old_date_gets_its_own_task() -> None:
    rig = _rig()
    chambers = [
        c.model_copy(update={"calibration": c.calibration.model_copy(update={"lamp_on": None})})
        if c.id == "C5"
        else c
        for c in rig.chambers
    ]
    rig = rig.model_copy(update={"chambers": chambers})
    start = datetime(2026, 12, 10, 10, 0, tzinfo=UTC)
    lamp = [t for t in tasks_for_run(_protocol(), rig, start) if "lamp" in t.title]
    assert [(t.title, t.chambers, t.minutes) for t in lamp] == [
        ("Calibrate lamp C5", ("C5",), 20.0)
    ]


def test_daily_checks_at_local_time_every_day_the_run_is_on() -> None:
    start = datetime(2026, 12, 10, 10, 0, tzinfo=UTC)
    checks = _of(tasks_for_run(_protocol(), _rig(), start), TaskKind.DAILY_CHECK)
    # 09:00 in Etc/GMT-1 (UTC+1; POSIX sign convention, tz database) is 08:00 UTC; the run
    # starts after that on day 1 and ends after it on day 4.
    assert [t.start_utc for t in checks] == [
        datetime(2026, 12, d, 8, 0, tzinfo=UTC) for d in (11, 12, 13)
    ]
    assert all(t.minutes == 15.0 for t in checks)


@pytest.mark.parametrize(
    ("zone", "before", "after"),
    [
        # EU rule: summer time from the last Sunday of March, 01:00 UTC (2027-03-28)
        # (from memory); 09:00 CET = 08:00 UTC, 09:00 CEST = 07:00 UTC.
        ("CET", datetime(2027, 3, 27, 8, tzinfo=UTC), datetime(2027, 3, 28, 7, tzinfo=UTC)),
        # US rule: daylight time from the second Sunday of March (2027-03-14) (from
        # memory); 09:00 EST = 14:00 UTC, 09:00 EDT = 13:00 UTC.
        ("EST5EDT", datetime(2027, 3, 13, 14, tzinfo=UTC), datetime(2027, 3, 14, 13, tzinfo=UTC)),
    ],
)
def test_daily_checks_keep_their_local_time_across_daylight_saving(
    zone: str, before: datetime, after: datetime
) -> None:
    rig = _rig(timezone=zone)
    start = before - timedelta(hours=1)
    checks = _of(tasks_for_run(_protocol(days=3), rig, start), TaskKind.DAILY_CHECK)
    assert checks[0].start_utc == before
    assert checks[1].start_utc == after
    assert after - before == timedelta(hours=23)  # the short day


def test_no_daily_check_time_means_no_daily_checks_and_upkeep_at_nine() -> None:
    rig = _rig(daily_check_at=None)
    start = datetime(2026, 12, 30, 10, 0, tzinfo=UTC)
    tasks = tasks_for_run(_protocol(days=40), rig, start)
    assert _of(tasks, TaskKind.DAILY_CHECK) == []
    mid = [t for t in _of(tasks, TaskKind.CALIBRATION) if t.start_utc > start]
    assert mid and all(
        t.start_utc.astimezone(dt.timezone(timedelta(hours=1))).hour == 9 for t in mid
    )


def test_uids_are_stable_and_distinct() -> None:
    start = datetime(2026, 12, 30, 10, 0, tzinfo=UTC)
    first = tasks_for_run(_protocol(days=10), _rig(), start, experiment_id="E0001")
    again = tasks_for_run(_protocol(days=10), _rig(), start, experiment_id="E0001")
    assert [t.uid for t in first] == [t.uid for t in again]
    assert len({t.uid for t in first}) == len(first)
    other = tasks_for_run(_protocol(days=10), _rig(), start, experiment_id="E0002")
    assert not {t.uid for t in first} & {t.uid for t in other}
    # moving the run moves its start, end and sampling tasks: new uids; a daily check that
    # stays at the same instant for the same chambers stays the same task
    unscheduled = tasks_for_run(_protocol(days=10), _rig(), start)
    moved = tasks_for_run(_protocol(days=10), _rig(), start + timedelta(hours=1))
    timed = (TaskKind.RUN_START, TaskKind.RUN_END, TaskKind.SAMPLING)
    assert {t.uid for t in moved if t.kind in timed}.isdisjoint(t.uid for t in unscheduled)
    daily = {t.uid for t in unscheduled if t.kind is TaskKind.DAILY_CHECK}
    assert daily == {t.uid for t in moved if t.kind is TaskKind.DAILY_CHECK}


def test_calibration_states_count_whole_local_days() -> None:
    rig = _rig()
    # 2026-12-24 23:30 UTC is already 12-25 at UTC+1: the optode is 31 d old there
    states = calibration_states(rig, ["C1"], datetime(2026, 12, 24, 22, 30, tzinfo=UTC))
    optode = next(s for s in states if s.kind is CalibrationKind.OPTODE)
    assert (optode.age_d, optode.fresh) == (30, True)
    states = calibration_states(rig, ["C1"], datetime(2026, 12, 24, 23, 30, tzinfo=UTC))
    optode = next(s for s in states if s.kind is CalibrationKind.OPTODE)
    assert (optode.age_d, optode.fresh) == (31, False)
    assert "31 d old" in optode.describe() and "limit 30 d" in optode.describe()
    assert [s.kind for s in states] == list(CalibrationKind)


def test_zone_less_start_and_unknown_chambers_are_refused() -> None:
    with pytest.raises(SquallError, match="no zone"):
        tasks_for_run(_protocol(), _rig(), datetime(2026, 12, 10, 10, 0))
    data = tomllib.loads(PROTOCOL.format(days=3))
    data["groups"]["own"]["chambers"] = ["C11", "C6"]
    with pytest.raises(SquallError, match=r"does not have: C11$"):
        tasks_for_run(Protocol.model_validate(data), _rig(), datetime(2026, 12, 10, tzinfo=UTC))


def test_chamber_list_compacts_runs() -> None:
    assert chamber_list(["C1", "C2", "C3"]) == "C1–C3"
    assert chamber_list(["C1", "C3"]) == "C1, C3"
    assert chamber_list(["A", "B", "C"]) == "A, B, C"


def test_a_limit_under_a_day_asks_for_the_procedure_every_day() -> None:
    rig = _rig(cleaning_interval_d=0.5)
    start = datetime(2026, 12, 10, 10, 0, tzinfo=UTC)
    cleaning = _of(tasks_for_run(_protocol(), rig, start), TaskKind.MAINTENANCE)
    # the day before; that is stale again on the start day, so at the start; then 09:00
    # local (08:00 UTC) on each later day of the run
    assert [t.start_utc for t in cleaning] == [start - timedelta(days=1), start] + [
        datetime(2026, 12, d, 8, 0, tzinfo=UTC) for d in (11, 12, 13)
    ]
