"""``squall serve --sim`` rehearses on a copy: the facility's schedule is left exactly as it was,
the rehearsal's logs go beside the copy, and a rehearsal runs while the rig's real serve
holds it (it drives no device and writes no shared schedule)."""

from __future__ import annotations

import sqlite3
import stat
from pathlib import Path

import pytest

from controller.cli import main
from controller.runtime import RigLock
from controller.schedule import ExperimentState, ScheduleStore

from .test_serve import START, _add, _protocol, _rig


def _dump(path: Path) -> list[str]:
    conn = sqlite3.connect(path)
    try:
        return list(conn.iterdump())
    finally:
        conn.close()


def test_a_rehearsal_runs_on_a_copy_beside_the_schedule_while_the_rig_is_held(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rig = _rig(tmp_path)
    schedule = tmp_path / "runs" / "schedule.sqlite"
    exp = _add(schedule, rig, _protocol(tmp_path, "bath", ["C1", "C2"]), START)
    before = _dump(schedule)
    holder = RigLock(rig)  # the rig's real serve is running
    try:
        argv = ["serve", "--rig", str(rig), "--schedule", str(schedule), "--sim"]
        code = main([*argv, "--sim-start", START.isoformat(), "--period", "300"])
    finally:
        holder.release()
    out = capsys.readouterr().out
    assert code == 0
    assert _dump(schedule) == before  # nothing recorded in the facility's schedule
    assert not list(schedule.parent.glob(f"{exp}-*.sqlite"))  # and no log beside it
    copies = list((schedule.parent / "rehearsals").glob("schedule-*/schedule.sqlite"))
    assert len(copies) == 1
    copy = copies[0]
    assert f"rehearsal on a copy: {copy}" in out and f"{exp} done" in out
    assert stat.S_IMODE(copy.stat().st_mode) == 0o600
    with ScheduleStore(copy) as store:
        done = store.get(exp)
    assert done.state is ExperimentState.DONE
    assert done.log_path is not None and done.log_path.parent == copy.parent
    assert done.log_path.exists()


def test_write_schedule_needs_sim_and_a_missing_schedule_copies_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rig = _rig(tmp_path)
    schedule = tmp_path / "runs" / "schedule.sqlite"
    code = main(["serve", "--rig", str(rig), "--schedule", str(schedule), "--write-schedule"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and err.count("\n") == 0
    assert "--write-schedule applies to a simulated serve only" in err
    assert main(["serve", "--rig", str(rig), "--schedule", str(schedule), "--sim"]) == 2
    assert "no schedule here" in capsys.readouterr().err
    assert not (tmp_path / "runs").exists()
